"""``tinyloc link``: listen to a link and print what arrives; send demo poses or recorded messages."""

from __future__ import annotations

import json
import math
import sys
import time

from ..errors import InputError, ProtocolError

NAME = "link"
HELP = "listen to or send on a link (serial port, pty, UDP, NMEA)"
DESCRIPTION = """\
Talk to the firmware link by hand: print what arrives with the link's counters, or send
synthetic poses to check a receiver (motor controller, autopilot, NMEA consumer).

PORT is a link URL (see docs/link.md):
  /dev/ttyUSB0, /dev/serial/by-id/..., loop://, socket://HOST:PORT   framed binary on a serial line
  udp://HOST:PORT, udp-listen://[ADDR]:PORT                          message-pack over UDP (loopback by default)
  nmea+serial:/dev/ttyUSB1, nmea+udp://HOST:PORT, nmea:-             NMEA 0183 sentences (send only)
  -, jsonl:-, jsonl:FILE                                             JSON lines (send only)

examples:
  tinyloc link listen /dev/ttyUSB0                        decode odometry/IMU/heartbeats from the MCU
  tinyloc link send /dev/ttyUSB0 --demo --rate 50         stream synthetic poses to it
  tinyloc link send nmea:- --demo --for 2                 see the NMEA sentences a pose becomes
  tinyloc link pty                                        make a pseudo-terminal pair (prints its two names), then
  tinyloc link listen /dev/pts/5 & tinyloc link send /dev/pts/6 --demo"""

# The demo's invented site: a georeference on open plains, no real place.
DEMO_ORIGIN = (44.4410, -101.2480)


def register(parser):
    from .main import group

    sub = group(parser, "link_command")
    p = sub.add_parser("listen", help="decode and print messages arriving on PORT, with counters",
                       description="Decode and print every message arriving on PORT (one line each: text, or "
                                   "JSON with --json). Counters go to stderr every --stats seconds and at the end. "
                                   "The port may vanish and come back (USB unplugged): the listener reconnects "
                                   "and reports the gap.")
    p.add_argument("port", metavar="PORT", help="link URL to listen on (device path, loop://, udp-listen://:PORT ...)")
    p.add_argument("--baud", type=int, default=115200, help="serial line rate in bits/s (default 115200)")
    p.add_argument("--for", dest="duration", type=float, default=None, metavar="SECONDS",
                   help="stop after this many seconds (default: until Ctrl-C)")
    p.add_argument("--json", action="store_true", help="print messages as JSON lines (the map form)")
    p.add_argument("--quiet", action="store_true", help="print no messages, only the counters")
    p.add_argument("--stats", type=float, default=5.0, metavar="SECONDS",
                   help="print counters to stderr this often (0: only at the end; default 5)")
    p.add_argument("--wait", action="store_true", help="if PORT cannot be opened yet, keep trying instead of failing")
    p.set_defaults(func=_listen)

    p = sub.add_parser("send", help="send synthetic poses (--demo) or recorded messages (--from) to PORT",
                       description="Send messages to PORT: --demo streams synthetic poses of a robot driving a "
                                   "40 m circle on an invented site (quality searching for the first second, then "
                                   "tracking, with a degraded spell every 10 s); --from replays a JSON-lines file of "
                                   "message maps (as written to jsonl:FILE). Prints the counters at the end.")
    p.add_argument("port", metavar="PORT", help="link URL to send to (device path, udp://HOST:PORT, nmea:- ...)")
    src = p.add_mutually_exclusive_group(required=True)
    src.add_argument("--demo", action="store_true", help="stream synthetic poses")
    src.add_argument("--from", dest="source", metavar="FILE", help="send the messages of a JSON-lines file")
    p.add_argument("--rate", type=float, default=100.0, help="messages per second (default 100)")
    p.add_argument("--for", dest="duration", type=float, default=None, metavar="SECONDS",
                   help="stop after this many seconds (default: until Ctrl-C, or the end of --from)")
    p.add_argument("--baud", type=int, default=115200, help="serial line rate in bits/s (default 115200)")
    p.add_argument("--wait", action="store_true", help="if PORT cannot be opened yet, keep trying instead of failing")
    p.set_defaults(func=_send)

    p = sub.add_parser("pty", help="make a pseudo-terminal pair joined like a serial cable (for tests without hardware)",
                       description="Create two pseudo-terminals joined like the two ends of a serial cable, print "
                                   "their device names (one per line, end A first) and relay bytes between them, "
                                   "paced at --baud, until Ctrl-C or --for. Point `link send` at one end and "
                                   "`link listen` (or your firmware's host build) at the other.")
    p.add_argument("--baud", type=float, default=115200.0,
                   help="pace the relay at this line rate, 10 bits per byte (default 115200; 0: no pacing)")
    p.add_argument("--for", dest="duration", type=float, default=None, metavar="SECONDS",
                   help="stop after this many seconds (default: until Ctrl-C)")
    p.add_argument("--links", metavar="DIR", default=None,
                   help="also keep symlinks DIR/ttyA and DIR/ttyB to the two ends")
    p.set_defaults(func=_pty)


def _open(url, args):
    from ..link import open_endpoint

    opts = {}
    if _is_serial(url):
        opts["baud"] = args.baud
        if args.wait:
            opts["wait"] = True
        opts["on_event"] = lambda text: print(f"tinyloc: {text}", file=sys.stderr, flush=True)
    return open_endpoint(url, **opts)


def _is_serial(url: str) -> bool:
    return not (url == "-" or url.startswith(("udp://", "udp-listen://", "jsonl:", "nmea")))


def _counters_line(c) -> str:
    d = c.as_dict()
    keys = ["frames_ok", "bad_crc", "bad_cobs", "bad_length", "too_long", "resyncs", "unknown_type", "seq_lost",
            "frames_out", "dropped_rate", "dropped_busy", "dropped_down", "reconnects", "bad_map"]
    parts = [f"{k}={d[k]}" for k in keys if d[k] or k in ("frames_ok", "bad_crc", "resyncs", "frames_out")]
    if d["reconnects"]:
        parts.append(f"last_gap_s={d['last_gap_s']:.2f}")
    return "counters: " + " ".join(parts)


def describe(msg) -> str:
    """One human line for a message."""
    from ..frames import yaw_to_heading_deg

    n = msg.NAME
    head = f"{msg.t:12.6f} #{msg.seq:<5d} {n:<9s}"
    if n == "pose":
        return (f"{head} x={msg.x:.3f} y={msg.y:.3f} heading={yaw_to_heading_deg(msg.yaw):.1f}deg "
                f"sd=({math.sqrt(max(msg.cov[0][0], 0)):.2f} m, {math.sqrt(max(msg.cov[1][1], 0)):.2f} m, "
                f"{math.degrees(math.sqrt(max(msg.cov[2][2], 0))):.1f} deg) {msg.quality} {msg.status!r}")
    if n == "odometry":
        return (f"{head} x={msg.x:.3f} y={msg.y:.3f} yaw={msg.yaw:.3f} v={msg.speed:.2f} m/s "
                f"w={msg.yaw_rate:.3f} rad/s ticks={msg.left_ticks}/{msg.right_ticks} flags={msg.flags}")
    if n == "imu":
        return f"{head} f=({msg.fx:.3f}, {msg.fy:.3f}, {msg.fz:.3f}) m/s^2 gyro=({msg.gx:.4f}, {msg.gy:.4f}, {msg.gz:.4f})"
    if n == "heartbeat":
        return (f"{head} uptime={msg.uptime_ms / 1000:.1f} s rx_ok={msg.rx_ok} rx_bad_crc={msg.rx_bad_crc} "
                f"rx_resyncs={msg.rx_resyncs} state={msg.state}")
    if n == "timesync":
        return f"{head} {msg.phase} origin={msg.t_origin:.6f} receive={msg.t_receive:.6f} transmit={msg.t_transmit:.6f}"
    if n == "status":
        return f"{head} {msg.state} {msg.quality} in={msg.frames_in} dropped={msg.frames_dropped} {msg.text!r}"
    return f"{head} type=0x{msg.type:02x} {len(msg.payload)} bytes"


def _listen(args) -> int:
    from ..link.jsonl import json_line

    if args.port == "-" or args.port.startswith(("jsonl:", "nmea")):
        raise InputError(f"{args.port}: this link is output only; listen on a serial port or udp-listen://")
    ep = _open(args.port, args)
    t0 = time.monotonic()
    last_stats = t0
    print(f"tinyloc: listening on {args.port}", file=sys.stderr, flush=True)
    try:
        while args.duration is None or time.monotonic() - t0 < args.duration:
            msgs = ep.poll()
            for msg in msgs:
                if not args.quiet:
                    print(json_line(msg) if args.json else describe(msg), flush=False)
            if msgs and not args.quiet:
                sys.stdout.flush()
            now = time.monotonic()
            if args.stats > 0 and now - last_stats >= args.stats:
                print(f"tinyloc: {_counters_line(ep.counters)}", file=sys.stderr, flush=True)
                last_stats = now
            if not msgs:
                time.sleep(0.002)
    except KeyboardInterrupt:
        pass
    finally:
        print(f"tinyloc: {_counters_line(ep.counters)}", file=sys.stderr, flush=True)
        ep.close()
    return 0


def demo_pose(i: int, rate: float, frame):
    """Synthetic pose number ``i`` of the demo drive (40 m circle at 1.5 m/s)."""
    from ..link.messages import Pose

    t = i / rate
    r, v = 20.0, 1.5
    a = v * t / r
    x, y = r * math.cos(a), r * math.sin(a)
    yaw = math.atan2(math.cos(a), -math.sin(a))     # tangent of a counter-clockwise circle
    if t < 1.0:
        q, sd, status = "searching", 30.0, "searching the map"
    elif (t % 10.0) > 8.5:
        q, sd, status = "degraded", 2.0, "few features in view"
    else:
        q, sd, status = "tracking", 0.3, "ok"
    lat, lon = frame.to_latlon(x, y)
    cov = ((sd * sd, 0.2 * sd * sd, 0.0), (0.2 * sd * sd, 0.6 * sd * sd, 0.0), (0.0, 0.0, math.radians(2.0) ** 2))
    return Pose(t, x, y, yaw, float(lat), float(lon), cov, q, status, 12.0)


def _read_jsonl(path):
    from ..link.messages import from_map

    try:
        fh = open(path, encoding="utf-8")
    except OSError as e:
        raise InputError(f"{path}: cannot read: {e.strerror}") from None
    with fh:
        for lineno, line in enumerate(fh, 1):
            line = line.strip()
            if not line or line.startswith("#"):
                continue
            try:
                yield from_map(json.loads(line))
            except (ValueError, ProtocolError) as e:
                raise InputError(f"{path}:{lineno}: not a message map ({e})") from None


def _send(args) -> int:
    from ..geo import LocalFrame

    if not args.rate > 0:
        raise InputError(f"--rate must be positive, got {args.rate}")
    ep = _open(args.port, args)
    frame = LocalFrame(*DEMO_ORIGIN)
    source = None if args.demo else _read_jsonl(args.source)
    period = 1.0 / args.rate
    t0 = time.monotonic()
    i = 0
    try:
        while args.duration is None or time.monotonic() - t0 < args.duration:
            now = time.monotonic()
            due = t0 + i * period
            if now < due:
                ep.poll()                    # keeps reconnection going; replies are not printed
                time.sleep(min(0.002, due - now))
                continue
            if source is None:
                msg = demo_pose(i, args.rate, frame)
            else:
                msg = next(source, None)
                if msg is None:
                    break
            ep.send(msg)
            i += 1
    except KeyboardInterrupt:
        pass
    finally:
        flush = getattr(ep, "flush", None)
        if flush is not None:
            flush(1.0)
        print(f"tinyloc: sent {i} messages; {_counters_line(ep.counters)}", file=sys.stderr, flush=True)
        ep.close()
    return 0


def _pty(args) -> int:
    from ..link.ptypair import PtyPair

    pair = PtyPair(baud=args.baud if args.baud > 0 else None, link_dir=args.links)
    print(pair.end_a)
    print(pair.end_b, flush=True)
    pace = f"paced at {args.baud:.0f} baud" if args.baud > 0 else "unpaced"
    print(f"tinyloc: relaying between {pair.devices[0]} and {pair.devices[1]} ({pace}); Ctrl-C stops",
          file=sys.stderr, flush=True)
    t0 = time.monotonic()
    try:
        while args.duration is None or time.monotonic() - t0 < args.duration:
            time.sleep(0.05)
    except KeyboardInterrupt:
        pass
    finally:
        pair.close()
    return 0
