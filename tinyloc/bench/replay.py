"""``tinyloc bench replay``: replay speed (frames/s) of the live loop against the bare harness, same run.

The baseline is the replay harness with a localizer that does nothing (read and decode
each frame, slice the sensor rows, fill the records): what replay costs before the
loop runs. The figure of merit is the loop's replay rate and its share of the time.
"""

from __future__ import annotations

import math
import sys
import tempfile
import time
from pathlib import Path

from ..errors import InputError

NAME = "replay"
HELP = "replay speed in frames/s: the live loop against the bare replay harness on the same run"
DESCRIPTION = """\
Replay a run folder twice: once through the bare harness (frames decoded, sensor rows
sliced, nothing localized) and once through the live loop. Reports frames/s of both,
the loop's median and 99th-percentile frame time, and the harness's share of the
replay time. Without --run, the bundled demo drive (tinyloc/data/demo) is used, or a
short run is generated with the simulator when the install has no demo data."""


class _Null:
    def step(self, frame):
        return None


def add_arguments(p):
    p.add_argument("--run", metavar="RUN", help="run folder (default: the bundled demo drive)")
    p.add_argument("--map", metavar="SITE.tlm", help="packed map (default: the generated one, or run.json's)")
    p.add_argument("--frames", type=int, default=60, metavar="N", help="frames to replay [60]")
    p.add_argument("--seed", type=int, default=1, help="seed of the generated site and drive [1]")


def _bundled_demo():
    """The demo drive shipped with tinyloc (tinyloc/data/demo), if this install has it."""
    try:
        from ..sim.demo import demo_paths
    except ImportError:
        return None, None
    p = demo_paths()
    if (p["run"] / "run.json").is_file() and p["map"].is_file():
        return p["run"], p["map"]
    return None, None


def _generated(tmp: Path, frames: int, seed: int):
    """A simulated site, its packed map and one drive (the simulator's default VGA camera)."""
    try:
        from ..maps.compile import pack_geojson
        from ..sim.runs import RunParams, make_run
        from ..sim.site import generate_site
    except ImportError as e:
        raise InputError(f"bench replay: no --run given and the simulator is unavailable ({e})") from None
    site = generate_site(seed)
    pack_geojson(site.geojson, tmp / "site.tlm")
    make_run(site.world, tmp / "drive", seed=seed + 1, params=RunParams(frames=frames))
    return tmp / "drive", tmp / "site.tlm"


def run(args) -> dict:
    from ..replay.batch import map_for_run, open_map
    from ..replay.loop_adapter import make_loop_localizer
    from ..replay.replay import ReplayParams, replay_run

    with tempfile.TemporaryDirectory(prefix="tinyloc-bench-replay-") as tmp:
        run_path, map_path = args.run, args.map
        if run_path is None:
            run_path, map_path = _bundled_demo()
        if run_path is None:
            print("bench replay: simulating a site and a drive ...", file=sys.stderr)
            run_path, map_path = _generated(Path(tmp), args.frames, args.seed)
        map_path, _ = map_for_run(str(run_path), map_path)
        packed = open_map(map_path)
        if packed is None:
            raise InputError("bench replay: give --map SITE.tlm (the run names none)")
        params = ReplayParams(max_frames=args.frames)
        base = replay_run(run_path, lambda rf: _Null(), world=packed.frame, params=params)
        holder = {}

        def factory(rf):
            holder["loc"] = make_loop_localizer(rf, packed)
            holder["cpu0"] = time.process_time()  # after set-up and warm-up: the frames only
            return holder["loc"]

        t0 = time.perf_counter()
        loop = replay_run(run_path, factory, world=packed.frame, params=params)
        cpu = time.process_time() - holder["cpu0"]
        total = time.perf_counter() - t0
        n = loop.records.n
        return {
            "frames": n,
            "harness_frames_per_s": n / base.wall_s if base.wall_s > 0 else math.inf,
            "loop_frames_per_s": n / loop.wall_s,
            # CPU seconds of this process (all its threads) over the loop pass, report included: the
            # figure a busy machine distorts least.
            "loop_frames_per_cpu_s": n / cpu if cpu > 0 else math.inf,
            "loop_frame_ms_median": loop.metrics["frame_ms_median"],
            "loop_frame_ms_p99": loop.metrics["latency"]["p99_ms"],
            "harness_share_of_replay": base.wall_s / loop.wall_s,
            "setup_s": total - loop.wall_s,
            "recall_1m_3deg": loop.metrics["recall"]["1m_3deg"],
        }
