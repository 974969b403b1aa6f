"""The replay report: one self-contained HTML file (images embedded as base64 PNG, no network).

Figures:

- trajectory over the map raster (truth, estimate coloured by quality, GNSS fixes,
  dead reckoning) - drawn with OpenCV, always available;
- error over time with the quality flag, recall curves, uncertainty calibration -
  drawn with matplotlib when it is installed (``pip install tinyloc[report]``);
  without it the same numbers appear as tables and the report says what is missing;
- the worst frames with whatever debug images the loop kept (camera image,
  segmentation, bird's-eye view, likelihood map).

Every number in the report's tables is taken from the metrics dict that is also
written as metrics.json; each cell carries ``data-key`` (the slash-separated key path in that
dict) and ``data-value`` (the exact value), so the two can be checked against each other.
"""

from __future__ import annotations

import base64
import html
import io
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..classes import MAP_CLASSES
from . import metrics as M

QUALITY_BGR = {"tracking": (60, 170, 40), "degraded": (0, 170, 240), "searching": (40, 40, 220),
               "no-fix": (120, 120, 120)}
QUALITY_RGB = {k: tuple(c / 255.0 for c in v[::-1]) for k, v in QUALITY_BGR.items()}


@dataclass(frozen=True)
class MapBackdrop:
    """A north-up colour raster of the map under the trajectory.

    ``image_bgr`` (H, W, 3) uint8; pixel (r, c) has centre
    ``x = x_min + (c + 0.5) * res_m``, ``y = y_max - (r + 0.5) * res_m`` (the map raster convention).
    """

    image_bgr: np.ndarray
    x_min: float
    y_max: float
    res_m: float


def _meta(obj, key):
    return obj[key] if isinstance(obj, dict) else getattr(obj, key)


def map_backdrop(packed, xy, *, margin_m: float = 15.0, max_px: int = 2400,
                 max_cells: int = 40000) -> tuple[MapBackdrop | None, str]:
    """Read the map under a set of points and colour it by class.

    Areas wider than ``max_px`` cells are read block by block and shrunk by an integer factor (so
    memory stays at one block whatever the drive's length); areas wider than ``max_cells`` are refused.

    Parameters
    ----------
    packed : PackedMap-like
        Has ``.meta`` (``res_m``, ``x_min``, ``y_max``) and ``read_window`` as in docs/interfaces.md.
    xy : array_like (N, 2)
        World points to cover (NaN rows ignored).

    Returns
    -------
    (MapBackdrop or None, note)
        None with a one-line reason when there is nothing to draw or the area is too large.
    """
    import cv2

    p = np.asarray(xy, dtype=np.float64).reshape(-1, 2)
    p = p[np.all(np.isfinite(p), axis=1)]
    if len(p) == 0:
        return None, "no finite positions to draw the map under"
    res = float(_meta(packed.meta, "res_m"))
    x_min0, y_max0 = float(_meta(packed.meta, "x_min")), float(_meta(packed.meta, "y_max"))
    lo, hi = p.min(axis=0) - margin_m, p.max(axis=0) + margin_m
    col0 = int(math.floor((lo[0] - x_min0) / res))
    col1 = int(math.ceil((hi[0] - x_min0) / res))
    row0 = int(math.floor((y_max0 - hi[1]) / res))
    row1 = int(math.ceil((y_max0 - lo[1]) / res))
    h, w = row1 - row0, col1 - col0
    if h > max_cells or w > max_cells:
        return None, f"the drive spans {w} x {h} map cells, more than the report draws ({max_cells})"
    k = max(1, -(-max(h, w) // max_px))  # shrink factor
    h, w = -(-h // k) * k, -(-w // k) * k
    ids = tuple(getattr(packed.meta, "class_ids", range(len(MAP_CLASSES))))
    blk = k * max(1, 512 // k)
    img = np.empty((h // k, w // k, 3), np.uint8)
    buf = np.zeros((len(ids), blk, blk), dtype=np.float32)
    known = np.zeros((blk, blk), dtype=np.uint8)
    for r in range(0, h, blk):
        for c in range(0, w, blk):
            bh, bw = min(blk, h - r), min(blk, w - c)
            if (bh, bw) == (blk, blk):
                b, kn = buf, known
            else:  # edge blocks: the reader fills contiguous buffers
                b, kn = np.zeros((len(ids), bh, bw), np.float32), np.zeros((bh, bw), np.uint8)
            packed.read_window(row0 + r, col0 + c, b, known_out=kn)
            tile = colour_classes(b, ids)
            tile[kn == 0] = (225, 225, 225)
            if k > 1:
                tile = cv2.resize(tile, (bw // k, bh // k), interpolation=cv2.INTER_AREA)
            img[r // k:(r + bh) // k, c // k:(c + bw) // k] = tile
    return MapBackdrop(img, x_min0 + col0 * res, y_max0 - row0 * res, res * k), ""


def backdrop_points(rec) -> np.ndarray:
    """Points the map backdrop must cover: the truth, and the estimates within 100 m of it (a wild
    estimate far away must not make the map huge); all estimates when there is no truth."""
    tru = np.stack([rec["truth_x"], rec["truth_y"]], 1)
    est = np.stack([rec["x"], rec["y"]], 1)
    tru = tru[np.all(np.isfinite(tru), 1)]
    est = est[np.all(np.isfinite(est), 1)]
    if len(tru) == 0:
        return est
    lo, hi = tru.min(0) - 100.0, tru.max(0) + 100.0
    near = est[np.all((est >= lo) & (est <= hi), 1)]
    return np.concatenate([tru, near])


def colour_classes(channels: np.ndarray, class_ids=None) -> np.ndarray:
    """Colour a (C, H, W) coverage raster (channel k holds class ``class_ids[k]``, default k): paint the
    ground classes over a pale background, then the vertical ones on top (trees and poles stay visible)."""
    from ..classes import CLASSES

    c = channels.shape[0]
    ids = list(class_ids) if class_ids is not None else list(range(c))
    known = [k for k in range(c) if 0 <= ids[k] < len(CLASSES)]
    order = [k for k in known if not CLASSES[ids[k]].vertical] + [k for k in known if CLASSES[ids[k]].vertical]
    img = np.full(channels.shape[1:] + (3,), 245.0, dtype=np.float32)
    for k in order:
        a = np.clip(channels[k], 0.0, 1.0)[..., None]
        # Lighten the fill so the paths drawn on top stand out.
        col = 0.55 * np.array(CLASSES[ids[k]].color_bgr, dtype=np.float32) + 0.45 * 255.0
        img = img * (1.0 - a) + col * a
    return np.clip(img, 0, 255).astype(np.uint8)


# ----------------------------------------------------------------------------- drawing helpers

def png_b64(img_bgr: np.ndarray) -> str:
    """Encode a BGR (or gray) uint8 image as base64 PNG text."""
    import cv2

    ok, buf = cv2.imencode(".png", np.ascontiguousarray(img_bgr))
    if not ok:
        raise ValueError("PNG encoder failed")
    return base64.b64encode(buf.tobytes()).decode("ascii")


def draw_trajectory(rec, backdrop: MapBackdrop | None, *, target_px: int = 900) -> np.ndarray:
    """Truth, estimate (coloured by quality), GNSS and dead reckoning, over the map when given (BGR)."""
    import cv2

    pts = [np.stack([rec["truth_x"], rec["truth_y"]], 1), np.stack([rec["x"], rec["y"]], 1),
           np.stack([rec["gnss_x"], rec["gnss_y"]], 1), np.stack([rec["dr_x"], rec["dr_y"]], 1)]
    if backdrop is not None:
        base = backdrop.image_bgr
        x_min, y_max, res = backdrop.x_min, backdrop.y_max, backdrop.res_m
    else:
        allp = np.concatenate(pts)
        allp = allp[np.all(np.isfinite(allp), 1)]
        if len(allp) == 0:
            allp = np.zeros((1, 2))
        lo, hi = allp.min(0) - 10.0, allp.max(0) + 10.0
        res = max(float(np.max(hi - lo)) / 600.0, 0.05)
        w, h = int(math.ceil((hi[0] - lo[0]) / res)), int(math.ceil((hi[1] - lo[1]) / res))
        base = np.full((h, w, 3), 250, np.uint8)
        x_min, y_max = float(lo[0]), float(hi[1])
    scale = max(1.0, target_px / max(base.shape[:2]))
    img = cv2.resize(base, (int(base.shape[1] * scale), int(base.shape[0] * scale)), interpolation=cv2.INTER_NEAREST)
    px = scale / res

    def to_px(xy):
        c = (xy[:, 0] - x_min) * px
        r = (y_max - xy[:, 1]) * px
        return np.stack([c, r], 1)

    def polyline(xy, colour, thick):
        ok = np.all(np.isfinite(xy), 1)
        q = to_px(xy)
        start = None
        for i in range(len(xy) + 1):
            if i < len(xy) and ok[i]:
                if start is None:
                    start = i
                continue
            if start is not None and i - start >= 2:
                seg = np.round(q[start:i] * 16).astype(np.int32).reshape(-1, 1, 2)
                cv2.polylines(img, [seg], False, colour, thick, cv2.LINE_AA, shift=4)
            start = None

    polyline(pts[3], (150, 60, 150), 1)
    gq = to_px(pts[2])
    for (c, r), ok in zip(gq, np.all(np.isfinite(pts[2]), 1)):
        if ok:
            cv2.circle(img, (int(c), int(r)), 2, (200, 120, 20), -1, cv2.LINE_AA)
    polyline(pts[0], (20, 20, 20), 2)
    eq = to_px(pts[1])
    qual = np.asarray(rec["quality"]).astype(str)
    for i, ((c, r), ok) in enumerate(zip(eq, np.all(np.isfinite(pts[1]), 1))):
        if ok:
            cv2.circle(img, (int(c), int(r)), 3, QUALITY_BGR.get(qual[i], (0, 0, 0)), -1, cv2.LINE_AA)
    # Legend and scale bar.
    items = [("truth", (20, 20, 20)), ("GNSS fix", (200, 120, 20)), ("dead reckoning", (150, 60, 150))] + \
            [(f"estimate: {k}", v) for k, v in QUALITY_BGR.items()]
    y0 = 18
    cv2.rectangle(img, (6, 4), (200, 10 + 18 * len(items)), (255, 255, 255), -1)
    for k, (name, col) in enumerate(items):
        y = y0 + 18 * k
        cv2.circle(img, (18, y - 4), 5, col, -1, cv2.LINE_AA)
        cv2.putText(img, name, (30, y), cv2.FONT_HERSHEY_SIMPLEX, 0.45, (0, 0, 0), 1, cv2.LINE_AA)
    bar_m = _nice(img.shape[1] / px / 5.0)
    bx, by = 12, img.shape[0] - 14
    cv2.line(img, (bx, by), (bx + int(bar_m * px), by), (0, 0, 0), 3)
    cv2.putText(img, f"{bar_m:g} m", (bx, by - 6), cv2.FONT_HERSHEY_SIMPLEX, 0.45, (0, 0, 0), 1, cv2.LINE_AA)
    cv2.putText(img, "N ^", (img.shape[1] - 44, 20), cv2.FONT_HERSHEY_SIMPLEX, 0.5, (0, 0, 0), 1, cv2.LINE_AA)
    return img


def _nice(x: float) -> float:
    if not x > 0:
        return 1.0
    e = 10.0 ** math.floor(math.log10(x))
    for m in (1, 2, 5, 10):
        if m * e >= x:
            return m * e
    return 10 * e


def _mpl():
    """matplotlib's object API (no pyplot state), or None when it is not installed."""
    try:
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure
    except ImportError:
        return None
    return Figure, FigureCanvasAgg


def _fig_png(fig, canvas_cls) -> str:
    canvas_cls(fig)
    bio = io.BytesIO()
    fig.savefig(bio, format="png", dpi=100, bbox_inches="tight")
    return base64.b64encode(bio.getvalue()).decode("ascii")


def plot_error_over_time(rec, mpl, lost_spans=()) -> str:
    """Position and heading error against time (log axes), quality flag beneath, lost spells shaded."""
    Figure, Canvas = mpl
    err, yerr, gerr, drerr, _ = rec.errors()
    t = np.asarray(rec["t"], float)
    t = t - t[0] if len(t) else t
    fig = Figure(figsize=(10, 5.2))
    ax1, ax2, ax3 = fig.subplots(3, 1, sharex=True, gridspec_kw={"height_ratios": [3, 2, 0.5]})
    def floor(e, lo):  # log axes: misses (inf) leave a hole, tiny errors sit on the floor
        return np.where(np.isfinite(e), np.maximum(e, lo), np.nan)

    ax1.plot(t, floor(err, 0.02), lw=1.2, color="k", label="tinyloc")
    ax1.plot(t, floor(gerr, 0.02), lw=0.8, color="tab:blue", alpha=0.7, label="GNSS")
    ax1.plot(t, floor(drerr, 0.02), lw=0.8, color="tab:purple", alpha=0.7, label="dead reckoning")
    ax1.set_yscale("log")
    for ax in (ax1, ax2):
        for a, b in lost_spans:
            ax.axvspan(a, b, color="tab:red", alpha=0.12, lw=0)
    for yv in (0.25, 0.5, 1.0, 2.0):
        ax1.axhline(yv, color="0.8", lw=0.6, zorder=0)
    ax1.set_ylabel("position error (m)")
    ax1.legend(loc="upper right", fontsize=8)
    ax2.plot(t, floor(yerr, 0.05), lw=1.0, color="k")
    for yv in (2.0, 3.0, 5.0):
        ax2.axhline(yv, color="0.8", lw=0.6, zorder=0)
    ax2.set_yscale("log")
    ax2.set_ylabel("heading error (deg)")
    q = np.asarray(rec["quality"]).astype(str)
    if len(t) > 1:
        edges = np.concatenate([t[:1], 0.5 * (t[1:] + t[:-1]), t[-1:]])
        for k, col in QUALITY_RGB.items():
            sel = q == k
            if np.any(sel):
                ax3.bar(edges[:-1][sel], 1.0, width=np.diff(edges)[sel], align="edge", color=col, label=k)
        ax3.legend(loc="upper center", ncol=4, fontsize=7, bbox_to_anchor=(0.5, -1.5), frameon=False)
    ax3.set_yticks([])
    ax3.set_ylabel("quality", rotation=0, ha="right", va="center")
    ax3.set_xlabel("time since first frame (s)")
    fig.subplots_adjust(left=0.09, right=0.98, top=0.97, bottom=0.2, hspace=0.12)
    return _fig_png(fig, Canvas)


RECALL_GRID_M = np.concatenate([np.linspace(0.0, 2.0, 41), np.linspace(2.25, 5.0, 12)])


def plot_recall(rec, mpl) -> str:
    Figure, Canvas = mpl
    err, yerr, gerr, drerr, dryerr = rec.errors()
    fig = Figure(figsize=(9.5, 4.2))
    ax = fig.subplots()
    for a, ls in ((2.0, ":"), (3.0, "--"), (5.0, "-")):
        ax.plot(RECALL_GRID_M, M.recall_curve(err, yerr, RECALL_GRID_M, a), color="k", ls=ls,
                label=f"tinyloc, heading <= {a:g} deg")
    ax.plot(RECALL_GRID_M, M.recall_curve(err, None, RECALL_GRID_M, None), color="0.5", lw=1,
            label="tinyloc, position only")
    ax.plot(RECALL_GRID_M, M.recall_curve(gerr, None, RECALL_GRID_M, None), color="tab:blue",
            label="GNSS (position only)")
    ax.plot(RECALL_GRID_M, M.recall_curve(drerr, dryerr, RECALL_GRID_M, 5.0), color="tab:purple",
            label="dead reckoning, heading <= 5 deg")
    ax.set_xlabel("position error bound (m)")
    ax.set_ylabel("share of frames within bound")
    ax.set_ylim(0, 1.02)
    ax.set_xlim(0, RECALL_GRID_M[-1])
    ax.grid(True, lw=0.4)
    ax.legend(fontsize=8, loc="center left", bbox_to_anchor=(1.02, 0.5), frameon=False)
    fig.tight_layout()
    return _fig_png(fig, Canvas)


CAL_LEVELS = np.array([0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 0.95, 0.99])


def calibration_d2(rec) -> np.ndarray:
    """Squared Mahalanobis position error of every frame with truth (NaN = no estimate or bad covariance)."""
    txy = np.stack([rec["truth_x"], rec["truth_y"]], 1)
    has = np.all(np.isfinite(txy), 1) & np.isfinite(np.asarray(rec["truth_yaw"], float))
    e = np.stack([rec["x"], rec["y"]], 1) - txy
    return M.mahalanobis2_xy(e[has], np.asarray(rec["cov"], float)[has, :2, :2])


def plot_calibration(rec, mpl) -> str:
    Figure, Canvas = mpl
    d2 = calibration_d2(rec)
    obs = M.calibration_curve(d2, CAL_LEVELS)
    fig = Figure(figsize=(9, 3.8))
    ax1, ax2 = fig.subplots(1, 2)
    ax1.plot([0, 1], [0, 1], color="0.6", lw=0.8, label="calibrated")
    ax1.plot(CAL_LEVELS, obs, "o-", color="k", label="tinyloc")
    ax1.set_xlabel("nominal probability of the reported ellipse")
    ax1.set_ylabel("observed share of frames inside")
    ax1.set_xlim(0, 1)
    ax1.set_ylim(0, 1)
    ax1.legend(fontsize=8, loc="upper left")
    ax1.grid(True, lw=0.4)
    fin = d2[np.isfinite(d2)]
    if fin.size:
        hi = 20.0
        beyond = float(np.mean(fin > hi))
        ax2.hist(fin[fin <= hi], bins=40, range=(0, hi), density=True, color="0.4")
        ax2.set_title(f"{100 * beyond:.1f} % of frames beyond {hi:g} (not drawn)", fontsize=9)
        xs = np.linspace(0, hi, 200)
        ax2.plot(xs, 0.5 * np.exp(-0.5 * xs), color="tab:red", label="chi-square, 2 dof")
        ax2.axvline(M.chi2_2dof_quantile(0.95), color="tab:red", ls="--", lw=0.8, label="95 % (5.991)")
        ax2.legend(fontsize=8)
    ax2.set_xlabel("squared Mahalanobis position error")
    ax2.set_ylabel("density")
    fig.tight_layout()
    return _fig_png(fig, Canvas)


# ----------------------------------------------------------------------------- HTML

def _get(d, key: str):
    for k in key.split("/"):
        if isinstance(d, list) and k.isdigit() and int(k) < len(d):
            d = d[int(k)]
        elif isinstance(d, dict) and k in d:
            d = d[k]
        else:
            return None
    return d


def _cell(metrics: dict, key: str, fmt: str = "{:.3f}") -> str:
    v = _get(metrics, key)
    if isinstance(v, np.generic):
        v = v.item()
    if v is None:
        shown, raw = "n/a", ""
    elif isinstance(v, bool) or isinstance(v, str):
        shown, raw = str(v), str(v)
    else:
        shown, raw = fmt.format(v), repr(v)
    return f'<td class="num" data-key="{html.escape(key)}" data-value="{html.escape(raw)}">{html.escape(shown)}</td>'


CSS = """
body{font-family:system-ui,Helvetica,Arial,sans-serif;margin:24px;max-width:1100px;color:#222}
h1{font-size:22px} h2{font-size:18px;margin-top:28px;border-bottom:1px solid #ccc}
table{border-collapse:collapse;margin:8px 0} td,th{border:1px solid #ccc;padding:3px 8px;font-size:13px}
th{background:#f2f2f2;text-align:left} td.num{text-align:right;font-variant-numeric:tabular-nums}
.note{background:#fff6dd;border:1px solid #e6c95c;padding:6px 10px;font-size:13px}
.warn{font-family:monospace;font-size:12px;white-space:pre-wrap}
img{max-width:100%;border:1px solid #ddd} .frames td{vertical-align:top}
.verdict-good{color:#1a7f37} .verdict-bad{color:#b42318}
"""


def render_html(metrics: dict, rec, *, title: str, backdrop: MapBackdrop | None = None,
                backdrop_note: str = "", worst_frames: list[dict] | None = None, gaps: list[str] | None = None,
                notes: list[str] | None = None, use_matplotlib: bool = True) -> str:
    """Build the report as one HTML string.

    Parameters
    ----------
    metrics : dict
        From :func:`tinyloc.replay.metrics.compute_metrics` (plus replay's ``run``/``gaps`` keys).
    rec : FrameRecords
    title : str
    backdrop : MapBackdrop, optional
        Map raster under the trajectory; ``backdrop_note`` says why there is none.
    worst_frames : list of dict, optional
        ``{"frame", "t", "err_m", "err_yaw_deg", "quality", "status", "images": {name: BGR uint8}}``.
    gaps : list of str
        One line per gap or data fault met while reading or replaying the run.
    use_matplotlib : bool
        Set False to force the tables-only fallback.
    """
    mpl = _mpl() if use_matplotlib else None
    out = [f"<!DOCTYPE html><html><head><meta charset='utf-8'><title>{html.escape(title)}</title>"
           f"<style>{CSS}</style></head><body>", f"<h1>{html.escape(title)}</h1>"]
    run = metrics.get("run", {})
    if run:
        out.append("<p>" + " &middot; ".join(html.escape(f"{k}: {v}") for k, v in run.items()) + "</p>")
    for n in notes or []:
        out.append(f"<p class='note'>{html.escape(n)}</p>")

    so = metrics.get("signoff")
    if so:
        verdict = "passed" if so["passed"] else "FAILED"
        cls = "verdict-good" if so["passed"] else "verdict-bad"
        out.append(f"<h2>Sign-off: <span class='{cls}'>{verdict}</span></h2><table><tr><th>rule</th><th>value</th>"
                   "<th>result</th></tr>")
        for k, c in enumerate(so["checks"]):
            res = "pass" if c["passed"] else f"FAIL ({c['why']})"
            out.append(f"<tr><td>{html.escape(c['rule'])}</td>{_cell(metrics, f'signoff/checks/{k}/value', '{:.4g}')}"
                       f"<td class='{'verdict-good' if c['passed'] else 'verdict-bad'}'>{html.escape(res)}</td></tr>")
        out.append("</table>")

    cmp_ = metrics.get("compare")
    if cmp_:
        out.append(f"<h2>Compared with an earlier replay</h2><p>{html.escape(str(cmp_['with']))}"
                   + ("" if cmp_.get("same_frames") else " <b>(a different number of frames)</b>") + "</p>"
                   "<table><tr><th>figure</th><th>before</th><th>now</th><th>change</th></tr>")
        for name in cmp_["figures"]:
            cells = "".join(_cell(metrics, f"compare/figures/{name}/{k}", "{:.4g}") for k in ("before", "now", "change"))
            out.append(f"<tr><th>{html.escape(name.replace('|', '/'))}</th>{cells}</tr>")
        out.append("</table>")

    # Headline table.
    out.append("<h2>Summary</h2><table><tr><th>figure</th><th>tinyloc</th><th>GNSS only</th>"
               "<th>dead reckoning only</th></tr>")
    rows = [("frames", "frames", None, None, "{:d}"), ("frames with truth", "frames_with_truth", None, None, "{:d}")]
    for p, a in M.RECALL_THRESHOLDS:
        k = M.recall_key(p, a)
        rows.append((f"recall within {p:g} m and {a:g} deg", f"recall/{k}", f"gnss/recall_position_only/{p:g}m",
                     f"dead_reckoning/recall/{k}", "{:.3f}"))
    rows += [("median position error (m)", "median_error_m", "gnss/median_error_m", "dead_reckoning/median_error_m",
              "{:.3f}"),
             ("90th percentile position error (m)", "p90_error_m", "gnss/p90_error_m", "dead_reckoning/p90_error_m",
              "{:.3f}"),
             ("median heading error (deg)", "median_heading_error_deg", None,
              "dead_reckoning/median_heading_error_deg", "{:.2f}"),
             ("90th percentile heading error (deg)", "p90_heading_error_deg", None,
              "dead_reckoning/p90_heading_error_deg", "{:.2f}"),
             ("frames without an estimate / fix", "missed_frames", "gnss/frames_without_fix",
              "dead_reckoning/missed_frames", "{:d}"),
             ("share inside the reported 95 % ellipse", "inside_95_ellipse", "gnss/inside_95_circle", None, "{:.3f}")]
    for label, k1, k2, k3, fmt in rows:
        cells = [(_cell(metrics, k, fmt) if k else "<td></td>") for k in (k1, k2, k3)]
        out.append(f"<tr><th>{html.escape(label)}</th>{''.join(cells)}</tr>")
    out.append("</table><p style='font-size:12px'>GNSS has no heading: its recall counts position only. "
               "GNSS's 95 % circle uses the receiver's reported 1-sigma accuracy.</p>")

    out.append("<h2>Lock-on, lost spells, latency</h2><table>")
    for label, key, fmt in [
            ("time to first good fix (s)", "first_good_fix/time_s", "{:.2f}"),
            ("distance to first good fix (m)", "first_good_fix/distance_m", "{:.1f}"),
            ("good fix bound (and flagged tracking)", "first_good_fix/bound", "{}"),
            ("time to the first tracking flag (s)", "first_good_fix/first_tracking_s", "{:.2f}"),
            ("lost spells", "lost/spells", "{:d}"), ("recoveries", "lost/recoveries", "{:d}"),
            ("time lost in total (s)", "lost/total_s", "{:.2f}"), ("longest lost spell (s)", "lost/longest_s", "{:.2f}"),
            ("shortest spell counted (s)", "lost/min_lost_s", "{:g}"),
            ("frames flagged tracking but outside the loosest bound", "quality/tracking_but_wrong_frames", "{:d}"),
            ("share of tracking frames that are wrong", "quality/tracking_but_wrong_share", "{:.4f}"),
            ("heading inside its 95 % interval", "uncertainty/heading_inside", "{:.3f}"),
            ("mean squared Mahalanobis error (2 if calibrated)", "uncertainty/mean_nees_xy", "{:.2f}"),
            ("latency median (ms)", "frame_ms_median", "{:.2f}"), ("latency 99th percentile (ms)", "latency/p99_ms",
                                                                   "{:.2f}"),
            ("latency max (ms)", "latency/max_ms", "{:.2f}"),
            ("replay speed (frames/s)", "replay/frames_per_s", "{:.1f}")]:
        out.append(f"<tr><th>{html.escape(label)}</th>{_cell(metrics, key, fmt)}</tr>")
    out.append("</table>")
    qs = metrics.get("quality", {}).get("share", {})
    if qs:
        out.append("<table><tr><th>quality flag</th>" + "".join(f"<th>{html.escape(k)}</th>" for k in qs) +
                   "</tr><tr><th>share of frames</th>" +
                   "".join(_cell(metrics, f"quality/share/{k}", "{:.3f}") for k in qs) + "</tr></table>")

    out.append("<h2>Trajectory</h2>")
    if backdrop is None and backdrop_note:
        out.append(f"<p class='note'>No map under the trajectory: {html.escape(backdrop_note)}</p>")
    out.append(f"<img alt='trajectory' src='data:image/png;base64,{png_b64(draw_trajectory(rec, backdrop))}'>")

    out.append("<h2>Error over time</h2>")
    if mpl is not None:
        out.append(f"<img alt='error over time' src='data:image/png;base64,{plot_error_over_time(rec, mpl, _lost_spans(metrics, rec))}'>")
    else:
        out.append("<p class='note'>matplotlib is not installed, so the error, recall and calibration plots are "
                   "replaced by tables (install the report extra: pip install 'tinyloc[report]').</p>")
        out.append(_error_table(rec))

    out.append("<h2>Recall curves</h2>")
    if mpl is not None:
        out.append(f"<img alt='recall curves' src='data:image/png;base64,{plot_recall(rec, mpl)}'>")
    else:
        out.append(_recall_table(rec))

    out.append("<h2>Uncertainty calibration</h2><p>Share of frames whose true position lies inside the "
               "reported ellipse of each probability (chi-square, 2 degrees of freedom). Points below the diagonal: "
               "the reported covariance is over-confident.</p>")
    if mpl is not None:
        out.append(f"<img alt='calibration' src='data:image/png;base64,{plot_calibration(rec, mpl)}'>")
    obs = M.calibration_curve(calibration_d2(rec), CAL_LEVELS)
    out.append("<table><tr><th>nominal</th>" + "".join(f"<td class='num'>{p:.2f}</td>" for p in CAL_LEVELS) +
               "</tr><tr><th>observed</th>" + "".join(f"<td class='num'>{o:.3f}</td>" for o in obs) + "</tr></table>")

    sc = metrics.get("status_counts") or {}
    if sc:
        out.append("<h2>What the loop said</h2><p>Status texts of the frames (numbers replaced by #), most "
                   "frequent first.</p><table><tr><th>status</th><th>frames</th></tr>")
        for k in sc:
            out.append(f"<tr><td>{html.escape(k)}</td>{_cell(metrics, f'status_counts/{k}', '{:d}')}</tr>")
        out.append("</table>")

    lost = metrics.get("lost", {}).get("list", [])
    if lost:
        t0 = float(np.asarray(rec["t"], float)[0]) if len(rec["t"]) else 0.0
        out.append("<h2>Lost spells</h2><table><tr><th>start (s since first frame)</th><th>duration (s)</th>"
                   "<th>distance (m)</th><th>recovered</th><th>flag at start</th><th>the loop said</th></tr>")
        for s in lost:
            start = s["start_t"] - t0 if s.get("start_t") is not None else None
            out.append("<tr>" + "".join(f"<td class='num'>{_fmtv(v)}</td>" for v in
                                         (start, s["duration_s"], s["distance_m"], s["recovered"])) +
                       f"<td>{html.escape(s.get('quality_at_start', ''))}</td>"
                       f"<td>{html.escape(s.get('status_at_start', ''))}</td></tr>")
        out.append("</table>")

    out.append("<h2>Worst frames</h2>")
    if worst_frames:
        out.append("<table class='frames'>")
        for wf in worst_frames:
            t_rel = wf['t'] - float(np.asarray(rec["t"], float)[0])
            cap = (f"frame {wf['frame']} at {t_rel:.2f} s since the first frame (t = {wf['t']:.2f} s): "
                   f"error {_fmtv(wf['err_m'])} m, "
                   f"{_fmtv(wf['err_yaw_deg'])} deg, {wf['quality']}; {wf.get('status', '')}")
            out.append(f"<tr><td colspan='4'><b>{html.escape(cap)}</b></td></tr><tr>")
            imgs = wf.get("images") or {}
            for name, im in imgs.items():
                out.append(f"<td>{html.escape(name)}<br><img style='max-width:260px' "
                           f"src='data:image/png;base64,{png_b64(im)}'></td>")
            if not imgs:
                out.append("<td>no images kept for this frame</td>")
            out.append("</tr>")
        out.append("</table>")
    else:
        out.append("<p>No frames with ground truth to rank.</p>")

    out.append("<h2>Gaps and data faults</h2>")
    if gaps:
        shown = gaps[:500]
        more = f"\n... and {len(gaps) - len(shown)} more" if len(gaps) > len(shown) else ""
        out.append(f"<p>{len(gaps)} found.</p><div class='warn'>" + html.escape("\n".join(shown) + more) + "</div>")
    else:
        out.append("<p>None found.</p>")
    out.append("<h2>Definitions</h2><p style='font-size:12px'>Recall: share of frames with truth whose position "
               "and heading errors are both within the bound; a frame without an estimate counts as a miss. "
               "Percentiles: numpy.percentile, linear interpolation, over frames with an estimate. "
               "A good fix is a frame within the good-fix bound and flagged tracking; a lost spell is a run of frames "
               "after the first good fix that are not within the bound, lasting at least the shortest spell counted. "
               "See docs/replay.md.</p>")
    out.append("</body></html>")
    return "\n".join(out)


def _lost_spans(metrics: dict, rec) -> list[tuple[float, float]]:
    t = np.asarray(rec["t"], float)
    if not len(t):
        return []
    return [(s["start_t"] - t[0], s["start_t"] - t[0] + s["duration_s"]) for s in metrics.get("lost", {}).get("list", [])
            if s.get("start_t") is not None and s.get("duration_s") is not None]


def _fmtv(v) -> str:
    if isinstance(v, bool) or v is None or isinstance(v, str):
        return str(v)
    return f"{v:.2f}" if math.isfinite(v) else str(v)


def _error_table(rec) -> str:
    err, yerr, gerr, _, _ = rec.errors()
    t = np.asarray(rec["t"], float)
    n = len(t)
    step = max(1, n // 40)
    q = np.asarray(rec["quality"]).astype(str)
    rows = ["<table><tr><th>t (s)</th><th>position error (m)</th><th>heading error (deg)</th><th>GNSS error (m)</th>"
            "<th>quality</th></tr>"]
    for i in range(0, n, step):
        rows.append(f"<tr><td class='num'>{t[i] - t[0]:.1f}</td><td class='num'>{_fmtv(err[i])}</td>"
                    f"<td class='num'>{_fmtv(yerr[i])}</td><td class='num'>{_fmtv(gerr[i])}</td>"
                    f"<td>{html.escape(q[i])}</td></tr>")
    rows.append(f"</table><p style='font-size:12px'>every {step}th frame shown; all frames are in frames.csv</p>")
    return "".join(rows)


def _recall_table(rec) -> str:
    err, yerr, gerr, _, _ = rec.errors()
    grid = np.array([0.1, 0.25, 0.5, 1.0, 2.0, 5.0])
    rows = ["<table><tr><th>bound (m)</th>" + "".join(f"<td class='num'>{g:g}</td>" for g in grid) + "</tr>"]
    for label, e, ye, a in (("tinyloc, heading <= 3 deg", err, yerr, 3.0), ("tinyloc, position only", err, None, None),
                            ("GNSS, position only", gerr, None, None)):
        rows.append(f"<tr><th>{label}</th>" + "".join(f"<td class='num'>{r:.3f}</td>"
                                                      for r in M.recall_curve(e, ye, grid, a)) + "</tr>")
    rows.append("</table>")
    return "".join(rows)


def write_report(path, metrics: dict, rec, **kw) -> Path:
    """Render :func:`render_html` and write it to ``path`` (UTF-8). Returns the path."""
    path = Path(path)
    path.write_text(render_html(metrics, rec, **kw), encoding="utf-8")
    return path


def colour_labels(label: np.ndarray) -> np.ndarray:
    """Class-index image (255 = unlabelled) -> BGR with the class palette."""
    from ..classes import UNKNOWN_COLOR_BGR, palette_bgr

    pal = np.vstack([palette_bgr(), np.tile(np.array(UNKNOWN_COLOR_BGR, np.uint8), (256 - len(palette_bgr()), 1))])
    return pal[label]


def _thumb(img: np.ndarray, width: int = 320) -> np.ndarray:
    import cv2

    if img.ndim == 2:
        img = cv2.cvtColor(img, cv2.COLOR_GRAY2BGR)
    if img.shape[1] != width:
        h = int(round(img.shape[0] * width / img.shape[1]))
        shrink = img.shape[1] > width
        img = cv2.resize(img, (width, h), interpolation=cv2.INTER_AREA if shrink else cv2.INTER_NEAREST)
    return img


def worst_frame_panels(res, *, notes: list[str]) -> list[dict]:
    """Images of the worst frames: the camera frame, its label image when the run has one, and the
    localizer's own debug views (segmentation, bird's-eye view, likelihood) when it offers
    ``debug_images(index, image_bgr) -> {name: BGR uint8}``."""
    rf, loc, rec = res.run_folder, res.localizer, res.records
    err, yerr, *_ = rec.errors()
    debug = getattr(loc, "debug_images", None)
    if debug is None:
        notes.append("The localizer keeps no debug views (segmentation, bird's-eye view, likelihood map); "
                     "the worst frames show the camera image only.")
    out = []
    for i in res.worst:
        imgs: dict = {}
        image = None
        if rf is not None:
            try:
                image = rf.load_frame(i)
                imgs["camera"] = _thumb(image)
            except Exception as e:  # noqa: BLE001 - a bad frame is shown as missing, not fatal
                imgs = {}
                notes.append(f"frame {i}: {e}")
            lab = None
            try:
                lab = rf.load_label(i)
            except Exception:  # noqa: BLE001
                lab = None
            if lab is not None:
                imgs["labels (truth)"] = _thumb(colour_labels(lab))
        if debug is not None and image is not None:
            try:
                p = (float(rec.x[i]), float(rec.y[i]), float(rec.yaw[i]))
                if not all(math.isfinite(v) for v in p):
                    p = (float(rec.truth_x[i]), float(rec.truth_y[i]), float(rec.truth_yaw[i]))
                tr = (float(rec.truth_x[i]), float(rec.truth_y[i]), float(rec.truth_yaw[i]))
                for name, im in (debug(i, image, pose=p, truth=tr) or {}).items():
                    imgs[name] = _thumb(np.asarray(im))
            except Exception as e:  # noqa: BLE001 - debug views are optional
                notes.append(f"frame {i}: debug views failed ({type(e).__name__}: {e})")
        out.append({"frame": int(rec.frame[i]), "t": float(rec.t[i]), "err_m": float(err[i]),
                    "err_yaw_deg": float(yerr[i]), "quality": str(rec.quality[i]), "status": str(rec.status[i]),
                    "images": imgs})
    return out


def write_run_report(path, res, *, packed=None, use_matplotlib: bool = True) -> Path:
    """The report of one :class:`~tinyloc.replay.replay.ReplayResult` (map backdrop from ``packed``)."""
    notes: list[str] = []
    backdrop, why = None, "no map given"
    if packed is not None:
        rec = res.records
        try:
            backdrop, why = map_backdrop(packed, backdrop_points(rec))
        except Exception as e:  # noqa: BLE001 - a damaged map still gives a report without backdrop
            backdrop, why = None, f"map could not be read ({type(e).__name__}: {e})"
    worst = worst_frame_panels(res, notes=notes)
    if use_matplotlib and _mpl() is None:
        notes.append("matplotlib is not installed: plots are replaced by tables (pip install 'tinyloc[report]').")
    return write_report(path, res.metrics, res.records, title=f"tinyloc replay: {res.name}", backdrop=backdrop,
                        backdrop_note=why, worst_frames=worst, gaps=res.gaps, notes=notes,
                        use_matplotlib=use_matplotlib)


def write_index(path, rows: list[dict], *, title: str = "tinyloc replay: summary") -> Path:
    """A summary page for a batch: one row per run, linking to each run's report (relative links)."""
    path = Path(path)
    cols = [("frames", "frames", "{}"), ("recall_1m_3deg", "recall 1 m / 3 deg", "{:.3f}"),
            ("median_error_m", "median error (m)", "{:.3f}"), ("p90_error_m", "p90 error (m)", "{:.3f}"),
            ("median_heading_error_deg", "median heading error (deg)", "{:.2f}"),
            ("gnss_median_error_m", "GNSS median error (m)", "{:.3f}"),
            ("dr_median_error_m", "dead reckoning median error (m)", "{:.3f}"),
            ("inside_95_ellipse", "inside 95 % ellipse", "{:.3f}"), ("first_good_fix_s", "first good fix (s)", "{:.2f}"),
            ("lost_spells", "lost spells", "{}"), ("gaps", "gaps", "{}"), ("frame_ms_median", "frame ms (median)",
                                                                          "{:.2f}")]
    out = [f"<!DOCTYPE html><html><head><meta charset='utf-8'><title>{html.escape(title)}</title>"
           f"<style>{CSS}</style></head><body><h1>{html.escape(title)}</h1><table><tr><th>run</th>" +
           "".join(f"<th>{html.escape(h)}</th>" for _, h, _ in cols) + "</tr>"]
    for r in rows:
        name = html.escape(Path(r["run"]).name or r["run"])
        if r.get("error"):
            out.append(f"<tr><th>{name}</th><td colspan='{len(cols)}' class='verdict-bad'>failed: "
                       f"{html.escape(r['error'])}</td></tr>")
            continue
        link = name
        if r.get("out_dir") and (Path(r["out_dir"]) / "report.html").is_file():
            rel = Path(r["out_dir"]).resolve().relative_to(path.parent.resolve()) / "report.html"
            link = f"<a href='{html.escape(rel.as_posix())}'>{name}</a>"
        cells = "".join(f"<td class='num'>{'n/a' if r.get(k) is None else html.escape(f.format(r[k]))}</td>"
                        for k, _, f in cols)
        out.append(f"<tr><th>{link}</th>{cells}</tr>")
    out.append("</table><p style='font-size:12px'>Definitions: docs/replay.md.</p></body></html>")
    path.write_text("\n".join(out), encoding="utf-8")
    return path
