"""``tinyloc replay``: score recorded drives against ground truth and GNSS, write reports."""

from __future__ import annotations

import json
import sys
from pathlib import Path

from ..errors import InputError

NAME = "replay"
HELP = "replay recorded drives through the localizer, score them against truth and GNSS, write reports"
DESCRIPTION = """\
Replay one or more run folders through the same loop the robot runs live, as fast as
the CPU allows, and measure it: recall within (0.25 m, 2 deg), (0.5 m, 2 deg),
(1 m, 3 deg), (2 m, 5 deg); median and 90th-percentile errors; time and distance to the
first good fix; lost spells and recoveries; whether the reported 95 % ellipse really
holds 95 % of the errors; latency per frame. The GNSS-only and the dead-reckoning-only
baselines are scored on the same frames.

For each run the output folder gets:
  frames.csv     one row per frame: estimate, covariance, quality, truth, errors, timing
  metrics.json   every figure (definitions in docs/replay.md)
  report.html    one self-contained page: trajectory over the map, error over time,
                 recall curves, uncertainty calibration, the worst frames, the gaps found

Several runs (or a folder of run folders) are replayed in parallel, one process per
core, each into REPORT_DIR/<run name>/, with a summary table (summary.json, and
index.html linking every report). A run that fails is reported and the others go on.

Without --map, a run's own map is used if its run.json names one ("map": path,
relative to the run folder); otherwise the run is replayed without a map, which only
localizers that need none can do.

examples:
  tinyloc replay drives/loop-3 --map site.tlm -o report/
  tinyloc replay drives/ --map site.tlm --require recall/1m_3deg>=0.9 --require inside_95_ellipse>=0.9
  tinyloc replay drives/loop-3 --map site.tlm --set track.floor=1e-3 --compare report/ -o report-floor/
  tinyloc replay drives/ --map site.tlm -o reports/ --jobs 2
  tinyloc replay drives/loop-3 --map site.tlm --json | jq .recall
"""


def register(p):
    p.add_argument("runs", nargs="+", metavar="RUN",
                   help="run folder(s), or a folder whose sub-folders are run folders")
    p.add_argument("--map", metavar="SITE.tlm", help="packed map of the site (default: the run's own, if named)")
    p.add_argument("-o", "--out", metavar="REPORT_DIR",
                   help="output folder (default: replay-<run name>, or replay-batch for several runs)")
    p.add_argument("--json", action="store_true",
                   help="print the metrics as one JSON object on stdout (several runs: {\"runs\": [...]})")
    p.add_argument("--jobs", type=int, default=0, metavar="N",
                   help="worker processes for several runs (default: one per core)")
    p.add_argument("--max-frames", type=int, default=None, metavar="N", help="replay only the first N frames")
    p.add_argument("--no-report", action="store_true", help="write frames.csv and metrics.json only")
    p.add_argument("--good", default="1,3", metavar="M,DEG",
                   help="bound of a good fix: position metres, heading degrees (default 1,3)")
    p.add_argument("--min-lost", type=float, default=1.0, metavar="S",
                   help="shortest run of bad frames counted as a lost spell, seconds (default 1)")
    p.add_argument("--localizer", default="loop", metavar="MODULE:FUNCTION",
                   help="score another localizer on the same drives: a factory f(run_folder, map) returning an "
                        "object with step(frame) (default: the live loop)")
    p.add_argument("--config", metavar="LOOP.toml", help="the live loop's settings file (as for tinyloc run)")
    p.add_argument("--set", action="append", default=[], metavar="SECTION.KEY=VALUE", dest="overrides",
                   help="override one loop setting, e.g. --set track.floor=1e-3 (repeatable): how a drive is "
                        "re-scored while tuning")
    p.add_argument("--require", action="append", default=[], metavar="KEY>=NUMBER",
                   help="sign-off rule on a figure of metrics.json (path with '/', operators >= <= > < ==), e.g. "
                        "--require recall/1m_3deg>=0.9 --require quality/tracking_but_wrong_share<=0.01; "
                        "a run that misses one fails (exit status 1); a missing figure fails (repeatable)")
    p.add_argument("--compare", metavar="EARLIER",
                   help="an earlier replay of the same drive(s): its output folder (or metrics.json; for several "
                        "runs the batch folder): the report and the table show before, now and the change")
    p.add_argument("-q", "--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=run)


def expand_runs(paths: list[str]) -> list[str]:
    """Run folders named by the arguments: a folder with run.json is a run; otherwise its sub-folders that are."""
    out = []
    for a in paths:
        p = Path(a)
        if not p.exists():
            raise InputError(f"{p}: no such run folder")
        if (p / "run.json").is_file() or not p.is_dir():
            out.append(str(p))
            continue
        subs = sorted(str(s) for s in p.iterdir() if (s / "run.json").is_file())
        if not subs:
            raise InputError(f"{p}: not a run folder (no run.json) and holds no run folders")
        out.extend(subs)
    return out


def _params(args):
    from ..replay.metrics import MetricParams
    from ..replay.replay import ReplayParams

    try:
        gm, gd = (float(v) for v in args.good.split(","))
    except ValueError:
        raise InputError(f"--good: expected METRES,DEGREES such as 1,3, got {args.good!r}") from None
    if not (gm > 0 and gd > 0):
        raise InputError("--good: both bounds must be positive")
    if args.min_lost < 0:
        raise InputError("--min-lost must be >= 0 seconds")
    if args.max_frames is not None and args.max_frames < 1:
        raise InputError("--max-frames must be at least 1")
    return ReplayParams(metrics=MetricParams(good_pos_m=gm, good_yaw_deg=gd, min_lost_s=args.min_lost),
                        max_frames=args.max_frames)


def run(args) -> int:
    from ..replay.batch import Job, format_table, resolve_factory, run_batch, wheel_scale_hint

    from ..replay.signoff import parse_rule

    runs = expand_runs(args.runs)
    params = _params(args)
    rules = tuple(parse_rule(r) for r in args.require)
    if args.compare is not None and not Path(args.compare).exists():
        raise InputError(f"--compare: {args.compare}: no such file or folder")
    resolve_factory(args.localizer)  # bad spec: fail before starting any worker
    if args.localizer == "loop":
        from ..runtime.config import load_config

        load_config(args.config, tuple(args.overrides))  # a bad setting fails here, once
    elif args.config or args.overrides:
        raise InputError("--config and --set apply to the live loop only (not with --localizer)")
    if args.map is not None and not Path(args.map).is_file():
        raise InputError(f"{args.map}: map file not found")
    single = len(runs) == 1
    out = Path(args.out) if args.out else Path(f"replay-{Path(runs[0]).name}" if single else "replay-batch")
    names = [Path(r).name or f"run{i}" for i, r in enumerate(runs)]
    dup = {n for n in names if names.count(n) > 1}
    names = [f"{n}-{i}" if n in dup else n for i, n in enumerate(names)]
    jobs = [Job(run=r, out_dir=str(out if single else out / n), map_path=args.map, localizer=args.localizer,
                params=params, report=not args.no_report, config=args.config, overrides=tuple(args.overrides), require=rules,
                compare=args.compare)
            for r, n in zip(runs, names)]
    rows = run_batch(jobs, workers=args.jobs or None, show_progress=not args.quiet)
    failed = [r for r in rows if r.get("error")]
    if single and failed:
        if failed[0].get("error_kind") == "input":
            raise InputError(failed[0]["error"])  # bad run folder, map or settings: exit status 2
        print(f"tinyloc: error: {failed[0]['error']}", file=sys.stderr)  # the replay itself failed
        return 1
    if not single:
        out.mkdir(parents=True, exist_ok=True)
        summary = [{k: v for k, v in r.items() if k != "metrics"} for r in rows]
        (out / "summary.json").write_text(json.dumps(summary, indent=1, allow_nan=False) + "\n", encoding="utf-8")
        from ..replay.report import write_index

        write_index(out / "index.html", rows)
    if args.json:
        if single:
            print(json.dumps(rows[0]["metrics"], allow_nan=False))
        else:
            print(json.dumps({"runs": [{"run": r["run"], "error": r.get("error"), "metrics": r.get("metrics")}
                                       for r in rows]}, allow_nan=False))
    else:
        print(format_table(rows))
        hint = wheel_scale_hint(rows)
        if hint:
            print(hint)
        print(f"outputs in {out}/")
    rc = 0
    if failed:
        print(f"tinyloc: {len(failed)} of {len(rows)} runs failed", file=sys.stderr)
        rc = 1
    refused = [r for r in rows if not r.get("error") and r.get("signoff") is False]
    for r in refused:
        bad = [c for c in r["metrics"]["signoff"]["checks"] if not c["passed"]]
        print(f"tinyloc: sign-off failed for {r['run']}: " +
              "; ".join(f"{c['rule']} ({c['why']}, value {c['value']})" for c in bad), file=sys.stderr)
        rc = 1
    return rc
