"""Benchmarks, one module per stage (``tinyloc bench <stage>``).

A stage module defines ``NAME``, ``HELP``, ``add_arguments(parser)`` (optional)
and ``run(args) -> dict``: it measures tinyloc's code and a baseline in the same
run and returns a dict of figures (times in ms as medians, ratios as
``speedup``). The CLI prints them, or one JSON object with ``--json``.
"""

from __future__ import annotations

import statistics
import time


def median_ms(fn, *, repeat: int = 7, warmup: int = 1) -> float:
    """Median wall time of ``fn()`` over ``repeat`` calls after ``warmup`` calls (milliseconds)."""
    for _ in range(warmup):
        fn()
    ts = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        ts.append((time.perf_counter() - t0) * 1e3)
    return statistics.median(ts)
