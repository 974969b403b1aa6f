"""Correlator: scores bird's-eye evidence against a map window over every heading and shift.

Public API: :class:`Correlator`, :class:`CorrelatorParams`, :class:`ScoringModel`,
:class:`Mode`, :class:`SearchResult`, :class:`TrackResult` (docs/correlator.md).
"""

from .correlator import Correlator, CorrelatorParams, SearchResult, TrackResult
from .peaks import Mode
from .scoring import ScoringModel

__all__ = ["Correlator", "CorrelatorParams", "SearchResult", "TrackResult", "Mode", "ScoringModel"]
