"""Camera model, calibration file and calibration tools."""

from .model import CameraModel, Mount, load_camera, save_camera

__all__ = ["CameraModel", "Mount", "load_camera", "save_camera"]
