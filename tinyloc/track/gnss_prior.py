"""A robust prior on position from a satellite fix.

Consumer receivers report a 1-sigma horizontal accuracy that is often optimistic,
and their error is a slowly wandering bias (metres) with occasional jumps of tens
of metres near buildings. So the fix enters the filter as a heavy-tailed 2D
Student-t density whose scale never drops below a floor and is inflated from the
reported value, and it is tempered (raised to a power < 1) while tracking,
because successive fixes share the same bias and are not independent evidence.

The 2D Student-t density with ``nu`` degrees of freedom and scale ``s`` is
(common practice, e.g. any multivariate-statistics handbook)::

    p(r) = 1 / (2 pi s^2) * (1 + r^2 / (nu s^2)) ** (-(nu + 2) / 2)

For large ``nu`` it tends to the isotropic Gaussian with standard deviation ``s``.
"""

from __future__ import annotations

from dataclasses import dataclass
import math


@dataclass(frozen=True)
class GnssParams:
    """How far a satellite fix is trusted.

    Parameters
    ----------
    sigma_floor_m : float
        Smallest scale ever used (m): a fix claiming 0.5 m is still treated as this.
    acc_scale : float
        Factor applied to the receiver's reported 1-sigma accuracy (receivers are optimistic).
    nu : float
        Degrees of freedom of the Student-t tail; small = heavier tail = outliers hurt less.
    weight_search : float
        Tempering exponent while searching (the fix is the main prior then).
    weight_track : float
        Tempering exponent per fix while tracking (fixes share a wandering bias).
    search_tau_s : float
        While searching, each fix after the first counts as ``min(1, dt / search_tau_s)`` of one
        (``dt`` the time since the previous fix used), so 1 Hz fixes count a quarter each [4.0]; 0
        counts each in full. Fixes a second apart share most of their error (a receiver's bias wanders
        over tens of seconds, common practice; the simulator's has a 60 s correlation time), and with
        each counted in full the search settled where the bias put it, 1.5-3 m along the street, and
        locked on there (docs/tracking.md, "Fixes while searching").
    max_acc_m : float
        Fixes reporting a worse accuracy than this are ignored (m).
    max_age_s : float
        Fixes older than this at the frame time are ignored (s).
    disagree_m : float
        A fix farther than ``max(disagree_m, 3 * scale)`` from the estimate disagrees with it (m).
    disagree_s : float
        Sustained disagreement for this long asks for a global check (s).
    offset_degrade_m : float
        While tracking, when the fixes sit on average (exponential average over about
        ``1 / offset_alpha`` fixes) farther than this from the estimate, the output is "degraded":
        the belief may be confidently wrong along a street that matches the map at several places.
        Only the flag changes, not the estimate (m; 0 turns it off).
    offset_alpha : float
        Weight of a new fix in that average.
    gate_m : float
        Global-search candidates farther than ``max(gate_m, 5 * scale)`` from a fresh fix are not
        considered (the pose near the current estimate always is) (m).
    """

    sigma_floor_m: float = 3.0
    acc_scale: float = 1.5
    nu: float = 3.0
    weight_search: float = 1.0
    weight_track: float = 0.02
    search_tau_s: float = 4.0
    max_acc_m: float = 100.0
    max_age_s: float = 2.0
    disagree_m: float = 10.0
    disagree_s: float = 4.0
    gate_m: float = 30.0
    offset_degrade_m: float = 3.0
    offset_alpha: float = 0.1


def search_fix_weight(dt_s: float | None, p: GnssParams) -> float:
    """Tempering exponent of a fix used while searching, ``dt_s`` after the previous one (None: the first)."""
    if dt_s is None or p.search_tau_s <= 0.0:
        return p.weight_search
    return p.weight_search * min(1.0, max(dt_s, 0.0) / p.search_tau_s)


def effective_sigma_m(acc_m: float, p: GnssParams) -> float:
    """Scale (m) used for a fix that reports 1-sigma accuracy ``acc_m`` (NaN or <= 0 -> the floor)."""
    if not math.isfinite(acc_m) or acc_m <= 0.0:
        return p.sigma_floor_m
    return max(p.sigma_floor_m, p.acc_scale * acc_m)


def student_t_logpdf(r_m: float, sigma_m: float, nu: float) -> float:
    """Log density of the isotropic 2D Student-t at radius ``r_m`` (per m^2)."""
    return (-math.log(2.0 * math.pi * sigma_m * sigma_m)
            - 0.5 * (nu + 2.0) * math.log1p(r_m * r_m / (nu * sigma_m * sigma_m)))


def fix_usable(acc_m: float, age_s: float, x_m: float, y_m: float, p: GnssParams) -> bool:
    """A fix is used when its position is finite, it is fresh and its reported accuracy is not absurd."""
    if not (math.isfinite(x_m) and math.isfinite(y_m)):
        return False
    if not (0.0 <= age_s <= p.max_age_s):
        return False
    return not (math.isfinite(acc_m) and acc_m > p.max_acc_m)


class DisagreementClock:
    """Measures for how long the fixes have disagreed with the estimate (s)."""

    def __init__(self, p: GnssParams):
        self.p = p
        self.since = math.nan

    def reset(self) -> None:
        self.since = math.nan

    def observe(self, t: float, dist_m: float, sigma_m: float) -> float:
        """Feed one fix's distance to the estimate; returns the disagreement duration so far (s)."""
        if dist_m > max(self.p.disagree_m, 3.0 * sigma_m):
            if math.isnan(self.since):
                self.since = t
            return t - self.since
        self.since = math.nan
        return 0.0
