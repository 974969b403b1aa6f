"""Tracking over time: the grid Bayes filter, its lost/recovered logic and the robust GNSS prior."""

from .gnss_prior import GnssParams
from .gridfilter import (QUALITIES, FilterEstimate, GlobalEvidence, GridFilter, LikelihoodVolume, MapGeometry, TrackOutput,
                         TrackParams, Tracker)

__all__ = ["GnssParams", "QUALITIES", "FilterEstimate", "GlobalEvidence", "GridFilter", "LikelihoodVolume", "MapGeometry",
           "TrackOutput", "TrackParams", "Tracker"]
