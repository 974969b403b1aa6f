"""``tinyloc link listen`` / ``tinyloc link send --demo`` against each other over a pseudo-terminal pair."""

import json
import subprocess
import sys
import time

import pytest

from tinyloc.cli.main import main

from _link_helpers import PtyCable


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="pseudo-terminal test needs Linux ptys")
def test_listen_and_send_demo_over_a_pty_pair(tmp_path):
    import signal
    import threading

    cable = PtyCable(tmp_path, baud=115200)
    rows = []
    try:
        listen = subprocess.Popen([sys.executable, "-m", "tinyloc", "link", "listen", str(cable.end_b), "--json",
                                   "--for", "30", "--stats", "0"], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                  text=True)
        # pyserial drops input waiting at open: start sending once the listener has its port open
        assert "listening on" in listen.stderr.readline()
        reader = threading.Thread(target=lambda: rows.extend(json.loads(s) for s in listen.stdout), daemon=True)
        reader.start()
        send = subprocess.run([sys.executable, "-m", "tinyloc", "link", "send", str(cable.end_a), "--demo",
                               "--rate", "100", "--for", "1.2"], capture_output=True, text=True, timeout=30)
        sent = int(send.stderr.split("sent ")[1].split()[0])
        end = time.monotonic() + 5.0
        while len(rows) < sent and time.monotonic() < end:
            time.sleep(0.02)
        listen.send_signal(signal.SIGINT)          # Ctrl-C: the listener prints its counters and exits 0
        err = listen.stderr.read()
        listen.wait(timeout=10)
        reader.join(timeout=5)
    finally:
        cable.close()
    assert send.returncode == 0 and listen.returncode == 0, send.stderr + err
    assert sent >= 100 and len(rows) == sent
    assert [r["seq"] for r in rows] == list(range(sent))
    assert {r["quality"] for r in rows} == {"searching", "tracking"}
    assert "frames_ok=%d" % sent in err and "resyncs=0" in err


def test_send_from_jsonl_and_bad_file(tmp_path, capsys):
    src = tmp_path / "in.jsonl"
    rc = main(["link", "send", f"jsonl:{src}", "--demo", "--for", "0.1", "--rate", "50"])
    assert rc == 0
    n = len(src.read_text().splitlines())
    dst = tmp_path / "out.jsonl"
    assert main(["link", "send", f"jsonl:{dst}", "--from", str(src), "--rate", "1000"]) == 0
    assert [json.loads(s)["x"] for s in dst.read_text().splitlines()] == \
           [json.loads(s)["x"] for s in src.read_text().splitlines()] and n >= 3
    bad = tmp_path / "bad.jsonl"
    bad.write_text('{"type": "pose", "t": 1.0}\n')
    assert main(["link", "send", "-", "--from", str(bad)]) == 2
    assert "bad.jsonl:1: not a message map" in capsys.readouterr().err


def test_listen_bad_port_is_one_line(capsys):
    assert main(["link", "listen", "/dev/tinyloc-no-such-port"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err == ["tinyloc: error: /dev/tinyloc-no-such-port: cannot open: No such file or directory"]


def test_listen_refuses_output_only_links(capsys):
    assert main(["link", "listen", "nmea:-"]) == 2
    assert "output only" in capsys.readouterr().err


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="pseudo-terminal test needs Linux ptys")
def test_link_pty_command_makes_a_working_pair():
    from tinyloc.link import messages as m, open_endpoint

    proc = subprocess.Popen([sys.executable, "-m", "tinyloc", "link", "pty", "--for", "2"], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    try:
        a_name = proc.stdout.readline().strip()
        b_name = proc.stdout.readline().strip()
        a, b = open_endpoint(a_name), open_endpoint(b_name)
        for i in range(20):
            assert a.send(m.Odometry(i * 0.01, i, 0, 0))
        got = []
        for _ in range(200):
            got += b.poll()
            if len(got) == 20:
                break
            time.sleep(0.005)
        assert [g.x for g in got] == [float(i) for i in range(20)]
        a.close()
        b.close()
    finally:
        proc.wait(timeout=10)
    assert proc.returncode == 0
