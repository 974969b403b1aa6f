"""The live loop: configuration, the localizer object, sources, sinks and the run log."""

from .config import LoopConfig, LoopParams, MatchParams, load_config
from .loop import Frame, Localizer, PoseEstimate

__all__ = ["Frame", "Localizer", "LoopConfig", "LoopParams", "MatchParams", "PoseEstimate", "load_config"]
