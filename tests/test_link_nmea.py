"""NMEA 0183 output: checksums, values read back with pynmea2, quality mapping, covariance -> GST."""

import datetime as dt
import io
import math
import time

import numpy as np
import pytest

from tinyloc.frames import heading_deg_to_yaw
from tinyloc.link import messages as m, nmea, open_endpoint

pynmea2 = pytest.importorskip("pynmea2", reason="pynmea2 (reference NMEA parser) is not installed")

UTC = dt.datetime(2026, 3, 14, 9, 26, 53, 580000, tzinfo=dt.timezone.utc)


def test_checksum_of_published_examples():
    # The GGA and RMC examples widely quoted in NMEA 0183 tutorials (e.g. the NMEA data page of
    # Dale DePriest's GPS notes); quoted from memory, and pynmea2 confirms both checksums.
    gga = "$GPGGA,123519,4807.038,N,01131.000,E,1,08,0.9,545.4,M,46.9,M,,*47"
    rmc = "$GPRMC,123519,A,4807.038,N,01131.000,E,022.4,084.4,230394,003.1,W*6A"
    for s, cs in ((gga, "47"), (rmc, "6A")):
        assert nmea.checksum(s[1:s.index("*")]) == cs
        pynmea2.parse(s, check=True)


def pose(quality="tracking", **kw):
    base = dict(t=100.0, x=12.0, y=-3.0, yaw=heading_deg_to_yaw(30.0), lat=44.4412345678, lon=-101.2471234567,
                cov=((0.25, 0.1, 0.0), (0.1, 0.16, 0.0), (0.0, 0.0, 0.001)), quality=quality, status="ok")
    base.update(kw)
    return m.Pose(**base)


def parse_all(text_list):
    out = {}
    for s in text_list:
        assert s.endswith("\r\n")
        msg = pynmea2.parse(s.strip(), check=True)   # check=True: the checksum must be right
        out[msg.sentence_type] = msg
    return out


def test_sentences_parse_to_the_values_sent():
    prev = pose(t=99.0, x=10.0, y=-3.0)
    p = pose()
    msgs = parse_all(nmea.pose_sentences(p, UTC, prev=prev, alt_m=412.5))
    assert set(msgs) == {"GGA", "RMC", "HDT", "GST"}
    gga, rmc, hdt, gst = msgs["GGA"], msgs["RMC"], msgs["HDT"], msgs["GST"]
    assert gga.talker == "GN"
    assert abs(gga.latitude - 44.4412345678) < 1e-8 and abs(gga.longitude + 101.2471234567) < 1e-8  # 6 decimals of a minute
    assert gga.lat_dir == "N" and gga.lon_dir == "W"
    assert gga.gps_qual == 1 and gga.timestamp.replace(tzinfo=None) == dt.time(9, 26, 53, 580000)
    assert float(gga.altitude) == 412.5
    assert rmc.status == "A" and rmc.datestamp == dt.date(2026, 3, 14) and rmc.mode_indicator == "A"
    assert abs(rmc.latitude - gga.latitude) < 1e-12
    # 2 m east in 1 s: 2 m/s = 3.88769 knots, course 090 degrees true
    assert float(rmc.spd_over_grnd) == pytest.approx(2.0 * 3600 / 1852, abs=1e-3)
    assert float(rmc.true_course) == pytest.approx(90.0, abs=0.01)
    assert float(hdt.heading) == pytest.approx(30.0, abs=0.005) and hdt.hdg_true == "T"
    # GST against numpy's eigen-decomposition of the 2x2 position covariance (x east, y north)
    c = np.array([[0.25, 0.1], [0.1, 0.16]])
    w, v = np.linalg.eigh(c)
    major = v[:, 1]
    orient = np.degrees(np.arctan2(major[0], major[1])) % 180.0   # from north towards east
    assert float(gst.std_dev_major) == pytest.approx(math.sqrt(w[1]), abs=1e-3)
    assert float(gst.std_dev_minor) == pytest.approx(math.sqrt(w[0]), abs=1e-3)
    assert float(gst.orientation) == pytest.approx(orient, abs=0.05)
    assert float(gst.std_dev_latitude) == pytest.approx(0.4, abs=1e-3)
    assert float(gst.std_dev_longitude) == pytest.approx(0.5, abs=1e-3)
    assert gst.rms in ("", None) and gst.std_dev_altitude in ("", None)


@pytest.mark.parametrize("quality,gga_q,status,mode,heading", [
    ("no-fix", 0, "V", "N", False), ("searching", 0, "V", "N", False),
    ("tracking", 1, "A", "A", True), ("degraded", 6, "V", "E", True)])
def test_fix_quality_follows_the_quality_flag(quality, gga_q, status, mode, heading):
    msgs = parse_all(nmea.pose_sentences(pose(quality), UTC))
    assert msgs["GGA"].gps_qual == gga_q
    assert msgs["RMC"].status == status and msgs["RMC"].mode_indicator == mode
    assert (msgs["HDT"].heading not in ("", None)) == heading


def test_unknown_position_reads_invalid():
    msgs = parse_all(nmea.pose_sentences(pose(lat=math.nan, lon=math.nan), UTC))
    assert msgs["GGA"].gps_qual == 0 and msgs["RMC"].status == "V" and msgs["GGA"].lat == ""


def test_degree_minute_rounding_carries():
    # 59.99999999 minutes must not print as "60.0000000"
    s = nmea.pose_sentences(pose(lat=10.9999999999, lon=179.99999999999), UTC)[0]
    msg = pynmea2.parse(s.strip())
    assert msg.lat == "1100.000000" and msg.lon == "18000.000000"


def test_bad_covariance_leaves_gst_fields_empty():
    msgs = parse_all(nmea.pose_sentences(pose(cov=((math.nan, 0, 0), (0, 1, 0), (0, 0, 1))), UTC))
    assert msgs["GST"].std_dev_major in ("", None)


def test_endpoint_rate_and_stdout():
    out = io.StringIO()
    clock = [0.0]
    ep = open_endpoint("nmea:-", stream=out, rate_hz=2.0, clock=lambda: clock[0], utc_from_t=lambda t: UTC)
    sent = 0
    for i in range(100):           # 100 poses over 1 s at 100 Hz -> 2 groups at 2 Hz
        clock[0] = i * 0.01
        sent += ep.send(pose(t=i * 0.01))
    assert sent == 2 and ep.counters.dropped_rate == 98
    lines = out.getvalue().splitlines()
    assert len(lines) == 8 and all(pynmea2.parse(s, check=True) for s in lines)
    ep.send(m.Odometry(0.0, 1, 2, 3))   # not a pose: ignored
    assert len(out.getvalue().splitlines()) == 8


def test_endpoint_udp_datagrams():
    rx = open_endpoint("udp-listen://127.0.0.1:0")
    port = rx.address[1]
    ep = open_endpoint(f"nmea+udp://127.0.0.1:{port}?rate=50&talker=GP")
    assert ep.send(pose())
    rx._sock.setblocking(True)
    rx._sock.settimeout(2.0)
    data, _ = rx._sock.recvfrom(4096)
    sentences = data.decode("ascii").splitlines()
    assert [pynmea2.parse(s, check=True).sentence_type for s in sentences] == ["GGA", "RMC", "HDT", "GST"]
    assert sentences[0].startswith("$GPGGA")
    ep.close()
    rx.close()


def test_endpoint_serial_loop():
    ep = open_endpoint("nmea+serial:loop://", rate_hz=100)
    assert ep.send(pose())
    port = ep._serial._port
    time.sleep(0.01)
    text = port.read(port.in_waiting).decode("ascii")
    assert [pynmea2.parse(s, check=True).sentence_type for s in text.splitlines()] == ["GGA", "RMC", "HDT", "GST"]
    ep.close()


@pytest.mark.parametrize("url,fault", [("nmea+udp://127.0.0.1:9?talker=gps", "talker"),
                                       ("nmea+udp://127.0.0.1:9?speed=3", "unknown option"),
                                       ("nmea://x", "not an NMEA URL")])
def test_bad_urls(url, fault):
    from tinyloc.errors import LinkError

    with pytest.raises(LinkError, match=fault):
        open_endpoint(url)


def test_gga_options_for_picky_consumers():
    msgs = parse_all(nmea.pose_sentences(pose(), UTC, sats=12, hdop_m=0.5, tracking_fix=4))
    gga = msgs["GGA"]
    assert gga.num_sats == "12" and gga.gps_qual == 4
    # HDOP * hdop_m = horizontal RMS error = sqrt(0.25 + 0.16) m
    assert float(gga.horizontal_dil) == pytest.approx(math.sqrt(0.41) / 0.5, abs=0.05)
    # the options never make an invalid pose look valid
    bad = parse_all(nmea.pose_sentences(pose("searching"), UTC, sats=12, hdop_m=0.5, tracking_fix=4))["GGA"]
    assert bad.gps_qual == 0 and bad.horizontal_dil == ""
    out = io.StringIO()
    ep = open_endpoint("nmea:-?sats=9&hdop_m=1&fix=5", stream=out)
    ep.send(pose())
    gga = pynmea2.parse(out.getvalue().splitlines()[0], check=True)
    assert gga.num_sats == "09" and gga.gps_qual == 5 and float(gga.horizontal_dil) == pytest.approx(0.6, abs=0.05)


def test_bad_gga_options():
    from tinyloc.errors import LinkError

    with pytest.raises(LinkError, match="1, 2, 4 or 5"):
        open_endpoint("nmea:-?fix=3")
    with pytest.raises(LinkError, match="positive"):
        open_endpoint("nmea:-?hdop_m=0")
    with pytest.raises(LinkError, match="nmea\\+udp:// only"):
        open_endpoint("nmea:-?bind=0.0.0.0:0")


def test_sentences_stay_within_82_characters():
    # Worst cases: far south-west, fast, every optional field filled, huge uncertainty.
    prev = pose(t=0.0, x=0.0, y=0.0, lat=-89.9999999, lon=-179.9999999)
    p = pose(t=0.01, x=900.0, y=-900.0, lat=-89.9999999, lon=-179.9999999,
             cov=((1e30, 1e29, 0.0), (1e29, 1e31, 0.0), (0.0, 0.0, 1.0)))
    for s in nmea.pose_sentences(p, UTC, prev=prev, alt_m=-99999.99, sats=99, hdop_m=1e-9, tracking_fix=5):
        assert len(s) <= nmea.MAX_SENTENCE, s
        pynmea2.parse(s.strip(), check=True)
