"""``tinyloc calibrate wheel``: the wheel-odometry factor from straight drives of measured length.

The straight-line test is common practice: the factor is the tape's distance over the odometry's
start-to-end distance. The figures below are worked by hand (20 / 20.4 = 0.980392; pooled, 40 / 40.6 =
0.985222); the odometry frame is rotated and shifted to show that only distances count. The simulator's
recordings must give back the wheel model's own scale error; each recording's checks reject a drive
that turned, did not stop on the mark, or belongs to another line.
"""

import json
import math

import numpy as np
import pytest

from tinyloc.cli.main import main
from tinyloc.runtime.config import load_config


def _line_csv(path, odo_m, *, heading_deg=37.0, origin=(3.0, -2.0), turn_deg=0.0, bend_m=0.0, moving_end=False,
              rate_hz=50.0):
    """A straight drive: 1 s at rest, odo_m at 1 m/s along heading_deg, 1 s at rest (or still moving)."""
    n_move = int(round(odo_m * rate_hz))
    s = np.concatenate([np.zeros(int(rate_hz)), np.linspace(0.0, odo_m, n_move),
                        np.full(0 if moving_end else int(rate_hz), odo_m)])
    if moving_end:  # the last second still at 1 m/s past the mark
        s = np.concatenate([s, odo_m + np.arange(1, int(rate_hz) + 1) / rate_hz])
    u = s / max(odo_m, 1e-9)
    side = bend_m * np.sin(np.pi * np.clip(u, 0.0, 1.0))  # a bow that returns to the line at the end
    h = math.radians(heading_deg)
    x = origin[0] + s * math.cos(h) - side * math.sin(h)
    y = origin[1] + s * math.sin(h) + side * math.cos(h)
    yaw = h + math.radians(turn_deg) * np.clip(u, 0.0, 1.0)
    t = np.arange(len(s)) / rate_hz
    with open(path, "w") as fh:
        fh.write("# wheel odometry along the tape\nt,x,y,yaw\n")
        for k in range(len(s)):
            fh.write(f"{t[k]:.3f},{x[k]:.5f},{y[k]:.5f},{yaw[k]:.6f}\n")
    return path


def test_hand_worked_factor_written_into_the_loop_config(tmp_path, capsys):
    a = _line_csv(tmp_path / "a.csv", 20.4)
    b = _line_csv(tmp_path / "b.csv", 20.2, heading_deg=217.0)  # driven back
    cfg = tmp_path / "loop.toml"
    cfg.write_text("[loop]\nlate_ms = 80.0\n[track]\nodo_scale_rate = 0.03\n")
    assert main(["calibrate", "wheel", str(a), "--distance", "20", "--json"]) == 0
    assert abs(json.loads(capsys.readouterr().out)["odometry_scale"] - 0.980392) < 1e-5
    assert main(["calibrate", "wheel", str(a), str(b), "--distance", "20", "-o", str(cfg), "--json"]) == 0
    rep = json.loads(capsys.readouterr().out)
    assert abs(rep["odometry_scale"] - 0.985222) < 1e-5
    assert abs(rep["recordings"][1]["factor"] - 20 / 20.2) < 1e-5
    c = load_config(cfg)
    assert c.loop.late_ms == 80.0 and c.track.odo_scale_rate == 0.03  # the file's other values are kept
    assert abs(c.track.odometry_scale - 0.98522) < 1e-5


@pytest.mark.parametrize("kw, distance, text", [
    (dict(turn_deg=12.0), 20.0, "not a straight drive"),
    (dict(bend_m=1.5), 20.0, "not a straight drive"),  # a 1.5 m bow: path about 1.3 % longer than start to end
    (dict(moving_end=True), 20.0, "moving at the start or the end"),
    (dict(), 30.0, "wrong recording, distance or units"),
    (dict(), 2.0, "at least 5 m"),
])
def test_one_line_errors(tmp_path, capsys, kw, distance, text):
    p = _line_csv(tmp_path / "line.csv", 20.4, **kw)
    assert main(["calibrate", "wheel", str(p), "--distance", str(distance)]) != 0
    err = capsys.readouterr().err.strip()
    assert text in err and "Traceback" not in err and len(err.splitlines()) == 1


def test_missing_file_and_a_run_folder(tmp_path, capsys):
    assert main(["calibrate", "wheel", str(tmp_path / "none.csv"), "--distance", "20"]) != 0
    assert "no such file" in capsys.readouterr().err
    run = tmp_path / "line_run"
    run.mkdir()
    _line_csv(run / "odometry.csv", 25.0)
    assert main(["calibrate", "wheel", str(run), "--distance", "25.4", "--json"]) == 0
    assert abs(json.loads(capsys.readouterr().out)["odometry_scale"] - 25.4 / 25.0) < 1e-5


def test_simulated_line_drives_give_the_wheel_models_scale(tmp_path, capsys):
    """The simulator's two 20 m drives (slip 1 % correlated over 1 s) recover its 2 % scale error to 0.3 %."""
    from tinyloc.sim.runs import WHEEL_LINE_M, write_wheel_line
    from tinyloc.sim.sensors import OdometryParams

    for seed in (1, 2, 3):
        paths = write_wheel_line(tmp_path / f"run{seed}", seed, OdometryParams())
        assert main(["calibrate", "wheel", *map(str, paths), "--distance", str(WHEEL_LINE_M), "--json"]) == 0
        f = json.loads(capsys.readouterr().out)["odometry_scale"]
        assert abs(f * 1.02 - 1.0) < 0.003, (seed, f)
    # the files are a pure function of the seed (a stream of their own)
    again = write_wheel_line(tmp_path / "again", 1, OdometryParams())
    assert again[0].read_text() == (tmp_path / "run1" / "calibration" / "wheel_line_a.csv").read_text()
