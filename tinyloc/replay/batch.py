"""Replay many runs: one worker process per core, a progress bar on stderr, a summary table.

Each run is one job: replay, score, write ``frames.csv``, ``metrics.json`` and
``report.html`` into its own output folder. A run that fails is reported (one line)
and the others go on.
"""

from __future__ import annotations

from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field
import importlib
import json
import math
import multiprocessing as mp
import os
import queue
import sys
import time
from pathlib import Path

from ..errors import InputError, TinylocError
from .replay import ReplayParams

SUMMARY_COLUMNS = ("run", "frames", "recall_1m_3deg", "median_error_m", "p90_error_m", "median_heading_error_deg",
                   "gnss_median_error_m", "dr_median_error_m", "inside_95_ellipse", "first_good_fix_s", "lost_spells",
                   "gaps", "frame_ms_median", "frames_per_s", "signoff", "change_recall_1m_3deg",
                   "change_median_error_m", "error")


@dataclass(frozen=True)
class Job:
    """One run to replay.

    Parameters
    ----------
    run : str
        Run folder.
    out_dir : str
        Where its outputs go (created).
    map_path : str or None
        Packed map; None: the run folder's own (run.json ``"map"``), if it names one.
    localizer : str
        ``"loop"`` (the live loop, :mod:`tinyloc.replay.loop_adapter`) or ``"MODULE:FUNCTION"``, a
        factory ``f(run_folder, packed_map_or_None) -> Localizer``.
    params : ReplayParams
    report : bool
        Write report.html.
    require : tuple of Rule
        Sign-off rules checked on the metrics (:mod:`tinyloc.replay.signoff`).
    compare : str or None
        An earlier replay's output (metrics.json, its folder, or a batch folder) to compare with.
    config : str or None
        The live loop's TOML config file (``localizer="loop"`` only).
    overrides : tuple of str
        ``SECTION.KEY=VALUE`` settings applied on top of the config.
    """

    run: str
    out_dir: str
    map_path: str | None = None
    localizer: str = "loop"
    params: ReplayParams = field(default_factory=ReplayParams)
    report: bool = True
    config: str | None = None
    overrides: tuple = ()
    require: tuple = ()
    compare: str | None = None


def resolve_factory(spec: str):
    """The localizer factory named by ``spec`` (see :class:`Job`)."""
    if spec == "loop":
        from .loop_adapter import make_loop_localizer

        return make_loop_localizer
    mod, _, fn = spec.partition(":")
    if not mod or not fn:
        raise InputError(f"--localizer: expected MODULE:FUNCTION or 'loop', got {spec!r}")
    try:
        return getattr(importlib.import_module(mod), fn)
    except (ImportError, AttributeError) as e:
        raise InputError(f"--localizer: cannot load {spec!r} ({e})") from None


def map_for_run(run: str, map_path: str | None) -> tuple[str | None, str]:
    """The map to use for a run and where it came from ("--map", "run.json", or "" if none)."""
    if map_path:
        return map_path, "--map"
    p = Path(run) / "run.json"
    try:
        meta = json.loads(p.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None, ""
    name = meta.get("map") if isinstance(meta, dict) else None
    if isinstance(name, str) and name:
        cand = Path(name) if Path(name).is_absolute() else Path(run) / name
        return str(cand), "run.json"
    return None, ""


def open_map(path: str | None, cache_mb: float | None = None):
    """Open a packed map (or return None when no path). Raises the map reader's one-line errors.

    ``cache_mb`` bounds its decoded-tile cache (MB; None: the reader's default), as the live loop's
    ``loop.map_cache_mb`` does, so a replay holds the memory the robot would.
    """
    if path is None:
        return None
    if not Path(path).is_file():
        raise InputError(f"{path}: map file not found")
    from ..maps.packfile import PackedMap

    if cache_mb is None:
        return PackedMap.open(path)
    return PackedMap.open(path, cache_bytes=int(cache_mb * 2 ** 20))


_progress_put = None  # where a job reports (run index, frames done, total); set per process


def _init_worker(q):
    global _progress_put
    _progress_put = q.put


# Several runs in parallel already use every core: each worker keeps its numeric libraries to one
# thread, so they do not fight over the cores. Set in the environment the workers inherit (read when
# those libraries load); a value the user chose is kept.
_WORKER_THREAD_VARS = ("OMP_NUM_THREADS", "NUMBA_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")


def run_job(job: Job, index: int = 0) -> dict:
    """Replay one job and write its outputs; returns its summary row (``error`` set on failure)."""
    row = {c: None for c in SUMMARY_COLUMNS}
    row["run"] = job.run
    try:
        return _run_job(job, index, row)
    except TinylocError as e:
        row["error"] = str(e)
        row["error_kind"] = "input"
    except Exception as e:  # noqa: BLE001 - one run's unexpected fault must not stop the batch
        row["error"] = f"{job.run}: {type(e).__name__}: {e}"
        row["error_kind"] = "internal"
    return row


def _run_job(job: Job, index: int, row: dict) -> dict:
    from . import report as R
    from .records import write_csv
    from .replay import replay_run

    map_path, map_from = map_for_run(job.run, job.map_path)
    cache_mb = None
    if job.localizer == "loop":
        from ..runtime.config import load_config

        cache_mb = load_config(job.config, job.overrides).loop.map_cache_mb
    packed = open_map(map_path, cache_mb)
    factory = resolve_factory(job.localizer)
    if job.localizer == "loop":
        base = factory
        factory = lambda rf, pk: base(rf, pk, config_path=job.config, overrides=job.overrides)  # noqa: E731
    world = packed.frame if packed is not None else None

    last = [0.0]

    def progress(done, total):
        now = time.monotonic()
        if _progress_put is not None and (now - last[0] > 0.2 or done == total):
            last[0] = now
            _progress_put((index, done, total))

    res = replay_run(job.run, lambda rf: factory(rf, packed), world=world, params=job.params, progress=progress)
    out = Path(job.out_dir)
    out.mkdir(parents=True, exist_ok=True)
    m = res.metrics
    m["run"]["map"] = map_path
    m["run"]["map_from"] = map_from or "none"
    m["run"]["localizer"] = job.localizer
    health = getattr(res.localizer, "health", None)
    if health is not None:
        try:
            h = {k: (v.item() if hasattr(v, "item") else v) for k, v in health().items()}
            m["loop_health"] = {k: v for k, v in h.items()
                                if isinstance(v, (int, str, bool)) or (isinstance(v, float) and math.isfinite(v))}
        except Exception:  # noqa: BLE001 - health is informative only
            pass
    if job.compare:
        from .compare import compare, load_previous

        before, src = load_previous(job.compare, Path(job.out_dir).name)
        m["compare"] = compare(m, before, src)
    if job.require:
        from .signoff import check

        m["signoff"] = check(m, list(job.require))
    write_csv(res.records, out / "frames.csv")
    (out / "metrics.json").write_text(json.dumps(m, indent=1, allow_nan=False) + "\n", encoding="utf-8")
    if job.report:
        R.write_run_report(out / "report.html", res, packed=packed)
    row.update(summary_row(job.run, m))
    row["out_dir"] = str(out)
    return row


def summary_row(run: str, m: dict) -> dict:
    """One summary-table row from a run's metrics."""
    return {"run": run, "frames": m["frames"], "recall_1m_3deg": m["recall"].get("1m_3deg"),
            "median_error_m": m["median_error_m"], "p90_error_m": m["p90_error_m"],
            "median_heading_error_deg": m.get("median_heading_error_deg"),
            "gnss_median_error_m": m["gnss_median_error_m"], "dr_median_error_m": m.get("dr_median_error_m"),
            "inside_95_ellipse": m["inside_95_ellipse"], "first_good_fix_s": m["first_good_fix"]["time_s"],
            "lost_spells": m["lost"]["spells"], "gaps": m["gaps"]["count"], "frame_ms_median": m["frame_ms_median"],
            "frames_per_s": m["replay"]["frames_per_s"],
            "odometry_scale": m.get("loop_health", {}).get("odometry_scale"),
            "signoff": (m["signoff"]["passed"] if "signoff" in m else None),
            "change_recall_1m_3deg": (m["compare"]["figures"]["recall|1m_3deg"]["change"] if "compare" in m else None),
            "change_median_error_m": (m["compare"]["figures"]["median_error_m"]["change"] if "compare" in m else None),
            "metrics": m, "error": None}


class Bar:
    """A progress bar on stderr over several runs (redrawn in place on a terminal, else every 10 %)."""

    def __init__(self, n_runs: int, *, stream=None, enabled: bool = True):
        self.stream = stream if stream is not None else sys.stderr
        self.enabled = enabled
        self.tty = enabled and hasattr(self.stream, "isatty") and self.stream.isatty()
        self.n = n_runs
        self.frac = [0.0] * n_runs
        self.done = 0
        self.t0 = time.monotonic()
        self._next = 0.1
        self._last_draw = 0.0

    def update(self, i: int, done: int, total: int) -> None:
        self.frac[i] = done / max(total, 1)
        self._draw()

    def finish_run(self, i: int) -> None:
        self.frac[i] = 1.0
        self.done += 1
        self._draw(force=True)

    def _draw(self, force: bool = False) -> None:
        if not self.enabled:
            return
        f = sum(self.frac) / max(self.n, 1)
        now = time.monotonic()
        text = (f"replay {f * 100:5.1f}% |{'#' * int(f * 30):.<30}| runs {self.done}/{self.n}  "
                f"{now - self.t0:6.1f} s")
        if self.tty:
            if force or now - self._last_draw > 0.2:
                self._last_draw = now
                self.stream.write("\r" + text)
                if self.done == self.n:
                    self.stream.write("\n")
                self.stream.flush()
        elif (force and self.done == self.n) or (f + 1e-9 >= self._next and f < 1.0):
            while self._next <= f + 1e-9:
                self._next += 0.1
            self.stream.write(text + "\n")
            self.stream.flush()


def run_batch(jobs: list[Job], *, workers: int | None = None, show_progress: bool = True) -> list[dict]:
    """Replay every job, ``workers`` processes at a time (default: one per core, at most one per job).

    Returns the summary rows in job order; failures carry ``error``.
    """
    n = len(jobs)
    workers = max(1, min(workers or (os.cpu_count() or 1), n))
    bar = Bar(n, enabled=show_progress)
    rows: list[dict | None] = [None] * n
    if workers == 1:
        global _progress_put
        _progress_put = lambda item: bar.update(*item)  # noqa: E731
        try:
            for i, job in enumerate(jobs):
                rows[i] = run_job(job, i)
                bar.finish_run(i)
        finally:
            _progress_put = None
        return rows
    ctx = mp.get_context("spawn")  # no forked numba/OpenCV thread state
    q = ctx.Queue()
    saved = {k: os.environ.get(k) for k in _WORKER_THREAD_VARS}
    for k in _WORKER_THREAD_VARS:
        os.environ.setdefault(k, "1")
    try:
        return _pool(jobs, workers, ctx, q, bar, rows)
    finally:
        for k, v in saved.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v


def _pool(jobs, workers, ctx, q, bar, rows):
    with ProcessPoolExecutor(max_workers=workers, mp_context=ctx, initializer=_init_worker, initargs=(q,)) as ex:
        futs = {ex.submit(run_job, job, i): i for i, job in enumerate(jobs)}
        pending = set(futs)
        while pending:
            _drain(q, bar)
            finished = [f for f in pending if f.done()]
            for f in finished:
                i = futs[f]
                pending.discard(f)
                try:
                    rows[i] = f.result()
                except Exception as e:  # a worker that died (e.g. killed) fails its run only
                    rows[i] = {c: None for c in SUMMARY_COLUMNS}
                    rows[i].update(run=jobs[i].run, error=f"{jobs[i].run}: worker failed ({type(e).__name__}: {e})")
                bar.finish_run(i)
            if pending:
                time.sleep(0.05)
        _drain(q, bar)
    return rows


def _drain(q, bar: Bar) -> None:
    while True:
        try:
            i, done, total = q.get_nowait()
        except (queue.Empty, OSError, ValueError):
            return
        bar.update(i, done, total)


def format_table(rows: list[dict]) -> str:
    """The summary as a fixed-width text table (one line per run, failures say why)."""
    cols = [("run", "run", "{}"), ("frames", "frames", "{}"), ("recall_1m_3deg", "1m/3deg", "{:.3f}"),
            ("median_error_m", "med m", "{:.2f}"), ("p90_error_m", "p90 m", "{:.2f}"),
            ("median_heading_error_deg", "med deg", "{:.2f}"), ("gnss_median_error_m", "GNSS m", "{:.2f}"),
            ("dr_median_error_m", "DR m", "{:.2f}"), ("inside_95_ellipse", "in95", "{:.3f}"),
            ("first_good_fix_s", "fix s", "{:.1f}"), ("lost_spells", "lost", "{}"), ("gaps", "gaps", "{}"),
            ("frame_ms_median", "ms", "{:.1f}"), ("frames_per_s", "fps", "{:.1f}")]
    if any(r.get("odometry_scale") is not None for r in rows):
        cols.append(("odometry_scale", "wheel", "{:.4f}"))
    if any(r.get("change_recall_1m_3deg") is not None or r.get("change_median_error_m") is not None for r in rows):
        cols += [("change_recall_1m_3deg", "d 1m/3deg", "{:+.3f}"), ("change_median_error_m", "d med m", "{:+.2f}")]
    if any(r.get("signoff") is not None for r in rows):
        cols.append(("signoff", "sign-off", "{}"))
    table = [[h for _, h, _ in cols]]
    errors = []
    for r in rows:
        if r.get("error"):
            table.append([_short(r["run"])] + ["FAILED"] + [""] * (len(cols) - 2))
            errors.append(r["error"])
            continue
        table.append([_short(r["run"]) if k == "run" else
                      ("n/a" if r.get(k) is None else ({True: "pass", False: "FAIL"}[r[k]] if k == "signoff"
                                                       else f.format(r[k]))) for k, _, f in cols])
    widths = [max(len(row[c]) for row in table) for c in range(len(cols))]
    lines = ["  ".join(v.ljust(widths[c]) if c == 0 else v.rjust(widths[c]) for c, v in enumerate(row))
             for row in table]
    lines += [f"failed: {e}" for e in errors]
    return "\n".join(lines)


def wheel_scale_hint(rows: list[dict]) -> str | None:
    """One line telling the operator the wheel-odometry factor the tracker learnt, to start the next run with.

    Only for a single run: several drives may be different robots, and a mean would hide that.
    """
    ok = [r for r in rows if not r.get("error")]
    if len(ok) != 1 or ok[0].get("odometry_scale") is None:
        return None
    s = float(ok[0]["odometry_scale"])
    if not math.isfinite(s) or s == 1.0:
        return None
    return (f"wheel odometry: the tracker learnt a factor of {s:.4f} on this drive; to start the next run with it, "
            f"put odometry_scale = {s:.4f} under [track] in the loop config")


def _short(run: str) -> str:
    p = Path(run)
    return p.name or str(p)
