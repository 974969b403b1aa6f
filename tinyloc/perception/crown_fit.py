"""Fit the crown model (crown_model.py) on labelled frames: a developer tool, not on the robot's path.

    python -m tinyloc.perception.crown_fit --images DIR --labels DIR --label-map MAP.toml [--ids even]
        [--run RUN ...] [--run-every 10] [--run-share 0.15] [--features texture|colour]
        [--pixels applied|building-tree] [--note KEY=TEXT ...] -o crown.json
    python -m tinyloc.perception.crown_fit --first colour.json ... -o context.json   (a context model)
    python -m tinyloc.perception.crown_fit --stage gaps --crown crown.json ... -o crown_gaps.json

Two kinds of labelled data, each optional:

- a folder of images with hand-made label images of the same names (``--images``, ``--labels``; ids
  mapped to tinyloc classes by a ``tinyloc-label-map`` file, docs/perception.md), segmented without a
  camera model (horizon at ``horizon_frac``); ``--ids even`` / ``odd`` / ``all`` picks files by the
  number in their name, so the other half stays unseen for evaluation;
- run folders with ``labels/`` (docs/run-folder.md; for example simulated drives), segmented with their
  camera and IMU gravity, every ``--run-every``-th frame.

Crown stage: the samples are the labelled segmentation pixels that the crown model scores when it
runs (not sky, at or above ``crown_u_min``; ``--pixels applied``), with "tree" against every other
class, so vehicles, poles and fences teach it what is not a crown; ``--pixels building-tree`` keeps
only pixels that both the rules (crown model off) and the truth call building or tree (how the first
models were fitted). ``--features colour`` adds the colour and sky-context planes of
crown_features.py; ``--first COLOUR_MODEL`` fits the second score of a context model (the same
pixels, segmented with the colour model on; its planes plus the context planes of its crown map).
Gaps stage: the pixels the segmenter with the ``--crown`` model (gap model off) calls sky and the
truth sky or tree; the sky-gap model reads the crown model's features and four more.
The truth at the raster is the majority class of each cell's block of label pixels (the features
describe the whole block). Within each kind of data both classes weigh equally; the run folders
together weigh ``--run-share`` of the total. Every 2nd pixel in each direction is used. The written
file carries the sources, the split, the settings, the commit of the tool and any ``--note`` texts as
its provenance.
"""

from __future__ import annotations

import argparse
import dataclasses
import datetime
import re
import sys
from pathlib import Path

import cv2
import numpy as np

from ..classes import BUILDING, NUM_CLASSES, SKY, TREE
from ..errors import InputError
from . import _kernels as K
from .crown_features import CONTEXT_FEATURES, EXTRA_FEATURES, CrownContext, CrownExtras
from .crown_model import COLOUR_FEATURES, FEATURES, GAP_EXTRA, fit_crown_model, load_crown_model
from .labels_in import LabelImporter
from .segment import Segmenter, preset

#: Run folders' labels/ already hold tinyloc class indices: the identity mapping (255 elsewhere).
_IDENTITY = np.full(256, 255, np.uint8)
_IDENTITY[:NUM_CLASSES] = np.arange(NUM_CLASSES, dtype=np.uint8)


def reduce_truth(raw: np.ndarray, lut: np.ndarray, size: tuple[int, int]) -> np.ndarray:
    """Truth at the segmentation raster (``size`` = (w, h)): the majority class of each cell's block.

    The features of raster cell (i, j) describe its whole block of frame pixels (the frame is
    area-averaged), so the truth must be the block's too: a nearest-pixel pick (OpenCV's
    INTER_NEAREST) takes the block's top-left pixel, one frame pixel up and left of the centre at a
    3x reduction. Ids that ``lut`` does not map count toward no class; a block mostly unmapped is 255.
    """
    imp = LabelImporter((raw.shape[1], raw.shape[0]), size, lut)
    return imp.run(np.ascontiguousarray(raw, np.uint8))[1].copy()


#: Which pixels the crown stage samples: "applied" (default): all that the crown model scores at run time
#: (not sky, above ``crown_u_min``, labelled), so vehicles, poles and fences count as "not tree" as
#: they do when the model runs; "building-tree": only those that both the rules (model off) and the
#: truth call building or tree (the first shipped models).
CROWN_PIXELS = ("applied", "building-tree")


def _samples(seg: Segmenter, bgr: np.ndarray, truth_small: np.ndarray, hrow=None, gaps: bool = False,
             pixels: str = "applied", extras: bool = False, context: bool = False):
    seg.run(bgr, hrow)
    if context:  # second score of a context model: the first model's planes and its crown map's layout
        h, w = seg.labels.shape
        ctx = np.zeros((len(CONTEXT_FEATURES), h, w), np.float32)
        CrownContext(h, w).fill(seg.crown, ctx)
        tf = np.concatenate([seg.tfeat, ctx])
    elif seg.crown_model is None:  # crown stage: the rules decide, the features are collected beside them
        tf = seg.crown_features(bgr)
        if extras:
            h, w = seg.labels.shape
            tf = np.concatenate([tf, np.zeros((len(EXTRA_FEATURES), h, w), np.float32)])
            CrownExtras(h, w).fill(seg.lab, seg.sky, tf)
    else:
        tf = seg.tfeat
    lab = seg.labels
    if gaps:  # sky-gap stage: pixels the segmenter (crown model on, gap model off) calls sky
        tf = np.concatenate([tf, seg.gap_features()])
        m = (lab == SKY) & np.isin(truth_small, (SKY, TREE))
    elif pixels == "applied":  # every labelled pixel the crown model is applied to (not sky, above u_min)
        m = (seg.feat[K.F_U] > seg.params.crown_u_min) & (seg.sky == 0) & (truth_small != 255) & \
            (truth_small != SKY)
    else:
        m = (seg.feat[K.F_U] > seg.params.crown_u_min) & np.isin(lab, (BUILDING, TREE)) & \
            np.isin(truth_small, (BUILDING, TREE))
    m[1::2, :] = False
    m[:, 1::2] = False
    return tf[:, m].T.astype(np.float64), truth_small[m] == TREE


def samples_from_folder(images: Path, labels: Path, lut: np.ndarray, ids: str, params, *, progress=None,
                        gaps: bool = False, pixels: str = "applied", extras: bool = False,
                        context: bool = False):
    """(x, y, names) from an image folder with label images of the same names (see the module docstring)."""
    files = sorted(p for p in Path(images).iterdir() if p.suffix.lower() in (".png", ".jpg", ".jpeg"))
    xs, ys, used = [], [], []
    seg = None
    for p in files:
        num = re.findall(r"\d+", p.stem)
        k = int(num[-1]) if num else 0
        if (ids == "even" and k % 2) or (ids == "odd" and k % 2 == 0):
            continue
        img = cv2.imread(str(p), cv2.IMREAD_COLOR)
        lp = Path(labels) / (p.stem + ".png")
        raw = cv2.imread(str(lp), cv2.IMREAD_GRAYSCALE)
        if img is None or raw is None:
            raise InputError(f"{p if img is None else lp}: unreadable image")
        if seg is None or seg.frame_size != (img.shape[1], img.shape[0]):
            seg = Segmenter((img.shape[1], img.shape[0]), params)
        truth = reduce_truth(raw, lut, seg.size)
        x, y = _samples(seg, img, truth, gaps=gaps, pixels=pixels, extras=extras, context=context)
        xs.append(x)
        ys.append(y)
        used.append(p.name)
        if progress:
            progress(f"{p.name}: {len(y)} samples")
    if not xs:
        raise InputError(f"{images}: no images selected")
    return np.concatenate(xs), np.concatenate(ys), used


def samples_from_run(run: Path, every: int, params, *, progress=None, gaps: bool = False,
                     pixels: str = "applied", extras: bool = False, context: bool = False):
    """(x, y, n_frames) from a run folder with labels/, segmented with its camera and IMU gravity."""
    from ..runfolder import RunFolder
    from .pipeline import Perception, PerceptionParams

    rf = RunFolder.open(run)
    perc = Perception(rf.camera, PerceptionParams(segment=params), warm_up=False)
    grid = perc.new_grid()
    xs, ys = [], []
    n = 0
    for i in range(0, len(rf), every):
        lab = rf.load_label(i)
        if lab is None:
            continue
        img = rf.load_frame(i)
        g = None
        if len(rf.imu):
            g = rf.imu[int(np.argmin(np.abs(rf.imu[:, 0] - rf.frame_t[i]))), 1:4]
        if perc.process(img, g, grid) != "ok":
            continue
        seg = perc.segmenter
        truth = reduce_truth(lab, _IDENTITY, seg.size)
        x, y = _samples(seg, img, truth, perc.horizon.copy(), gaps=gaps, pixels=pixels, extras=extras,
                        context=context)
        xs.append(x)
        ys.append(y)
        n += 1
    if progress:
        progress(f"{run}: {n} frames")
    if not xs:
        raise InputError(f"{run}: no labelled frames")
    return np.concatenate(xs), np.concatenate(ys), n


def _balanced(y: np.ndarray, share: float) -> np.ndarray:
    w = np.zeros(len(y))
    for c in (False, True):
        k = y == c
        if k.any():
            w[k] = share * 0.5 / k.sum()
    return w


def _git_commit() -> str:
    """Short hash of the tree the tool runs from (with "+changes" when files differ), or "" outside git."""
    import subprocess

    here = Path(__file__).resolve().parent
    try:
        h = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=here, capture_output=True, text=True,
                           timeout=10).stdout.strip()
        dirty = subprocess.run(["git", "status", "--porcelain", "--", "."], cwd=here, capture_output=True,
                               text=True, timeout=10).stdout.strip()
    except (OSError, subprocess.SubprocessError):
        return ""
    return h + ("+changes" if h and dirty else "")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(prog="python -m tinyloc.perception.crown_fit", description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--images", type=Path, help="folder of frames (PNG/JPEG)")
    ap.add_argument("--labels", type=Path, help="folder of label images with the frames' names (PNG)")
    ap.add_argument("--label-map", type=Path, help="tinyloc-label-map file for the label ids")
    ap.add_argument("--ids", choices=("even", "odd", "all"), default="even",
                    help="which frames of --images to use, by the number in the file name (default even)")
    ap.add_argument("--preset", default="street", help="segmentation preset for --images (default street)")
    ap.add_argument("--run", type=Path, nargs="*", default=[], help="run folders with labels/")
    ap.add_argument("--run-preset", default="sidewalk", help="segmentation preset for the runs (default sidewalk)")
    ap.add_argument("--run-every", type=int, default=10, help="use every N-th frame of a run (default 10)")
    ap.add_argument("--run-share", type=float, default=0.15, help="total weight of the runs, 0..1 (default 0.15)")
    ap.add_argument("--stage", choices=("crown", "gaps"), default="crown",
                    help="crown: the tree-vs-building score (crown model off while sampling); gaps: the sky-gap "
                         "score, sampled with --crown on (default crown)")
    ap.add_argument("--pixels", choices=CROWN_PIXELS, default="applied",
                    help="crown stage samples: applied = every labelled pixel the model scores at run time (not "
                         "sky, above crown_u_min); building-tree = only pixels both the rules and the truth call "
                         "building or tree (default applied)")
    ap.add_argument("--features", choices=("texture", "colour"), default="texture",
                    help="crown stage feature set: texture = crown_model.FEATURES; colour = those plus Lab a*, b*, "
                         "sky context and height products (crown_features.py). The gaps stage takes its --crown "
                         "model's (default texture)")
    ap.add_argument("--first", metavar="MODEL",
                    help="crown stage: fit the second score of a context model on top of this colour model "
                         "(sampled with it on; the written file holds both)")
    ap.add_argument("--crown", default="default", help="crown model used by the gaps stage (default: shipped)")
    ap.add_argument("--note", action="append", default=[], metavar="KEY=TEXT",
                    help="add KEY: TEXT to the file's provenance (repeatable; e.g. what the data are, the figures)")
    ap.add_argument("-o", "--out", type=Path, required=True, help="model file to write (JSON)")
    a = ap.parse_args(argv)

    def say(msg):
        print(msg, file=sys.stderr)

    gaps = a.stage == "gaps"
    context = bool(a.first) and not gaps
    crown = a.crown if gaps else (a.first if context else "")
    extras = a.features == "colour" and not gaps and not context
    what = ("pixels the segmenter (crown model on, gap model off) labels sky and the truth sky or tree" if gaps else
            "labelled pixels the crown model scores (not sky, above crown_u_min); tree against all other classes"
            if a.pixels == "applied" else
            "pixels labelled building or tree by both the rules and the truth, above crown_u_min")
    try:
        parts, prov = [], {"fitted": datetime.date.today().isoformat(), "method": "logistic regression, IRLS, L2 1e-2",
                           "stage": a.stage, "samples": what + ", every 2nd pixel in each direction",
                           "truth": "majority class of each raster cell's block of label pixels "
                                    "(labels_in block shares)"}
        commit = _git_commit()
        if commit:
            prov["commit"] = commit
        for item in a.note:
            key, sep, text = item.partition("=")
            if not sep or not key:
                raise InputError(f"--note {item!r}: expected KEY=TEXT")
            prov[key] = text
        share_img = 1.0 - a.run_share if a.run else 1.0
        if context and load_crown_model(a.first).features != COLOUR_FEATURES:
            raise InputError(f"--first {a.first}: not a colour model (fit one with --features colour)")
        if a.images:
            from .labels_in import load_label_map

            if not (a.labels and a.label_map):
                raise InputError("--images needs --labels and --label-map")
            p = dataclasses.replace(preset(a.preset), crown_model=crown, gap_model="")
            x, y, used = samples_from_folder(a.images, a.labels, load_label_map(a.label_map), a.ids, p,
                                             progress=None, gaps=gaps, pixels=a.pixels, extras=extras,
                                             context=context)
            parts.append((x, y, _balanced(y, share_img)))
            prov["image_folder"] = {"ids": a.ids, "frames": len(used), "first": used[0], "last": used[-1],
                                    "preset": a.preset, "samples": int(len(y)), "tree_share": float(y.mean()),
                                    "weight": share_img}
        if a.run:
            p = dataclasses.replace(preset(a.run_preset), crown_model=crown, gap_model="")
            rx, ry, info = [], [], []
            for r in a.run:
                x, y, n = samples_from_run(r, a.run_every, p, progress=say, gaps=gaps, pixels=a.pixels,
                                           extras=extras, context=context)
                rx.append(x)
                ry.append(y)
                info.append({"run": Path(r).name, "frames": n, "every": a.run_every})
            x, y = np.concatenate(rx), np.concatenate(ry)
            parts.append((x, y, _balanced(y, a.run_share if a.images else 1.0)))
            prov["runs"] = {"folders": info, "preset": a.run_preset, "samples": int(len(y)),
                            "tree_share": float(y.mean()), "weight": a.run_share if a.images else 1.0}
        if not parts:
            raise InputError("nothing to fit: give --images and/or --run")
        x = np.concatenate([q[0] for q in parts])
        y = np.concatenate([q[1] for q in parts])
        if y.all() or not y.any():
            raise InputError(f"all {len(y)} samples are {'tree' if y.any() else 'not tree'}: nothing to tell "
                             "apart (do the labels hold both classes where the stage samples?)")
        w = np.concatenate([q[2] for q in parts]) * len(y)
        first = None
        if gaps:
            features = load_crown_model(crown).features + GAP_EXTRA
        elif context:
            first = load_crown_model(a.first)
            features = first.features + CONTEXT_FEATURES
        else:
            features = COLOUR_FEATURES if extras else FEATURES
        prov["features"] = "context" if CONTEXT_FEATURES[0] in features else \
            "colour" if COLOUR_FEATURES[-1] in features else "texture"
        model = fit_crown_model(x, y, w, provenance=prov, features=features, first=first)
        z = model.score(x)
        acc_t = float(np.average(z[y] > 0, weights=w[y]))
        acc_b = float(np.average(z[~y] <= 0, weights=w[~y]))
        prov["fit_recall"] = {"tree": round(acc_t, 3), "other": round(acc_b, 3)}
        dataclasses.replace(model, provenance=prov).save(a.out)
        say(f"wrote {a.out}: {len(y)} samples, recall on the fitted samples: tree {acc_t:.3f}, other {acc_b:.3f}")
    except InputError as e:
        print(f"error: {e}", file=sys.stderr)
        return 2
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
