"""Replay drives the live loop (tinyloc.runtime.Localizer) with its real tracker.

The first tests put stand-in perception and matching stages into the loop (the loop allows it): a
matcher that returns a Gaussian log-likelihood around the true pose. What is checked is the wiring:
replay feeds the loop's step() with the run's rows, the loop's real grid filter converges and tracks,
and the loop's poses, covariances and quality flags come out in frames.csv and metrics.json.
"""

import html
import json
import math
from types import SimpleNamespace

import numpy as np
import pytest

import shutil

from _replay_helpers import inject_gaps, make_map, make_run
from tinyloc.frames import wrap_angle
from tinyloc.replay.loop_adapter import make_loop_localizer
from tinyloc.replay.metrics import interp_pose
from tinyloc.replay.replay import replay_run

LIGHT = ("track.headings=64", "match.headings=64", "loop.warmup=false")


class CountingPerceiver:
    """Stand-in perception: a grid that 'sees' enough ground; counts frames so the matcher knows which one."""

    def __init__(self):
        self.calls = 0

    def perceive(self, image, gravity):
        self.calls += 1
        vis = np.ones((64, 64), np.float32)
        return SimpleNamespace(evidence=np.zeros((9, 64, 64), np.float32), free=vis, visible=vis, status="ok",
                               res_m=0.5, origin_row=32.0, origin_col=0.0)


class TruthMatcher:
    """Stand-in matcher: log-likelihood of a Gaussian (0.4 m, 3 deg) around the true pose of the frame.

    Follows the matcher seam of tinyloc/runtime/match.py: ``global_search`` gives the reduced evidence
    (best per cell over heading), ``track`` a full volume.
    """

    def __init__(self, rf, packed, perceiver, headings, cells=48, sigma_m=0.4, sigma_deg=3.0):
        from tinyloc.track.gridfilter import LikelihoodVolume

        self.LV = LikelihoodVolume
        self.truth = (rf.truth[:, 0], rf.truth[:, [4, 5, 3]])
        self.ft = rf.frame_t
        self.meta = packed.meta
        self.per = perceiver
        self.A, self.n = headings, cells
        self.s, self.sa = sigma_m, math.radians(sigma_deg)

    def _vol(self, x, y):
        tp = interp_pose(self.truth[0], self.truth[1], [self.ft[self.per.calls - 1]], max_gap_s=1.0)[0]
        res = self.meta.res_m
        row0 = int(math.floor((self.meta.y_max - y) / res)) - self.n // 2
        col0 = int(math.floor((x - self.meta.x_min) / res)) - self.n // 2
        cx = self.meta.x_min + (col0 + np.arange(self.n) + 0.5) * res
        cy = self.meta.y_max - (row0 + np.arange(self.n) + 0.5) * res
        d2 = (cx[None, :] - tp[0]) ** 2 + (cy[:, None] - tp[1]) ** 2
        yaws = np.arange(self.A) * 2 * math.pi / self.A
        da = wrap_angle(yaws - tp[2])
        ll = -0.5 * d2[None] / self.s ** 2 - 0.5 * (da[:, None, None] / self.sa) ** 2
        return self.LV(ll.astype(np.float32), row0, col0, 0.0, 2 * math.pi / self.A)

    def global_search(self, bev, x, y):
        from tinyloc.track.gridfilter import GlobalEvidence

        return GlobalEvidence.from_volume(self._vol(x, y))

    def track(self, bev, x, y, yaw):
        return self._vol(x, y)


@pytest.fixture(scope="module")
def site(tmp_path_factory):
    d = tmp_path_factory.mktemp("loop")
    return {"run": make_run(d / "loop-a", n_frames=50), "gappy": make_run(d / "loop-g", n_frames=50, gaps=True),
            "map": make_map(d / "s.tlm")}


def _factory(packed):
    def f(rf):
        per = CountingPerceiver()
        return make_loop_localizer(rf, packed, overrides=LIGHT, perceiver=per,
                                   matcher=TruthMatcher(rf, packed, per, headings=64))
    return f


def test_replay_drives_the_live_loop(site):
    from tinyloc.maps.packfile import PackedMap

    packed = PackedMap.open(site["map"])
    res = replay_run(site["run"], _factory(packed), world=packed.frame)
    m, rec = res.metrics, res.records
    assert m["frames"] == 50
    q = list(rec.quality)
    assert q[0] in ("searching", "no-fix") and q[-1] == "tracking"
    # The real filter, fed a 0.4 m / 3 deg likelihood, tracks within 1 m and 3 deg on most frames.
    assert m["recall"]["1m_3deg"] > 0.7
    assert m["median_error_m"] < 0.5
    assert m["first_good_fix"]["time_s"] is not None
    # Covariances from the loop are finite, symmetric and positive.
    ok = np.array([s == "tracking" for s in q])
    c = rec.cov[ok]
    assert np.all(np.isfinite(c)) and np.allclose(c, np.transpose(c, (0, 2, 1)))
    assert np.all(c[:, 0, 0] > 0) and np.all(c[:, 2, 2] > 0)
    assert np.all(np.isfinite(rec.frame_ms)) and m["frame_ms_median"] > 0
    # lat/lon written by the loop agree with its x/y through the map's frame.
    i = int(np.flatnonzero(ok)[-1])
    lat, lon = packed.frame.to_latlon(rec.x[i], rec.y[i])
    assert abs(lat - rec.lat[i]) < 1e-9 and abs(lon - rec.lon[i]) < 1e-9
    assert res.localizer.health()["frames"] == 50


def test_live_loop_replays_gappy_run_to_the_end(site):
    from tinyloc.maps.packfile import PackedMap

    packed = PackedMap.open(site["map"])
    res = replay_run(site["gappy"], _factory(packed), world=packed.frame)
    assert res.metrics["frames"] == 49  # one frame file deleted
    assert res.localizer.health()["frames"] == 49
    assert any("gnss.csv: outage" in g for g in res.gaps)
    assert res.records.quality[-1] in ("tracking", "degraded")
    json.dumps(res.metrics, allow_nan=False)


@pytest.fixture(scope="module")
def sim_site(tmp_path_factory):
    """A simulated site (tinyloc.sim: hidden 3D world, its open-vector-style map) and a short drive through it."""
    from tinyloc.camera.model import CameraModel, Mount
    from tinyloc.maps.compile import pack_geojson
    from tinyloc.sim.runs import RunParams, make_run as sim_run
    from tinyloc.sim.site import generate_site

    d = tmp_path_factory.mktemp("sim")
    site = generate_site(3)
    pack_geojson(site.geojson, d / "site.tlm")
    cam = CameraModel(width=320, height=240, fx=225.0, fy=225.0, cx=159.5, cy=119.5,
                      dist=(-0.08, 0.015, 0.0, 0.0, 0.0), mount=Mount(height_m=0.8, pitch_deg=8.0))
    sim_run(site.world, d / "drive", seed=5, params=RunParams(frames=12), camera=cam)
    shutil.copytree(d / "drive", d / "drive-gaps")
    # Frames run from 1.5 s at 5 Hz (the simulator's start); GNSS gone from 2.0 to 4.5 s.
    inject_gaps(d / "drive-gaps", drop_frame=4, gnss_span=(2.0, 4.5))
    return d


def test_full_loop_replay_of_simulated_drives(sim_site, tmp_path, capsys):
    """The default loop (tinyloc's segmenter, projector, correlator, tracker) on two simulated drives in
    parallel worker processes: one clean, one damaged (missing frame, NaN IMU rows, GNSS outage, cut last
    lines). Both replay to the end; the damage is reported; the report's numbers equal metrics.json."""
    import re

    from tinyloc.cli.main import main

    out = tmp_path / "rep"
    rc = main(["replay", str(sim_site / "drive"), str(sim_site / "drive-gaps"), "--map", str(sim_site / "site.tlm"),
               "-o", str(out), "--json", "--jobs", "2", "-q"])
    assert rc == 0
    runs = json.loads(capsys.readouterr().out)["runs"]
    assert [r["error"] for r in runs] == [None, None]
    m, mg = runs[0]["metrics"], runs[1]["metrics"]
    assert m["frames"] == 12 and m["frames_with_truth"] == 12
    assert m["loop_health"]["frames"] == 12 and m["run"]["localizer"] == "loop"
    assert m["frame_ms_median"] > 0 and m["replay"]["frames_per_s"] > 0
    for k in ("0.25m_2deg", "0.5m_2deg", "1m_3deg", "2m_5deg"):
        assert 0.0 <= m["recall"][k] <= 1.0
    assert m["gnss_median_error_m"] is not None and m["dead_reckoning"]["median_error_m"] is not None
    # The damaged drive: 11 frames (one file gone) replayed by the loop to the last one, every fault listed.
    assert mg["frames"] == 11 and mg["loop_health"]["frames"] == 11
    gl = "\n".join(mg["gaps"]["list"])
    assert "frame file 'frames/000004.png' is missing" in gl and "frames: 0.40 s pause" in gl
    assert gl.count("non-finite value") == 3 and gl.count("truncated last line ignored") == 2
    assert "gnss.csv: outage" in gl
    assert mg["gnss"]["frames_without_fix"] > 0

    assert json.loads((out / "drive" / "metrics.json").read_text()) == m
    text = (out / "drive" / "report.html").read_text()
    cells = re.findall(r'data-key="([^"]+)" data-value="([^"]*)">([^<]*)</td>', text)
    assert len(cells) > 30
    for key, raw, shown in cells:
        v = m
        for part in html.unescape(key).split("/"):
            v = v[int(part)] if isinstance(v, list) else v[part]
        if v is None:
            assert shown == "n/a"
        elif not isinstance(v, str):
            assert float(raw) == v, key
    # The worst frames carry the loop's own views.
    for view in ("segmentation", "bird&#x27;s-eye view", "likelihood (max over heading)", "labels (truth)"):
        assert view in text, view
