"""The live loop's configuration: frozen dataclasses, a TOML file, and ``--set`` overrides.

Every value has a documented default (the dataclass field), may be set in a TOML
file (``[loop]``, ``[match]``, ``[track]``, ``[track.gnss]`` tables) and overridden on
the command line as ``--set SECTION.KEY=VALUE`` (e.g. ``--set track.floor=1e-3``).
Unknown sections or keys and values of the wrong type are refused with a one-line
message naming the file (or ``--set``) and the key.
"""

from __future__ import annotations

from dataclasses import dataclass, field, fields, is_dataclass, replace
import math
import tomllib

from ..errors import InputError
from ..tomlio import read_toml
from ..track.gnss_prior import GnssParams
from ..track.gridfilter import TrackParams


@dataclass(frozen=True)
class MatchParams:
    """How frames are matched against the map (the correlator's part of the loop).

    Parameters
    ----------
    headings : int
        Heading steps of the full search over the circle [256].
    search_window_cells : int
        Side of the square map window of a global search, cells [256; 128 m at 0.5 m].
    track_radius_m : float
        Half-size of the tracking-mode search box around the estimate (m) [10.0].
    track_heading_deg : float
        Half-range of headings searched in tracking mode (deg) [20.0].
    min_visible_cells : int
        A bird's-eye grid with fewer visible cells is not matched (the frame is unusable) [50].
    track_exact : bool
        Tracking-mode likelihood at full resolution (True) or from the correlator's half-resolution
        coarse-to-fine pass (False, faster) [True].
    """

    headings: int = 256
    search_window_cells: int = 256
    track_radius_m: float = 10.0
    track_heading_deg: float = 20.0
    min_visible_cells: int = 50
    track_exact: bool = True


@dataclass(frozen=True)
class LoopParams:
    """Timing, health and sensor-freshness settings of the loop.

    Parameters
    ----------
    realtime : bool
        Replay a recorded source at its own pace (True) or as fast as possible (False) [False].
    late_ms : float
        In real-time mode a frame that would start later than this after its due time is dropped
        (not queued) and counted [100.0].
    watchdog_ms : float
        A frame whose processing takes longer than this is counted as overrun and said in the
        status [250.0].
    odometry_timeout_s : float
        With no odometry row for this long the motion is unknown (the filter diffuses) [0.5].
    imu_timeout_s : float
        With no usable gravity sample for this long the fixed mount is assumed [1.0].
    status_every_s : float
        Period of the status messages sent to sinks that take them (s) [1.0].
    warmup : bool
        Compile and run every kernel once at start-up so the first frame is on time [True].
    external_labels : bool
        Take each frame's class labels from another segmenter (a run folder's ``labels/``, class
        indices of tinyloc's table, 255 = unlabelled) instead of tinyloc's own segmenter [False].
    segment_preset : str
        tinyloc's segmenter parameter set (docs/perception.md): "sidewalk" for a robot driving on
        footways, "street" for one on the carriageway, "park" for paths through green ["sidewalk"].
    map_cache_mb : float
        Bound of the packed map's decoded-tile cache when the loop opens the map (MB). The loop
        keeps its own map window and re-reads it only when it moves, so a few windows' worth of
        tiles is enough; the map reader's general default (32 MB) would let resident memory
        creep up by that much on a large site [4.0; 9 classes x 128 x 128 cells = 0.15 MB a tile].
    gravity_window_s : float
        Gravity for levelling is the mean accelerometer reading over this many seconds; 0 takes the
        rows since the previous frame (docs/tracking.md, "Gravity and range") [0.4].
    gravity_motion_comp : bool
        Take the robot's own acceleration (wheel odometry: change of speed, and speed x turn rate)
        out of the accelerometer reading before levelling [True].
    accel_bias_x, accel_bias_y, accel_bias_z : float
        Accelerometer bias (m/s^2, base frame: forward, left, up) subtracted from every IMU row; from
        a calibration at rest (``tinyloc.perception.gravity.accel_bias_two_position``). A bias b tilts
        the levelling by b / g [0.0].
    bev_range_m : float
        Ground and objects further than this from the robot are left out of the bird's-eye grid the
        loop matches; 0 keeps the projector's own limit. A tilt error d (rad) moves ground seen at
        range r by about r^2 d / camera height (docs/tracking.md, "Gravity and range") [13.5].
    search_full_range : bool
        Project as far as the projector can and cut the grid at ``bev_range_m`` only for the
        tracking-mode match, so global searches still see the far field [False].
    building_taper_m : float
        Weigh the building evidence of the tracking-mode match by 1 / (1 + (r / building_taper_m)^4), r a
        cell's distance from the robot (m): a facade foot found a pixel off moves by r^2 / focal x height,
        and on a tuning drive far facades pulled the heading 2.5 deg off (docs/tracking.md, "Building
        taper"). 0 leaves it off [0.0].
    """

    realtime: bool = False
    late_ms: float = 100.0
    watchdog_ms: float = 250.0
    odometry_timeout_s: float = 0.5
    imu_timeout_s: float = 1.0
    status_every_s: float = 1.0
    warmup: bool = True
    external_labels: bool = False
    segment_preset: str = "sidewalk"
    map_cache_mb: float = 4.0
    gravity_window_s: float = 0.4
    gravity_motion_comp: bool = True
    accel_bias_x: float = 0.0
    accel_bias_y: float = 0.0
    accel_bias_z: float = 0.0
    bev_range_m: float = 13.5
    search_full_range: bool = False
    building_taper_m: float = 0.0

    def __post_init__(self):
        from ..perception.segment import PRESETS

        if self.segment_preset not in PRESETS:
            raise InputError(f"loop.segment_preset: unknown preset {self.segment_preset!r}; "
                             f"known: {', '.join(PRESETS)}")
        if not 0.0 <= self.map_cache_mb <= 4096.0:
            raise InputError(f"loop.map_cache_mb = {self.map_cache_mb}: must be within 0 .. 4096 MB")
        if not 0.0 <= self.gravity_window_s <= 5.0:
            raise InputError(f"loop.gravity_window_s = {self.gravity_window_s}: must be within 0 .. 5 s")
        if not (0.0 <= self.bev_range_m <= 1000.0):
            raise InputError(f"loop.bev_range_m = {self.bev_range_m}: must be within 0 .. 1000 m (0: the projector's)")
        if not (0.0 <= self.building_taper_m <= 1000.0):
            raise InputError(f"loop.building_taper_m = {self.building_taper_m}: must be within 0 .. 1000 m (0: off)")


@dataclass(frozen=True)
class LoopConfig:
    """All of the live loop's settings."""

    loop: LoopParams = field(default_factory=LoopParams)
    match: MatchParams = field(default_factory=MatchParams)
    track: TrackParams = field(default_factory=TrackParams)


def _coerce(value, default, where: str):
    """Convert a TOML or command-line value to the type of the field's default."""
    if isinstance(default, bool):
        if isinstance(value, bool):
            return value
        if isinstance(value, str) and value.lower() in ("true", "false", "1", "0", "yes", "no"):
            return value.lower() in ("true", "1", "yes")
        raise InputError(f"{where}: expected true or false, got {value!r}")
    if isinstance(default, int):
        if isinstance(value, bool):
            raise InputError(f"{where}: expected an integer, got {value!r}")
        if isinstance(value, int):
            return value
        if isinstance(value, str):
            try:
                return int(value)
            except ValueError:
                pass
        raise InputError(f"{where}: expected an integer, got {value!r}")
    if isinstance(default, float):
        if isinstance(value, bool):
            raise InputError(f"{where}: expected a number, got {value!r}")
        try:
            v = float(value)
        except (TypeError, ValueError):
            raise InputError(f"{where}: expected a number, got {value!r}") from None
        if not math.isfinite(v):
            raise InputError(f"{where}: expected a finite number, got {value!r}")
        return v
    if isinstance(default, str):
        return str(value)
    raise InputError(f"{where}: cannot set this value")


def _apply(obj, table: dict, where: str, prefix: str = ""):
    """A copy of dataclass ``obj`` with the (possibly nested) values of ``table`` applied."""
    names = {f.name: f for f in fields(obj)}
    changes = {}
    for k, v in table.items():
        if k not in names:
            raise InputError(f"{where}: unknown key '{prefix}{k}' (known in {prefix.rstrip('.') or 'the top level'}: "
                             f"{', '.join(sorted(names))})")
        cur = getattr(obj, k)
        if is_dataclass(cur):
            if not isinstance(v, dict):
                raise InputError(f"{where}: '{prefix}{k}' must be a table")
            changes[k] = _apply(cur, v, where, f"{prefix}{k}.")
        else:
            changes[k] = _coerce(v, cur, f"{where}: '{prefix}{k}'")
    try:
        return replace(obj, **changes)
    except InputError as e:
        raise InputError(f"{where}: {e}") from None


def config_from_dict(doc: dict, where: str = "config") -> LoopConfig:
    """Build a :class:`LoopConfig` from a parsed TOML document."""
    return _apply(LoopConfig(), doc, where)


def load_config(path=None, overrides: list[str] | tuple[str, ...] = ()) -> LoopConfig:
    """Read a TOML config file (optional) and apply ``SECTION.KEY=VALUE`` overrides in order."""
    cfg = LoopConfig()
    if path is not None:
        cfg = _apply(cfg, read_toml(path), str(path))
    for item in overrides:
        cfg = apply_override(cfg, item)
    return cfg


def apply_override(cfg: LoopConfig, item: str) -> LoopConfig:
    """Apply one ``SECTION.KEY=VALUE`` (TOML syntax accepted for the value) to ``cfg``."""
    key, sep, text = str(item).partition("=")
    key = key.strip()
    if not sep or not key:
        raise InputError(f"--set {item!r}: expected SECTION.KEY=VALUE, e.g. track.floor=0.001")
    try:
        value = tomllib.loads(f"v = {text.strip()}")["v"]
    except tomllib.TOMLDecodeError:
        value = text.strip()
    parts = key.split(".")
    table: dict = {}
    cur = table
    for p in parts[:-1]:
        cur[p] = {}
        cur = cur[p]
    cur[parts[-1]] = value
    return _apply(cfg, table, "--set")


def config_to_dict(cfg) -> dict:
    """Nested dict of every value (what ``tinyloc run --print-config`` shows)."""
    out = {}
    for f in fields(cfg):
        v = getattr(cfg, f.name)
        out[f.name] = config_to_dict(v) if is_dataclass(v) else v
    return out


def dumps_config(cfg: LoopConfig) -> str:
    """The configuration as TOML text, tables nested as [section] and [section.sub]."""
    from ..tomlio import _value

    lines = ["# tinyloc loop configuration (docs/runtime.md); every key is optional"]

    def emit(prefix, d):
        scalars = {k: v for k, v in d.items() if not isinstance(v, dict)}
        if prefix:
            lines.append("")
            lines.append(f"[{prefix}]")
        for k, v in scalars.items():
            lines.append(f"{k} = {_value(v)}")
        for k, v in d.items():
            if isinstance(v, dict):
                emit(f"{prefix}.{k}" if prefix else k, v)

    emit("", config_to_dict(cfg))
    return "\n".join(lines) + "\n"


__all__ = ["LoopConfig", "LoopParams", "MatchParams", "TrackParams", "GnssParams", "load_config",
           "apply_override", "config_from_dict", "config_to_dict", "dumps_config"]
