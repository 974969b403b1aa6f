"""Per-topic timestamp bookkeeping: which messages to keep, and a report of what the clocks did.

Run folders need monotonic sensor time, so every stream goes through a
:class:`StampTracker` that accepts a message only if its header stamp is later than the
last accepted one. What it refuses (no stamp, a repeated stamp, a stamp going
backwards) and what it notices (gaps, clock jumps against the recorder's clock) is
counted with the message index, for the report.
"""

from __future__ import annotations

from dataclasses import dataclass, field

NS = 1_000_000_000


def fmt_ns(t_ns: int) -> str:
    """Integer nanoseconds as exact decimal seconds ('1700000000.093000000')."""
    sign = "-" if t_ns < 0 else ""
    t = abs(int(t_ns))
    return f"{sign}{t // NS}.{t % NS:09d}"


@dataclass(frozen=True)
class StampParams:
    """Thresholds of the timestamp report.

    Parameters
    ----------
    gap_factor : float
        An interval longer than ``gap_factor`` times the topic's nominal period is a gap.
    gap_min_s : float
        ...and it must also exceed the nominal period by at least this much (s).
    jump_s : float
        A change of more than this (s) in (record time - header stamp) between consecutive
        messages is a clock jump (the sensor clock stepped relative to the recorder's).
    nominal_from : int
        The nominal period is the median of the first this many intervals.
    keep_events : int
        At most this many events of each kind keep their details; all are counted.
    """

    gap_factor: float = 3.0
    gap_min_s: float = 0.05
    jump_s: float = 1.0
    nominal_from: int = 32
    keep_events: int = 20


@dataclass
class StampTracker:
    """Accept/reject messages of one topic by header stamp; accumulate the report."""

    topic: str
    params: StampParams = field(default_factory=StampParams)
    seen: int = 0
    accepted: int = 0
    first_ns: int | None = None
    last_ns: int | None = None
    last_offset_ns: int | None = None
    stampless: int = 0
    duplicates: int = 0
    backwards: int = 0
    gaps: int = 0
    clock_jumps: int = 0
    largest_gap_s: float = 0.0
    events: list = field(default_factory=list)
    _intervals: list = field(default_factory=list)
    _nominal_ns: float | None = None
    _kinds: dict = field(default_factory=dict)

    def _event(self, kind: str, index: int, text: str) -> None:
        n = self._kinds.get(kind, 0)
        self._kinds[kind] = n + 1
        if n < self.params.keep_events:
            self.events.append(f"{self.topic} message #{index}: {text}")

    def check(self, stamp_ns: int, record_ns: int, index: int) -> bool:
        """Decide on message ``index`` (0-based within the topic); True means keep it.

        Parameters
        ----------
        stamp_ns : int
            Header stamp (ns); 0 means the publisher left it unset.
        record_ns : int
            The bag's record time of the message (ns).
        index : int
            The message's position in the topic, for the report.
        """
        self.seen += 1
        if stamp_ns <= 0:
            self.stampless += 1
            self._event("stampless", index, "no header stamp (0); dropped")
            return False
        offset = record_ns - stamp_ns
        if self.last_offset_ns is not None and abs(offset - self.last_offset_ns) > self.params.jump_s * NS:
            self.clock_jumps += 1
            self._event("jump", index, f"clock jump of {(self.last_offset_ns - offset) / NS:+.3f} s "
                                       "(header stamps against the recorder's clock)")
        self.last_offset_ns = offset
        if self.last_ns is not None:
            dt = stamp_ns - self.last_ns
            if dt == 0:
                self.duplicates += 1
                self._event("duplicate", index, f"stamp {fmt_ns(stamp_ns)} s repeats the previous one; dropped")
                return False
            if dt < 0:
                self.backwards += 1
                self._event("backwards", index, f"stamp goes back {-dt / NS:.6f} s (out of order); dropped")
                return False
            self._interval(dt, index)
        else:
            self.first_ns = stamp_ns
        self.last_ns = stamp_ns
        self.accepted += 1
        return True

    def _interval(self, dt: int, index: int) -> None:
        p = self.params
        if self._nominal_ns is None:
            self._intervals.append(dt)
            if len(self._intervals) >= p.nominal_from:
                s = sorted(self._intervals)
                self._nominal_ns = float(s[len(s) // 2])
                self._intervals = []
            return
        nom = self._nominal_ns
        if dt > p.gap_factor * nom and dt - nom > p.gap_min_s * NS:
            self.gaps += 1
            self.largest_gap_s = max(self.largest_gap_s, dt / NS)
            self._event("gap", index, f"gap of {dt / NS:.3f} s (nominal period {nom / NS:.4f} s)")

    @property
    def rate_hz(self) -> float:
        """Mean rate of the accepted messages (Hz); 0 with fewer than two."""
        if self.accepted < 2 or self.first_ns is None or self.last_ns == self.first_ns:
            return 0.0
        return (self.accepted - 1) * NS / (self.last_ns - self.first_ns)

    def summary(self) -> dict:
        """The report of this topic as a JSON-ready dict."""
        return {"messages": self.seen, "kept": self.accepted, "rate_hz": round(self.rate_hz, 3),
                "stampless": self.stampless, "duplicates": self.duplicates, "out_of_order": self.backwards,
                "gaps": self.gaps, "largest_gap_s": round(self.largest_gap_s, 6), "clock_jumps": self.clock_jumps,
                "events": list(self.events)}

    def line(self) -> str:
        """One human-readable line: counts and rate."""
        parts = [f"{self.accepted}/{self.seen} kept", f"{self.rate_hz:.2f} Hz"]
        for name, n in (("no stamp", self.stampless), ("duplicate", self.duplicates),
                        ("out of order", self.backwards), ("clock jumps", self.clock_jumps)):
            if n:
                parts.append(f"{n} {name}")
        if self.gaps:
            parts.append(f"{self.gaps} gaps (largest {self.largest_gap_s:.3f} s)")
        return f"{self.topic}: " + ", ".join(parts)
