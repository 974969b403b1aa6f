"""The seam between the loop and the perception and correlator stages.

A *perceiver* turns an image and a gravity vector into a bird's-eye grid
(``perceive(image, gravity) -> BevGrid``, whose ``status`` is "ok" or the reason). A
*matcher* correlates a grid with the map: ``global_search(bev, x, y)`` searches the whole
window around a centre and returns a :class:`~tinyloc.track.gridfilter.GlobalEvidence`
(best log-likelihood per cell over heading); ``track(bev, x, y, yaw)`` returns a
:class:`~tinyloc.track.gridfilter.LikelihoodVolume` over a small box around a pose. Either
returns None when it cannot, with the reason in its ``status`` attribute. Both own their
buffers and are built once per calibration and map; an optional ``warmup()`` runs at
start-up. The defaults wrap tinyloc's own stages; tests and users may pass their own
objects with the same methods.
"""

from __future__ import annotations

from ..errors import TinylocError


class StageMissing(TinylocError, RuntimeError):
    """A stage the loop needs is not installed in this build."""


def default_perceiver(camera, cfg, geom):
    """tinyloc's classical segmenter + overhead projector for this calibration."""
    try:
        from ._adapters import PerceptionAdapter
    except ImportError as e:  # pragma: no cover - depends on what is installed
        raise StageMissing(f"perception stage unavailable ({e})") from None
    return PerceptionAdapter(camera, cfg, geom)


def default_matcher(packed_map, cfg, geom, bev=None):
    """tinyloc's FFT rotational correlator over windows of ``packed_map`` (sized for ``bev``'s geometry)."""
    try:
        from ._adapters import CorrelatorAdapter
    except ImportError as e:  # pragma: no cover
        raise StageMissing(f"correlator stage unavailable ({e})") from None
    return CorrelatorAdapter(packed_map, cfg, geom, bev)
