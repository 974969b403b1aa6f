"""Run folders: the offline exchange format for recorded (or simulated) drives.

A run folder holds one drive: camera calibration, timestamped frames, IMU
gravity samples, wheel-odometry poses, GNSS fixes and optional ground truth, as
plain JSON / TOML / CSV / PNG or JPEG (the format is specified in
docs/run-folder.md and docs/interfaces.md)::

    RUN/run.json  camera.toml  frames.csv  frames/  imu.csv  odometry.csv  gnss.csv  [truth.csv]  [labels/]

Reading
-------
``rf = RunFolder.open(path)`` validates the whole folder and returns arrays:

- ``rf.frame_t`` (N,) float64 seconds and ``rf.frame_files`` (list of str, relative to the folder),
- ``rf.imu`` (M, 4) float64 ``t, fx, fy, fz`` (specific force in the FLU base frame, m/s^2),
- ``rf.odometry`` (M, 4) ``t, x, y, yaw`` (odom frame, m, m, rad CCW),
- ``rf.gnss`` (M, 5) ``t, lat, lon, h, acc_m`` (deg, deg, m, reported 1-sigma horizontal m),
- ``rf.truth`` (M, 6) ``t, lat, lon, yaw, x, y`` or ``None`` (x, y ENU metres at ``rf.frame``),
- ``rf.camera`` (:class:`~tinyloc.camera.model.CameraModel`), ``rf.meta`` (run.json dict),
  ``rf.frame`` (:class:`~tinyloc.geo.LocalFrame` of run.json's origin, or ``None``),
- ``rf.warnings``: list of one-line notes (``"imu.csv line 812: truncated last line ignored"``).

``rf.load_frame(i)`` decodes frame ``i`` (BGR uint8, H x W x 3; gray with
``color=False``); ``rf.load_label(i)`` the class-index image or ``None``.

With ``strict=True`` (the default) the first fault raises
:class:`~tinyloc.errors.RunFolderError` whose one-line message names the file
and the line. With ``strict=False`` bad rows (non-finite values, time going
backwards, a missing frame file) are dropped and listed in ``rf.warnings``;
only faults that leave nothing usable (no run.json, no camera, no frames.csv or
a header without the required columns) still raise. :func:`check_run` returns
every problem of a folder as a list of strings without raising on row faults.

A truncated last line (no newline at the end and not parseable) is always
tolerated and reported as a warning: it is what a recorder killed mid-write
leaves behind.

Writing
-------
:class:`RunWriter` streams a run to disk: ``run.json`` says ``"complete": false``
until :meth:`RunWriter.close` finishes it, so an interrupted conversion is
recognisable::

    with RunWriter(out, camera=cam, origin=(lat0, lon0, h0), name="drive-3", source="my-logger") as w:
        w.add_frame(t, image_bgr)
        w.add_imu(t, fx, fy, fz)
        w.add_odometry(t, x, y, yaw)
        w.add_gnss(t, lat, lon, h, acc_m)
        w.add_truth(t, lat, lon, yaw, x, y)
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .camera.model import CameraModel, camera_to_dict, load_camera
from .errors import CalibrationError, InputError, RunFolderError
from .geo import LocalFrame
from .tomlio import dumps_toml

FORMAT_NAME = "tinyloc-run"
FORMAT_VERSION = 1

# Decoder limits (checked before anything large is allocated or parsed).
MAX_JSON_BYTES = 1 << 20
MAX_LINE_CHARS = 4096
MAX_ROWS = 20_000_000
MAX_CSV_BYTES = 1 << 30
MAX_IMAGE_BYTES = 64 << 20

# name -> (required columns in array order, time must strictly increase, required file)
TABLES: dict[str, tuple[tuple[str, ...], bool, bool]] = {
    "imu": (("t", "fx", "fy", "fz"), False, False),
    "odometry": (("t", "x", "y", "yaw"), False, False),
    "gnss": (("t", "lat", "lon", "h", "acc_m"), False, False),
    "truth": (("t", "lat", "lon", "yaw", "x", "y"), False, False),
}
FRAME_COLUMNS = ("t", "file")


@dataclass
class _Table:
    data: np.ndarray  # (N, k) float64
    lines: np.ndarray  # (N,) int: 1-based line numbers in the CSV


class _Reader:
    """Collects faults: raises on the first one when strict, else records and goes on."""

    def __init__(self, root: Path, strict: bool):
        self.root = root
        self.strict = strict
        self.warnings: list[str] = []

    def fault(self, where: str, msg: str) -> None:
        text = f"{where}: {msg}"
        if self.strict:
            raise RunFolderError(f"{self.root}/{text}")
        self.warnings.append(text)

    def fatal(self, where: str, msg: str) -> RunFolderError:
        return RunFolderError(f"{self.root}/{where}: {msg}")

    def note(self, where: str, msg: str) -> None:
        self.warnings.append(f"{where}: {msg}")


def _read_lines(rd: _Reader, name: str) -> tuple[list[tuple[int, str]], bool] | None:
    """(line number, text) of the non-comment, non-blank lines; and whether the file ends with a newline.

    The flag is True also when the last physical line is not a data row (nothing can be truncated then).
    """
    p = rd.root / name
    if not p.is_file():
        return None
    try:
        if p.stat().st_size > MAX_CSV_BYTES:
            raise rd.fatal(name, f"larger than the reader's limit of {MAX_CSV_BYTES} bytes")
        raw = p.read_bytes()
    except OSError as e:
        raise rd.fatal(name, f"cannot read ({e.strerror or e})") from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as e:
        line = raw[: e.start].count(b"\n") + 1
        raise rd.fatal(f"{name} line {line}", "not UTF-8 text") from None
    ends_nl = text.endswith("\n")
    out = []
    lines = text.split("\n")
    if ends_nl:
        lines.pop()
    if len(lines) > MAX_ROWS + 1:
        raise rd.fatal(name, f"{len(lines)} lines is more than the reader's limit of {MAX_ROWS}")
    for i, ln in enumerate(lines, start=1):
        s = ln.strip()
        if not s or s.startswith("#"):
            continue
        out.append((i, s))
    if out and out[-1][0] != len(lines):
        ends_nl = True
    return out, ends_nl


def _header(rd: _Reader, name: str, rows, need: tuple[str, ...]) -> tuple[list[int], int]:
    if not rows:
        raise rd.fatal(name, "empty file (expected a header row: " + ",".join(need) + ")")
    line_no, text = rows[0]
    cols = [c.strip() for c in text.split(",")]
    idx = []
    for c in need:
        if c not in cols:
            raise rd.fatal(f"{name} line {line_no}", f"header has no column '{c}' (need {','.join(need)}; "
                                                     f"got {','.join(cols)})")
        idx.append(cols.index(c))
    return idx, len(cols)


def _is_last(rows, k: int, ends_nl: bool) -> bool:
    return k == len(rows) - 1 and not ends_nl


def _read_table(rd: _Reader, name: str, need: tuple[str, ...], strict_increase: bool,
                kind: str | None = None) -> _Table | None:
    got = _read_lines(rd, f"{name}.csv")
    if got is None:
        return None
    rows, ends_nl = got
    fname = f"{name}.csv"
    idx, ncols = _header(rd, fname, rows, need)
    data = np.empty((len(rows) - 1, len(need)), dtype=np.float64)
    lines = np.empty(len(rows) - 1, dtype=np.int64)
    n = 0
    last_t = -math.inf
    for k in range(1, len(rows)):
        line_no, text = rows[k]
        where = f"{fname} line {line_no}"
        if len(text) > MAX_LINE_CHARS:
            rd.fault(where, f"line longer than {MAX_LINE_CHARS} characters")
            continue
        parts = text.split(",")
        vals = None
        err = None
        if len(parts) < ncols:
            err = f"has {len(parts)} fields, header has {ncols}"
        else:
            try:
                vals = [float(parts[j]) for j in idx]
            except ValueError:
                bad = next(parts[j].strip() for j in idx if not _is_float(parts[j]))
                err = f"'{bad}' is not a number"
        if err is not None:
            if _is_last(rows, k, ends_nl):
                rd.note(where, f"truncated last line ignored ({err})")
            else:
                rd.fault(where, err)
            continue
        if not all(math.isfinite(v) for v in vals):
            rd.fault(where, "non-finite value (NaN or inf) in " +
                     ",".join(c for c, v in zip(need, vals) if not math.isfinite(v)))
            continue
        t = vals[0]
        if t < last_t or (strict_increase and t == last_t):
            rd.fault(where, f"time {t!r} s goes backwards (previous row {last_t!r} s); timestamps must be monotonic")
            continue
        bad = _range_fault(name if kind is None else kind, vals)
        if bad:
            rd.fault(where, bad)
            continue
        last_t = t
        data[n] = vals
        lines[n] = line_no
        n += 1
    return _Table(data[:n].copy(), lines[:n].copy())


def read_sensor_csv(path, columns: tuple[str, ...], *, cls: type[Exception] = RunFolderError) -> np.ndarray:
    """Rows of one sensor CSV in the run-folder format (header row, ``#`` comments, torn last line tolerated).

    Parameters
    ----------
    path : path-like
        A ``.csv`` file, e.g. a recording of ``imu.csv`` rows ``t,fx,fy,fz``.
    columns : tuple of str
        Columns to return, in this order (the first is the time, which must not go backwards).
    cls : exception class
        Raised (one line, naming the file and line) on a missing file or a bad row.

    Returns
    -------
    ndarray (N, len(columns)) float64
    """
    p = Path(path)
    if p.suffix != ".csv":
        raise cls(f"{p}: expected a .csv file")
    if not p.is_file():
        raise cls(f"{p}: no such file")
    try:
        # kind "sensor": the table's own columns decide, not a file name that happens to be gnss.csv
        table = _read_table(_Reader(p.parent, strict=True), p.stem, tuple(columns), strict_increase=False,
                            kind="sensor")
    except RunFolderError as e:
        raise cls(str(e)) from None
    return table.data


def _is_float(s: str) -> bool:
    try:
        float(s)
        return True
    except ValueError:
        return False


def _range_fault(name: str, v: list[float]) -> str | None:
    if name in ("gnss", "truth"):
        if abs(v[1]) > 90.0 or abs(v[2]) > 180.0:
            return f"latitude/longitude ({v[1]!r}, {v[2]!r}) out of range"
    if name == "gnss" and v[4] <= 0.0:
        return f"acc_m {v[4]!r} must be positive (the receiver's reported 1-sigma horizontal accuracy, m)"
    return None


def _read_frames(rd: _Reader) -> tuple[np.ndarray, list[str], np.ndarray]:
    got = _read_lines(rd, "frames.csv")
    if got is None:
        raise rd.fatal("frames.csv", "missing (every run folder lists its frames there: t,file)")
    rows, ends_nl = got
    idx, ncols = _header(rd, "frames.csv", rows, FRAME_COLUMNS)
    ts, files, lines = [], [], []
    last_t = -math.inf
    seen: set[str] = set()
    root_res = rd.root.resolve()
    for k in range(1, len(rows)):
        line_no, text = rows[k]
        where = f"frames.csv line {line_no}"
        parts = [p.strip() for p in text.split(",")]
        if len(parts) < ncols or not parts[idx[1]]:
            err = f"has {len(parts)} fields, header has {ncols}"
            if _is_last(rows, k, ends_nl):
                rd.note(where, f"truncated last line ignored ({err})")
            else:
                rd.fault(where, err)
            continue
        try:
            t = float(parts[idx[0]])
        except ValueError:
            if _is_last(rows, k, ends_nl):
                rd.note(where, f"truncated last line ignored ('{parts[idx[0]]}' is not a number)")
            else:
                rd.fault(where, f"'{parts[idx[0]]}' is not a number")
            continue
        f = parts[idx[1]]
        if not math.isfinite(t):
            rd.fault(where, "non-finite time")
            continue
        if t <= last_t:
            rd.fault(where, f"time {t!r} s does not increase (previous frame {last_t!r} s); "
                            "frame timestamps must be strictly increasing")
            continue
        fp = (rd.root / f)
        try:
            inside = fp.resolve().is_relative_to(root_res)
        except OSError:
            inside = False
        if Path(f).is_absolute() or not inside:
            rd.fault(where, f"file '{f}' is outside the run folder (paths are relative to it)")
            continue
        if f in seen:
            rd.fault(where, f"file '{f}' is listed twice")
            continue
        if not fp.is_file():
            if _is_last(rows, k, ends_nl):
                rd.note(where, f"truncated last line ignored (file '{f}' not found)")
            else:
                rd.fault(where, f"frame file '{f}' is missing")
            continue
        seen.add(f)
        last_t = t
        ts.append(t)
        files.append(f)
        lines.append(line_no)
    return np.asarray(ts, dtype=np.float64), files, np.asarray(lines, dtype=np.int64)


def _read_meta(rd: _Reader) -> dict:
    p = rd.root / "run.json"
    if not rd.root.is_dir():
        raise RunFolderError(f"{rd.root}: not a directory (expected a run folder)")
    if not p.is_file():
        raise rd.fatal("run.json", "missing (is this a run folder? see docs/run-folder.md)")
    if p.stat().st_size > MAX_JSON_BYTES:
        raise rd.fatal("run.json", f"larger than {MAX_JSON_BYTES} bytes")
    try:
        meta = json.loads(p.read_text(encoding="utf-8"))
    except UnicodeDecodeError:
        raise rd.fatal("run.json", "not UTF-8 text") from None
    except json.JSONDecodeError as e:
        raise rd.fatal(f"run.json line {e.lineno}", f"JSON syntax error: {e.msg}") from None
    if not isinstance(meta, dict):
        raise rd.fatal("run.json line 1", "must hold a JSON object")
    if meta.get("format") != FORMAT_NAME:
        raise rd.fatal("run.json", f"format is {meta.get('format')!r}, expected {FORMAT_NAME!r}")
    ver = meta.get("version")
    if not isinstance(ver, int) or isinstance(ver, bool) or ver < 1:
        raise rd.fatal("run.json", f"version must be a positive integer, got {ver!r}")
    if ver > FORMAT_VERSION:
        raise rd.fatal("run.json", f"version {ver} is newer than this tinyloc reads ({FORMAT_VERSION})")
    return meta


def _origin(rd: _Reader, meta: dict) -> LocalFrame | None:
    o = meta.get("origin")
    if o is None:
        return None
    try:
        vals = [o[k] for k in ("lat", "lon")] + [o.get("h", 0.0)]
        if not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in vals):
            raise TypeError
        return LocalFrame(float(vals[0]), float(vals[1]), float(vals[2]))
    except (TypeError, KeyError, AttributeError):
        raise rd.fatal("run.json", f"origin must be {{\"lat\": deg, \"lon\": deg, \"h\": m}}, got {o!r}") from None
    except InputError as e:
        raise rd.fatal("run.json", f"origin: {e}") from None


def _empty(k: int) -> np.ndarray:
    return np.zeros((0, k), dtype=np.float64)


class RunFolder:
    """A validated run folder: metadata, calibration, sensor arrays and frame access.

    Build with :meth:`RunFolder.open`. Attributes are documented in the module docstring.
    """

    def __init__(self, root: Path, meta: dict, camera: CameraModel, frame: LocalFrame | None,
                 frame_t: np.ndarray, frame_files: list[str], frame_lines: np.ndarray,
                 tables: dict[str, _Table | None], warnings: list[str]):
        self.path = root
        self.meta = meta
        self.camera = camera
        self.frame = frame
        self.frame_t = frame_t
        self.frame_files = frame_files
        self._frame_lines = frame_lines
        t = {k: (v.data if v is not None else None) for k, v in tables.items()}
        self.imu = t["imu"] if t["imu"] is not None else _empty(4)
        self.odometry = t["odometry"] if t["odometry"] is not None else _empty(4)
        self.gnss = t["gnss"] if t["gnss"] is not None else _empty(5)
        self.truth = t["truth"]
        self.warnings = warnings
        self.has_labels = (root / "labels").is_dir()

    @classmethod
    def open(cls, path, *, strict: bool = True) -> "RunFolder":
        """Read and validate the run folder at ``path``.

        Parameters
        ----------
        path : str or Path
            The run folder.
        strict : bool
            Raise on the first faulty row (default). If False, drop faulty rows and
            list them in ``warnings``.

        Raises
        ------
        RunFolderError
            One line naming the file (and line) and the fault.
        """
        root = Path(path)
        rd = _Reader(root, strict)
        meta = _read_meta(rd)
        frame = _origin(rd, meta)
        if meta.get("complete") is False:
            rd.note("run.json", "\"complete\": false - the writer or import did not finish; data may stop early")
        cam_path = root / "camera.toml"
        if not cam_path.is_file():
            raise rd.fatal("camera.toml", "missing (the camera calibration, see docs/camera.md)")
        try:
            camera = load_camera(cam_path)
        except CalibrationError as e:
            raise RunFolderError(str(e)) from None
        frame_t, files, lines = _read_frames(rd)
        tables = {}
        for name, (cols, inc, _req) in TABLES.items():
            tables[name] = _read_table(rd, name, cols, inc)
            if tables[name] is None and name != "truth":
                rd.note(f"{name}.csv", "absent (the run has no such samples)")
        if tables["truth"] is not None and frame is None:
            raise rd.fatal("run.json", "truth.csv is present but run.json has no origin for its x/y")
        return cls(root, meta, camera, frame, frame_t, files, lines, tables, rd.warnings)

    def __len__(self) -> int:
        return len(self.frame_files)

    @property
    def name(self) -> str:
        """The run's name from run.json (or the folder name)."""
        return str(self.meta.get("name") or self.path.name)

    def _decode(self, rel: str, flags: int, where: str) -> np.ndarray:
        import cv2

        p = self.path / rel
        try:
            size = p.stat().st_size
            if size > MAX_IMAGE_BYTES:
                raise RunFolderError(f"{p}: image larger than {MAX_IMAGE_BYTES} bytes ({where})")
            buf = np.fromfile(p, dtype=np.uint8)
        except OSError as e:
            raise RunFolderError(f"{p}: cannot read ({e.strerror or e}; {where})") from None
        img = cv2.imdecode(buf, flags) if buf.size else None
        if img is None:
            raise RunFolderError(f"{p}: cannot decode image ({where})")
        if img.dtype != np.uint8:
            raise RunFolderError(f"{p}: {img.dtype} image; frames must be 8-bit ({where})")
        if img.shape[0] != self.camera.height or img.shape[1] != self.camera.width:
            raise RunFolderError(f"{p}: image is {img.shape[1]}x{img.shape[0]}, camera.toml says "
                                 f"{self.camera.width}x{self.camera.height} ({where})")
        return img

    def load_frame(self, i: int, *, color: bool = True) -> np.ndarray:
        """Decode frame ``i``: BGR uint8 (H, W, 3), or gray (H, W) with ``color=False``.

        Raises
        ------
        RunFolderError
            If the file cannot be read or decoded, or its size disagrees with camera.toml.
        IndexError
            If ``i`` is out of range.
        """
        import cv2

        rel = self.frame_files[i]
        flags = cv2.IMREAD_COLOR if color else cv2.IMREAD_GRAYSCALE
        return self._decode(rel, flags, f"frames.csv line {self._frame_lines[i]}")

    def load_label(self, i: int) -> np.ndarray | None:
        """Class-index image (uint8 H x W, 255 = unlabelled) of frame ``i``, or None if there is none."""
        import cv2

        if not self.has_labels:
            return None
        rel = "labels/" + Path(self.frame_files[i]).with_suffix(".png").name
        if not (self.path / rel).is_file():
            return None
        return self._decode(rel, cv2.IMREAD_UNCHANGED, f"label of frames.csv line {self._frame_lines[i]}")


def check_run(path) -> list[str]:
    """Every problem found in the run folder at ``path`` (empty if none), one line each.

    Faults that stop reading (no run.json, no camera, bad header) come back as the only entry.
    """
    try:
        rf = RunFolder.open(path, strict=False)
    except RunFolderError as e:
        return [str(e)]
    return list(rf.warnings)


def _cut_torn_line(p: Path) -> None:
    """Cut a CSV after its last newline (a row without one was being written when the writer died)."""
    if not p.is_file():
        return
    size = p.stat().st_size
    with open(p, "rb+") as fh:
        back = min(size, MAX_LINE_CHARS + 1)
        fh.seek(size - back)
        tail = fh.read(back)
        k = tail.rfind(b"\n")
        keep = size - back + k + 1 if k >= 0 else (0 if size <= MAX_LINE_CHARS else size)
        if keep != size:
            fh.truncate(keep)


def _drop_bad_last_frame(root: Path) -> int:
    """Drop the last frames.csv row if its file is missing or does not decode; the number of rows left."""
    import cv2

    p = root / "frames.csv"
    if not p.is_file():
        return 0
    raw = p.read_bytes()
    lines = raw.split(b"\n")[:-1] if raw.endswith(b"\n") else raw.split(b"\n")
    data = [k for k, ln in enumerate(lines) if ln.strip() and not ln.lstrip().startswith(b"#")][1:]
    if not data:
        return 0
    last = lines[data[-1]].decode("utf-8", "replace").split(",")
    f = root / last[-1].strip() if len(last) >= 2 else None
    ok = False
    if f is not None and f.is_file() and 0 < f.stat().st_size <= MAX_IMAGE_BYTES:
        ok = cv2.imdecode(np.fromfile(f, dtype=np.uint8), cv2.IMREAD_UNCHANGED) is not None
    if ok:
        return len(data)
    with open(p, "rb+") as fh:
        fh.truncate(sum(len(ln) + 1 for ln in lines[: data[-1]]))
    return len(data) - 1


def _fmt(v: float) -> str:
    # repr() is the shortest text that reads back to the identical float.
    return repr(float(v))


class RunWriter:
    """Write a run folder, streaming rows to the CSV files.

    Parameters
    ----------
    path : str or Path
        The folder to create (must not exist, or be empty, unless ``overwrite``).
    camera : CameraModel
        Written to camera.toml.
    origin : (lat_deg, lon_deg, h_m)
        ENU origin of truth.csv's x/y (usually the map's origin).
    name, source : str
        Free text stored in run.json.
    extra : dict, optional
        More run.json keys (must be JSON-serialisable).
    image_ext : {".png", ".jpg"}
        Frame file type; ``jpeg_quality`` applies to ".jpg".
    """

    def __init__(self, path, *, camera: CameraModel, origin=None, name: str = "", source: str = "",
                 extra: dict | None = None, image_ext: str = ".png", jpeg_quality: int = 90,
                 overwrite: bool = False):
        self.path = Path(path)
        if image_ext not in (".png", ".jpg"):
            raise InputError(f"image_ext must be '.png' or '.jpg', got {image_ext!r}")
        if self.path.exists() and not self.path.is_dir():
            raise InputError(f"{self.path}: exists and is not a directory")
        if self.path.is_dir() and any(self.path.iterdir()) and not overwrite:
            raise InputError(f"{self.path}: folder is not empty (choose a new output folder)")
        self.camera = camera
        self.image_ext = image_ext
        self.jpeg_quality = int(jpeg_quality)
        self._meta = {"format": FORMAT_NAME, "version": FORMAT_VERSION, "name": name or self.path.name,
                      "complete": False, "source": source}
        if origin is not None:
            lat, lon, h = (list(origin) + [0.0])[:3]
            LocalFrame(float(lat), float(lon), float(h))  # validates
            self._meta["origin"] = {"lat": float(lat), "lon": float(lon), "h": float(h)}
        if extra:
            self._meta.update(extra)
        (self.path / "frames").mkdir(parents=True, exist_ok=True)
        self._write_meta()
        (self.path / "camera.toml").write_text(
            dumps_toml(camera_to_dict(camera), header="tinyloc camera calibration (docs/camera.md)"),
            encoding="utf-8")
        self._files = {}
        self._open("frames", FRAME_COLUMNS)
        self._n_frames = 0
        self._last_frame_t = -math.inf
        self.last_t: dict[str, float] = {}
        self._closed = False

    @classmethod
    def resume(cls, path, *, image_ext: str | None = None, jpeg_quality: int = 90) -> "RunWriter":
        """Reopen an incomplete run folder for appending (append mode).

        A torn last CSV line (no newline: the writer was killed mid-row) is cut off; a last
        frame whose file is missing or does not decode loses its ``frames.csv`` row; frame files
        not listed in ``frames.csv`` are deleted. What is left is then read back with
        ``RunFolder.open(strict=False)``; any other fault refuses the resume.

        Parameters
        ----------
        path : str or Path
            The run folder; its run.json must say ``"complete": false``.
        image_ext : {".png", ".jpg"} or None
            Type of frames written by :meth:`add_frame`; None keeps the last frame's type (else PNG).
        jpeg_quality : int
            As in the constructor.

        Returns
        -------
        RunWriter
            Writing after what the folder holds: ``len(writer)`` frames so far, ``writer.last_t``
            the time (s) of the last row of each CSV (name without ``.csv``, ``"frames"`` included).

        Raises
        ------
        InputError
            Not a run folder, already complete, or holding rows the reader rejects (one line).
        """
        self = cls.__new__(cls)
        self.path = Path(path)
        p, meta = read_meta_to_resume(self.path, " (not a run folder; nothing to resume)")
        if meta.get("complete") is not False:
            raise InputError(f"{self.path}: run.json says the run is complete; nothing to resume")
        self._meta = meta
        for name in ("frames",) + tuple(TABLES):
            csv = self.path / f"{name}.csv"
            _cut_torn_line(csv)
            if csv.is_file() and csv.stat().st_size == 0:  # died before the header reached the disk
                csv.write_text(",".join(FRAME_COLUMNS if name == "frames" else TABLES[name][0]) + "\n",
                               encoding="utf-8")
        n_rows = _drop_bad_last_frame(self.path)
        try:
            rf = RunFolder.open(self.path, strict=False)
        except RunFolderError as e:
            raise InputError(f"cannot resume: {e}") from None
        faults = [w for w in rf.warnings
                  if not (w.startswith("run.json:") or w.endswith("(the run has no such samples)"))]
        if faults or len(rf) != n_rows:
            why = faults[0] if faults else f"frames.csv lists {n_rows} frames, {len(rf)} are readable"
            raise InputError(f"cannot resume {self.path}: {why}")
        self.camera = rf.camera
        if image_ext is None:
            image_ext = Path(rf.frame_files[-1]).suffix if rf.frame_files else ".png"
            image_ext = ".jpg" if image_ext in (".jpg", ".jpeg") else ".png"
        if image_ext not in (".png", ".jpg"):
            raise InputError(f"image_ext must be '.png' or '.jpg', got {image_ext!r}")
        self.image_ext = image_ext
        self.jpeg_quality = int(jpeg_quality)
        self._n_frames = len(rf)
        self._last_frame_t = float(rf.frame_t[-1]) if len(rf) else -math.inf
        self.last_t = {"frames": self._last_frame_t} if len(rf) else {}
        for name in TABLES:
            arr = rf.truth if name == "truth" else getattr(rf, name)
            if arr is not None and len(arr):
                self.last_t[name] = float(arr[-1, 0])
        listed = set(rf.frame_files)
        for f in (self.path / "frames").iterdir() if (self.path / "frames").is_dir() else ():
            if f"frames/{f.name}" not in listed and f.is_file():
                f.unlink()  # a frame written before its row, or after a dropped row: rewritten on the way
        (self.path / "frames").mkdir(exist_ok=True)
        self._files = {}
        for name in ("frames",) + tuple(TABLES):
            if (self.path / f"{name}.csv").is_file():
                self._open(name, FRAME_COLUMNS if name == "frames" else TABLES[name][0], append=True)
        if "frames" not in self._files:
            self._open("frames", FRAME_COLUMNS)
        self._closed = False
        return self

    def __len__(self) -> int:
        return self._n_frames

    def _write_meta(self):
        p = self.path / "run.json"
        tmp = p.with_name("run.json.tmp")
        tmp.write_text(json.dumps(self._meta, indent=2) + "\n", encoding="utf-8")
        tmp.replace(p)

    def _open(self, name: str, cols, append: bool = False):
        p = self.path / f"{name}.csv"
        f = open(p, "a" if append else "w", encoding="utf-8", newline="\n")
        if not append or p.stat().st_size == 0:
            f.write(",".join(cols) + "\n")
        self._files[name] = f
        return f

    def _row(self, name: str, vals):
        f = self._files.get(name) or self._open(name, TABLES[name][0])
        f.write(",".join(_fmt(v) for v in vals) + "\n")
        self.last_t[name] = float(vals[0])

    def add_frame(self, t: float, image: np.ndarray, *, label: np.ndarray | None = None) -> str:
        """Write one frame (BGR or gray uint8) and optionally its class-index label; returns its file name."""
        import cv2

        if self._closed:
            raise InputError("RunWriter is closed")
        t = float(t)
        if not t > self._last_frame_t:
            raise InputError(f"frame time {t!r} s does not increase (previous {self._last_frame_t!r} s)")
        if image.dtype != np.uint8 or image.shape[:2] != (self.camera.height, self.camera.width):
            raise InputError(f"frame must be uint8 {self.camera.height}x{self.camera.width}, "
                             f"got {image.dtype} {image.shape}")
        rel = f"frames/{self._n_frames:06d}{self.image_ext}"
        # PNG: zlib level 1, Huffman only: camera noise defeats LZ77 matching, so this is faster and smaller
        params = [cv2.IMWRITE_JPEG_QUALITY, self.jpeg_quality] if self.image_ext == ".jpg" else \
            [cv2.IMWRITE_PNG_COMPRESSION, 1, cv2.IMWRITE_PNG_STRATEGY, cv2.IMWRITE_PNG_STRATEGY_HUFFMAN_ONLY]
        ok, buf = cv2.imencode(self.image_ext, image, params)
        if not ok:
            raise InputError(f"{self.path / rel}: image encoder failed")
        buf.tofile(self.path / rel)
        if label is not None:
            (self.path / "labels").mkdir(exist_ok=True)
            ok, lb = cv2.imencode(".png", np.ascontiguousarray(label, dtype=np.uint8))
            lb.tofile(self.path / "labels" / f"{self._n_frames:06d}.png")
        self._frame_row(t, rel)
        return rel

    def add_frame_bytes(self, t: float, data: bytes, ext: str) -> str:
        """Write one already-encoded frame (PNG or JPEG bytes, stored unchanged); returns its file name.

        Parameters
        ----------
        t : float
            Frame time (s); must increase from frame to frame.
        data : bytes
            The encoded image; it is not decoded here (the reader checks it when loading).
        ext : {".png", ".jpg"}
            File extension matching the bytes.
        """
        if self._closed:
            raise InputError("RunWriter is closed")
        if ext not in (".png", ".jpg"):
            raise InputError(f"frame extension must be '.png' or '.jpg', got {ext!r}")
        t = float(t)
        if not t > self._last_frame_t:
            raise InputError(f"frame time {t!r} s does not increase (previous {self._last_frame_t!r} s)")
        rel = f"frames/{self._n_frames:06d}{ext}"
        (self.path / rel).write_bytes(data)
        self._frame_row(t, rel)
        return rel

    def _frame_row(self, t: float, rel: str) -> None:
        # The file is whole before its row is written: a row never names a frame still being written.
        self._files["frames"].write(f"{_fmt(t)},{rel}\n")
        self._n_frames += 1
        self._last_frame_t = t
        self.last_t["frames"] = t

    def add_imu(self, t, fx, fy, fz):
        """Accelerometer specific force in the FLU base frame (m/s^2); level at rest reads (0, 0, +9.81)."""
        self._row("imu", (t, fx, fy, fz))

    def add_odometry(self, t, x, y, yaw):
        """Wheel-odometry pose in its own odom frame (m, m, rad CCW)."""
        self._row("odometry", (t, x, y, yaw))

    def add_gnss(self, t, lat, lon, h, acc_m):
        """A GNSS fix (deg, deg, m) and the receiver's reported 1-sigma horizontal accuracy (m)."""
        self._row("gnss", (t, lat, lon, h, acc_m))

    def add_truth(self, t, lat, lon, yaw, x, y):
        """Ground-truth pose: lat/lon (deg), yaw (rad ENU), x/y (ENU m at the run's origin)."""
        self._row("truth", (t, lat, lon, yaw, x, y))

    def close(self, *, complete: bool = True) -> None:
        """Flush and close the CSV files; mark run.json complete (unless ``complete=False``)."""
        if self._closed:
            return
        for f in self._files.values():
            f.close()
        self._closed = True
        self._meta["complete"] = bool(complete)
        self._meta["frames"] = self._n_frames
        self._write_meta()

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        self.close(complete=exc_type is None)
        return False


class RowSlicer:
    """Rows of a time-sorted table (time in column 0) in (t_prev, t], as views (no copies).

    Successive :meth:`upto` calls hand out consecutive slices; ``k`` is the column count of the
    empty table used when ``table`` is None or empty.
    """

    def __init__(self, table: np.ndarray | None, k: int = 0):
        self.table = table if table is not None and len(table) else np.zeros((0, k))
        self.ts = np.ascontiguousarray(self.table[:, 0]) if len(self.table) else np.zeros(0)
        self.pos = 0

    def upto(self, t: float) -> np.ndarray:
        start = self.pos
        stop = max(start, int(np.searchsorted(self.ts, t, side="right")))
        self.pos = stop
        return self.table[start:stop]


def read_meta_to_resume(folder: Path, missing: str) -> tuple[Path, dict]:
    """(path, parsed run.json) of a run folder that is to be resumed; one-line InputError otherwise.

    ``missing`` ends the message when there is no run.json ("<folder>: no run.json" + missing).
    """
    p = Path(folder) / "run.json"
    if not p.is_file():
        raise InputError(f"{folder}: no run.json{missing}")
    try:
        meta = json.loads(p.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as e:
        raise InputError(f"{p}: unreadable ({e}); cannot resume") from None
    if not isinstance(meta, dict) or meta.get("format") != FORMAT_NAME:
        raise InputError(f"{p}: not a tinyloc run folder; cannot resume")
    return p, meta
