"""Long fuzz of the wire protocol: 10^6 corrupted frames through the streaming framer.

Each round sends one corrupted frame followed by one intact frame. Corruptions: 1 to 8
flipped bits, a burst of up to 64 changed bits, an inserted byte, a deleted byte, a
truncation, k random bytes overwritten, two frames spliced. Checks:

- nothing raises;
- no frame is accepted whose content differs from a frame that was sent;
- every intact frame after a damaged one is recovered;
- the CRC's share: of the damaged frames that reached the CRC check (COBS and length
  were intact), how many did the CRC reject, against the theoretical undetected rate of a
  32-bit CRC on random corruption (2^-32 per frame reaching the check).

usage: python benchmarks/fuzz_link.py [--frames 1000000] [--seed 1] [--json]
"""

from __future__ import annotations

import argparse
import json
import random
import sys
import time

from tinyloc.link import messages as m
from tinyloc.link.framer import Framer


def base_frames(rnd: random.Random, n: int = 256):
    out = []
    for i in range(n):
        k = i % 4
        if k == 0:
            msg = m.Pose(rnd.uniform(0, 1e4), rnd.uniform(-999, 999), rnd.uniform(-999, 999), rnd.uniform(-3, 3),
                         rnd.uniform(-80, 80), rnd.uniform(-179, 179),
                         ((rnd.random(), 0.0, 0.0), (0.0, rnd.random(), 0.0), (0.0, 0.0, rnd.random() * 0.1)),
                         rnd.choice(m.QUALITIES), rnd.choice(["ok", "", "few features"]), rnd.uniform(0, 50))
        elif k == 1:
            msg = m.Odometry(rnd.uniform(0, 1e4), rnd.uniform(-50, 50), rnd.uniform(-50, 50), rnd.uniform(-3, 3),
                             left_ticks=rnd.randrange(-2 ** 31, 2 ** 31), right_ticks=rnd.randrange(-99, 99))
        elif k == 2:
            msg = m.Imu(rnd.uniform(0, 1e4), rnd.gauss(0, 1), rnd.gauss(0, 1), rnd.gauss(9.81, 0.2))
        else:
            msg = m.Unknown(rnd.uniform(0, 1e4), 0x80 + rnd.randrange(0x7F),
                            bytes(rnd.randrange(256) for _ in range(rnd.randrange(0, m.MAX_PAYLOAD + 1))))
        out.append(m.encode_frame(msg, rnd.randrange(65536)))
    return out


def corrupt(rnd: random.Random, f: bytes, other: bytes) -> tuple[bytes, str]:
    b = bytearray(f)
    n = len(b)
    op = rnd.randrange(7)
    if op == 0:
        for _ in range(rnd.randint(1, 8)):
            i = rnd.randrange(1, n - 1)
            b[i] ^= 1 << rnd.randrange(8)
        return bytes(b), "flip"
    if op == 1:
        start = rnd.randrange(1, n - 1)
        for j in range(start, min(n - 1, start + rnd.randint(1, 8))):
            b[j] ^= rnd.randrange(1, 256)
        return bytes(b), "burst"
    if op == 2:
        b.insert(rnd.randrange(1, n - 1), rnd.randrange(256))
        return bytes(b), "insert"
    if op == 3:
        del b[rnd.randrange(1, n - 1)]
        return bytes(b), "delete"
    if op == 4:
        return bytes(b[:rnd.randrange(2, n - 1)]), "truncate"
    if op == 5:
        for _ in range(rnd.randint(2, 16)):
            b[rnd.randrange(1, n - 1)] = rnd.randrange(256)
        return bytes(b), "overwrite"
    cut = rnd.randrange(2, n - 1)
    return bytes(b[:cut]) + other[rnd.randrange(1, len(other) - 1):], "splice"


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--frames", type=int, default=1_000_000, help="corrupted frames (default 10^6)")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--json", action="store_true", help="print the summary as one JSON object")
    a = ap.parse_args(argv)
    rnd = random.Random(a.seed)
    frames = base_frames(rnd)
    fr = Framer(keep_unknown=True)
    c = fr.counters
    wrong = recovered = equal_after_damage = 0
    kinds = {}
    t0 = time.monotonic()
    last = t0
    for r in range(a.frames):
        f = frames[rnd.randrange(len(frames))]
        other = frames[rnd.randrange(len(frames))]
        bad, kind = corrupt(rnd, f, other)
        kinds[kind] = kinds.get(kind, 0) + 1
        good = frames[rnd.randrange(len(frames))]
        out = fr.feed(bad + good)
        got_good = False
        for msg in out:
            enc = m.encode_frame(msg)
            if enc == good and not got_good:
                recovered += 1
                got_good = True
            elif enc in (f, other):
                # the damage left the frame itself intact (e.g. a 0x00 inserted right after the
                # leading delimiter, or two flips of the same bit): accepted, and correct
                equal_after_damage += 1
            else:
                wrong += 1
        now = time.monotonic()
        if now - last > 5.0:
            print(f"fuzz: {r + 1}/{a.frames} frames, {wrong} wrong accepted, {(r + 1) / (now - t0):.0f} frames/s",
                  file=sys.stderr, flush=True)
            last = now
    dt = time.monotonic() - t0
    reached_crc = c.bad_crc + c.bad_version + wrong  # damaged frames whose COBS and length checks passed
    res = {
        "corrupted_frames": a.frames,
        "kinds": kinds,
        "wrong_payload_accepted": wrong,
        "intact_frames_recovered": recovered,
        "intact_frames_sent": a.frames,
        "damaged_but_identical_accepted": equal_after_damage,
        "rejected": {k: getattr(c, k) for k in ("bad_crc", "bad_cobs", "bad_length", "bad_version", "too_long")},
        "reached_crc_check": reached_crc,
        "expected_undetected_at_2^-32": reached_crc * 2.0 ** -32,
        "seconds": dt,
        "frames_per_s": 2 * a.frames / dt,
    }
    if a.json:
        print(json.dumps(res))
    else:
        for k, v in res.items():
            print(f"{k:32s} {v}")
    ok = wrong == 0 and recovered == a.frames
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
