"""Perception: classical segmentation of camera frames and their projection to bird's-eye evidence."""
