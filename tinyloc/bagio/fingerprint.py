"""What a resumed import must match: the bag it read and the options it ran with.

An import stores both in run.json (``"import"``: ``"bag_fingerprint"``, ``"options"``) when it starts;
``--resume`` refuses a folder whose bag or options differ, so a run folder never mixes two sources.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
from pathlib import Path

# Bytes hashed at each end of every bag file: enough to tell recordings apart (headers, first chunk,
# summary/footer) without reading a multi-gigabyte file.
EDGE_BYTES = 1 << 16

# Options that do not change what is written (so a resume may differ in them).
NOT_FINGERPRINTED = ("progress", "workers")


def bag_fingerprint(path) -> dict:
    """Size, modification time (ns) and a SHA-256 of the first and last 64 KiB of every bag file.

    ``path`` is a bag file, or a ROS 2 bag folder (its regular files, sorted by name).
    """
    p = Path(path)
    # sqlite3's -wal/-shm/-journal side files come and go while a reader has the database open.
    files = [p] if p.is_file() else sorted(f for f in p.iterdir() if f.is_file() and not
                                           f.name.endswith(("-wal", "-shm", "-journal")))
    h = hashlib.sha256()
    listing = []
    for f in files:
        st = f.stat()
        listing.append([f.name, st.st_size, st.st_mtime_ns])
        with open(f, "rb") as fh:
            h.update(fh.read(EDGE_BYTES))
            if st.st_size > EDGE_BYTES:
                fh.seek(max(EDGE_BYTES, st.st_size - EDGE_BYTES))
                h.update(fh.read(EDGE_BYTES))
    return {"files": listing, "sha256": h.hexdigest()}


def options_record(opts) -> dict:
    """The import options that shape the output, as plain JSON values (the calibration file by content)."""
    out = {}
    for f in dataclasses.fields(opts):
        if f.name in NOT_FINGERPRINTED:
            continue
        v = getattr(opts, f.name)
        if dataclasses.is_dataclass(v):
            v = dataclasses.asdict(v)
        elif f.name == "camera_file" and v is not None:
            cf = Path(v)  # by content: the same file under another path is the same option
            v = "sha256:" + hashlib.sha256(cf.read_bytes()).hexdigest() if cf.is_file() else str(v)
        out[f.name] = v
    return json.loads(json.dumps(out))  # tuples -> lists, as read back from run.json


def differing(a: dict, b: dict) -> list[str]:
    """Keys whose values differ between two option records."""
    return sorted(k for k in set(a) | set(b) if a.get(k) != b.get(k))
