"""Test helpers of the link stage."""

from __future__ import annotations

from pathlib import Path

from tinyloc.link.ptypair import PtyPair


class PtyCable(PtyPair):
    """A :class:`PtyPair` whose ends are symlinks in ``folder`` (so unplug/replug keeps the names)."""

    def __init__(self, folder: Path, *, baud: int = 115200):
        super().__init__(baud=baud, link_dir=folder)

    @property
    def end_a(self):
        return Path(super().end_a)

    @property
    def end_b(self):
        return Path(super().end_b)
