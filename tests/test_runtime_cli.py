"""The live loop from the outside: tinyloc run / locate / demo, SIGTERM mid-run, a serial link that goes away."""

import math
import os
import signal
import socket
import subprocess
import sys
import threading
import time
import tomllib

import numpy as np
import pytest

from tinyloc.camera.model import CameraModel
from tinyloc.classes import MAP_CLASSES
from tinyloc.correlate.synth import street_map
from tinyloc.maps.packfile import MapMeta, PackedMap, write_packed
from tinyloc.runfolder import RunWriter
from tinyloc.runtime.config import LoopConfig, config_to_dict
from tinyloc.runtime.loop import Frame, PoseEstimate
from tinyloc.runtime.runlog import read_runlog
from tinyloc.runtime.runner import Runner
from tinyloc.runtime.sinks import Sink, open_sink

ORIGIN = (46.5, 7.25, 500.0)
CAM = CameraModel(width=160, height=120, fx=110.0, fy=110.0, cx=79.5, cy=59.5)


def tinyloc(*args, **kw):
    return subprocess.run([sys.executable, "-W", "ignore", "-m", "tinyloc", *map(str, args)], capture_output=True,
                          text=True, timeout=300, **kw)


@pytest.fixture(scope="module")
def site_and_run(tmp_path_factory):
    d = tmp_path_factory.mktemp("cli")
    size = 256
    cov = street_map(size, 5)
    meta = MapMeta(*ORIGIN, 0.5, -64.0, 64.0, size, size, 64, tuple(c.name for c in MAP_CLASSES),
                   tuple(c.index for c in MAP_CLASSES))
    write_packed(d / "site.tlm", meta, cov)
    pm = PackedMap.open(d / "site.tlm")
    rng = np.random.default_rng(3)
    img = np.zeros((CAM.height, CAM.width, 3), np.uint8)
    img[:40] = (230, 190, 140)
    img[40:] = (105, 105, 105)
    with RunWriter(d / "run", camera=CAM, origin=ORIGIN, name="cli-run") as w:
        for k in range(120):
            t = 0.1 * k
            w.add_frame(t, np.clip(img.astype(int) + rng.integers(-8, 9, img.shape), 0, 255).astype(np.uint8))
            w.add_imu(t, 0.0, 0.0, 9.81)
            w.add_odometry(t, 0.1 * k, 0.0, 0.0)
            lat, lon = pm.frame.to_latlon(0.1 * k, 0.0)
            w.add_gnss(t, lat, lon, 500.0, 2.0)
    return d


def test_print_config_is_the_documented_defaults():
    r = tinyloc("run", "--print-config")
    assert r.returncode == 0
    assert tomllib.loads(r.stdout) == config_to_dict(LoopConfig())


def test_uncalibrated_accelerometer_is_warned_at_start():
    from tinyloc.cli.cmd_run import uncalibrated_warning
    from tinyloc.runtime.config import load_config

    w = uncalibrated_warning(load_config(None, []))
    assert w is not None and "not calibrated" in w and "tinyloc calibrate imu" in w and "calibrate wheel" in w
    w = uncalibrated_warning(load_config(None, ["loop.accel_bias_z=0.03"]))
    assert "calibrate wheel" in w and "calibrate imu" not in w
    w = uncalibrated_warning(load_config(None, ["track.odometry_scale=0.98"]))
    assert "calibrate imu" in w and "calibrate wheel" not in w
    assert uncalibrated_warning(load_config(None, ["loop.accel_bias_z=0.03", "track.odometry_scale=0.98"])) is None
    # the demo robot's configuration holds its calibration: no warning
    from tinyloc.sim.demo import demo_paths

    assert uncalibrated_warning(load_config(demo_paths()["run"].parent / "loop.toml", [])) is None


def test_bad_override_is_one_line(site_and_run):
    d = site_and_run
    r = tinyloc("run", "--map", d / "site.tlm", "--source", d / "run", "--set", "track.bogus=1")
    assert r.returncode == 2
    lines = [ln for ln in r.stderr.strip().splitlines() if "Warning" not in ln and "warnings.warn" not in ln]
    assert lines == ["tinyloc: error: --set: unknown key 'track.bogus' (known in track: " + lines[0].split(
        "(known in track: ")[1]]


def test_sigterm_mid_run_stops_cleanly_with_the_log_intact(site_and_run):
    d = site_and_run
    log = d / "sigterm.tlog"
    proc = subprocess.Popen([sys.executable, "-W", "ignore", "-m", "tinyloc", "run", "--map", str(d / "site.tlm"),
                             "--source", str(d / "run"), "--realtime", "--to", f"log:{log}", "--to", "-"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        got = 0
        t0 = time.monotonic()
        while got < 5 and time.monotonic() - t0 < 120:  # poses are streaming: the loop is mid-run
            line = proc.stdout.readline()
            if not line:
                break
            got += '"type":"pose"' in line
        assert got >= 5
        proc.send_signal(signal.SIGTERM)
        out, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 0, err[-500:]
    assert "stopped by SIGTERM" in err
    recs, problems = read_runlog(log)
    assert problems == []
    poses = [r for r in recs if r["k"] == "pose"]
    assert 5 <= len(poses) < 120
    assert recs[-1] == {"k": "event", "text": "stopped: SIGTERM"}
    assert any(r["k"] == "status" and r["state"] == "stopping" for r in recs)
    # every pose says what happened (these plain frames show no usable ground: an honest status)
    assert all(p["status"] for p in poses) and all(p["quality"] in ("no-fix", "searching", "tracking", "degraded")
                                                   for p in poses)


class _StubLocalizer:
    def __init__(self):
        self.n = 0

    def step(self, frame):
        self.n += 1
        return PoseEstimate(frame.t, 1.0, 2.0, 0.3, ORIGIN[0], ORIGIN[1], np.eye(3) * 0.04, "tracking", [], 1.0, "ok")

    def health(self):
        return {"frames": self.n, "quality": "tracking"}


def test_serial_port_gone_and_back(tmp_path):
    srv = socket.socket()
    srv.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    srv.bind(("127.0.0.1", 0))
    srv.listen(2)
    port = srv.getsockname()[1]
    got = {"first": 0, "second": 0}

    def serve():
        c1, _ = srv.accept()
        c1.settimeout(5)
        got["first"] = len(c1.recv(65536))
        c1.close()  # the far end goes away (cable pulled, MCU reboot)
        c2, _ = srv.accept()  # ... and comes back
        c2.settimeout(5)
        t0 = time.monotonic()
        while time.monotonic() - t0 < 5:
            try:
                b = c2.recv(65536)
            except socket.timeout:
                break
            if not b:
                break
            got["second"] += len(b)
        c2.close()

    th = threading.Thread(target=serve, daemon=True)
    th.start()
    sink = open_sink(f"socket://127.0.0.1:{port}", backoff_s=(0.02, 0.1))
    log = tmp_path / "link.tlog"

    def frames():
        for k in range(150):
            time.sleep(0.01)
            yield Frame(k, 0.01 * k, None)

    runner = Runner(_StubLocalizer(), frames(), [sink, open_sink(f"log:{log}")], status_every_s=0.2)
    summary = runner.run()
    th.join(timeout=10)
    srv.close()
    assert summary["frames"] == 150  # the loop never waited for the link
    h = summary["health"]
    assert got["first"] > 0 and got["second"] > 0
    assert h["sink0_link_reconnects"] >= 1 and h["sink0_link_disconnects"] >= 1
    recs, problems = read_runlog(log)
    assert problems == [] and sum(r["k"] == "pose" for r in recs) == 150


class _SignalMidFrame(_StubLocalizer):
    """Raises a signal against its own process in the middle of frame ``at`` (``times`` times), then finishes it."""

    def __init__(self, sig, at, times=1):
        super().__init__()
        self.sig, self.at, self.times = sig, at, times

    def step(self, frame):
        if self.n + 1 == self.at:
            for _ in range(self.times):
                os.kill(os.getpid(), self.sig)
                time.sleep(0.01)  # the handler runs here, inside the frame
            time.sleep(0.02)  # ... and the frame goes on after it
        return super().step(frame)


def _endless_frames(pulled):
    k = 0
    while True:
        pulled.append(k)
        yield Frame(k, 0.1 * k, None)
        k += 1


def test_sigterm_mid_frame_finishes_the_frame_then_stops_cleanly(tmp_path):
    log = tmp_path / "mid.tlog"
    loc = _SignalMidFrame(signal.SIGTERM, at=20)
    pulled = []
    sent = []

    class Recorder(Sink):
        def send(self, pose):
            sent.append(pose.t)
            return True

    old = signal.getsignal(signal.SIGTERM)
    summary = Runner(loc, _endless_frames(pulled), [Recorder(), open_sink(f"log:{log}")]).run()
    assert signal.getsignal(signal.SIGTERM) == old  # handlers restored
    assert summary["stopped_by"] == "SIGTERM" and not summary["interrupted"]
    assert summary["frames"] == 20 and loc.n == 20 and len(pulled) == 20  # no frame started after it
    assert sent[-1] == pytest.approx(1.9)  # the frame in progress was finished and sent
    recs, problems = read_runlog(log)
    assert problems == []
    poses = [r for r in recs if r["k"] == "pose"]
    assert len(poses) == 20 and poses[-1]["t"] == pytest.approx(1.9)
    stopping = [r for r in recs if r["k"] == "status" and r["state"] == "stopping"]
    assert len(stopping) == 1 and stopping[0]["text"] == "SIGTERM" and stopping[0]["frames"] == 20
    assert recs[-1] == {"k": "event", "text": "stopped: SIGTERM"}


def test_second_sigint_stops_at_once_and_still_closes_the_log(tmp_path):
    log = tmp_path / "int.tlog"
    loc = _SignalMidFrame(signal.SIGINT, at=7, times=2)
    pulled = []
    summary = Runner(loc, _endless_frames(pulled), [open_sink(f"log:{log}")]).run()
    assert summary["interrupted"] and summary["stopped_by"] == "SIGINT"
    assert summary["frames"] == 6  # the interrupted frame was abandoned
    recs, problems = read_runlog(log)
    assert problems == [] and sum(r["k"] == "pose" for r in recs) == 6
    assert recs[-1] == {"k": "event", "text": "stopped: SIGINT"}


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="pseudo-terminal tests need Linux ptys")
def test_serial_pty_unplugged_and_replugged_mid_run(tmp_path):
    """The firmware's serial cable (a pty pair) is pulled and pushed back while the loop runs."""
    from _link_helpers import PtyCable
    from tinyloc.link import open_endpoint

    cable = PtyCable(tmp_path, baud=115200)
    events = []
    try:
        sink = open_sink(str(cable.end_a), backoff_s=(0.02, 0.1), on_event=events.append)
        mcu = open_endpoint(str(cable.end_b), backoff_s=(0.02, 0.1), on_event=events.append)
        got = []
        log = tmp_path / "pty.tlog"

        def frames():
            for k in range(150):
                if k == 50:
                    cable.unplug()
                if k == 90:
                    cable.plug()
                time.sleep(0.01)
                got.extend(mcu.poll())
                yield Frame(k, 0.01 * k, None)
            for _ in range(50):  # let the line drain
                time.sleep(0.01)
                got.extend(mcu.poll())

        summary = Runner(_StubLocalizer(), frames(), [sink, open_sink(f"log:{log}")], status_every_s=0.1).run()
        assert summary["frames"] == 150  # the loop never waited for the cable
        h = summary["health"]
        assert h["sink0_link_disconnects"] >= 1 and h["sink0_link_reconnects"] >= 1
        ts = [round(g.t, 2) for g in got if getattr(g, "NAME", "") == "pose"]
        assert any(t < 0.5 for t in ts) and any(t >= 0.95 for t in ts)  # poses before the pull and after
        assert not any(0.55 <= t < 0.89 for t in ts)  # nothing while the cable was out
        assert any("reconnected after" in e for e in events)
        recs, problems = read_runlog(log)
        assert problems == [] and sum(r["k"] == "pose" for r in recs) == 150
        # the status records say what happened to the link
        st = [r for r in recs if r["k"] == "status"]
        assert st[-1]["sink0_link_reconnects"] >= 1 and st[-1]["sink0_link_disconnects"] >= 1
        sink.close()
        mcu.close()
    finally:
        cable.close()


def test_locate_one_image(site_and_run, tmp_path):
    d = site_and_run
    img = d / "run" / "frames" / "000010.png"
    out = tmp_path / "lik.png"
    r = tinyloc("locate", img, "--map", d / "site.tlm", "--camera", d / "run" / "camera.toml", "--near",
                f"{ORIGIN[0]},{ORIGIN[1]},20", "-o", out, "--json")
    assert r.returncode == 0, r.stderr[-400:]
    import json

    res = json.loads(r.stdout)
    assert res["quality"] in ("no-fix", "searching", "tracking", "degraded")
    if res["quality"] != "no-fix":
        assert out.is_file() and len(res["cov"]) == 3
    r = tinyloc("locate", tmp_path / "nope.png", "--map", d / "site.tlm", "--camera", d / "run" / "camera.toml",
                "--near", "46.5,7.25")
    assert r.returncode == 2 and "nope.png: no such file" in r.stderr
    r = tinyloc("locate", img, "--map", d / "site.tlm", "--camera", d / "run" / "camera.toml", "--near", "46.5")
    assert r.returncode == 2 and "--near" in r.stderr


def test_demo_runs_the_bundled_drive(tmp_path):
    from tinyloc.cli.cmd_demo import DATA

    if not any(DATA.rglob("run.json")) if DATA.is_dir() else True:
        r = tinyloc("demo", "--json")
        assert r.returncode == 2 and "bundled demo data is not installed" in r.stderr
        pytest.skip(f"bundled demo data not present at {DATA} (checked the one-line error instead)")
    r = tinyloc("demo", "--max-frames", "12", "--json", "--to", f"log:{tmp_path / 'demo.tlog'}", "--skip-m", "0")
    assert r.returncode == 0, r.stderr[-400:]
    import json

    s = json.loads(r.stdout)
    for k in ("recall_1m_3deg", "median_error_m", "gnss_median_error_m", "frame_ms_median", "frames"):
        assert k in s
    assert s["frames"] == 12
    assert s["config"] == str(DATA / "loop.toml")  # the demo robot's calibrated accelerometer bias


def test_prepare_fills_the_kernel_cache_and_exits(site_and_run):
    """`run --prepare` builds the loop once and exits; a second one then loads every kernel from the cache."""
    d = site_and_run
    first = tinyloc("run", "--prepare", "--map", d / "site.tlm", "--source", d / "run")
    assert first.returncode == 0, first.stderr
    second = tinyloc("run", "--prepare", "--map", d / "site.tlm", "--source", d / "run")
    assert second.returncode == 0 and "(0 compiled now" in second.stderr, second.stderr
    assert second.stdout == ""  # no poses: nothing was run
    r = tinyloc("run", "--prepare", "--map", d / "site.tlm")
    assert r.returncode == 2 and r.stderr.strip().splitlines()[-1].startswith("tinyloc: error: tinyloc run --prepare")
