"""Perception on the accuracy benchmark's drives: pixel IoU, bird's-eye agreement and building evidence.

    python tests/_perception_drives.py [--seeds 11 12 13 14 15 16 17] [--every 15] [--preset sidewalk]
                                       [--set segment.KEY=VALUE] [--set overhead.KEY=VALUE] [--causes] [--json]

Reads the run folders that ``benchmarks/loop_accuracy.py`` generates and caches (``--work``,
default /tmp/tinyloc-acc; it skips with a message when a run is missing), takes every ``--every``-th
frame with its IMU gravity, and compares tinyloc's segmenter with the renderer's ray-cast labels
(``labels/``, the outside reference: the simulator's hidden world, a separate stage):

- pixel IoU per class at the frame's size (labels upsampled as ``tinyloc look`` does);
- bird's-eye agreement: the same frame's true labels through the same projector ("oracle" grid);
  per class, IoU of the cells whose strongest evidence (> 0.3) is that class, over the cells the
  oracle saw; and the confusion (oracle class -> ours) of the cells both saw;
- building evidence: our building cells (evidence > 0.3 and the strongest channel) within 1 m of an
  oracle building cell (SciPy's Euclidean distance transform), and the true class of the lowest three
  pixels of every building run whose foot lands within 20 m (where false building evidence comes from);
- with ``--causes``: every building run that the projector places as building (each column's runs
  projected alone, the other columns' feet hidden), counted by the true class of its pixels (block
  majority of the labels at the segmentation raster) and, for true building runs, whether its lowest
  three pixels are building too (a facade's own foot) or something in front of it.

A diagnostic for tuning on the TUNING drives (seeds 11-17); not a test.
"""

from __future__ import annotations

import argparse
import csv
import dataclasses
import json
import sys
from pathlib import Path

import cv2
import numpy as np
from scipy.ndimage import distance_transform_edt

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from tinyloc.camera.model import load_camera  # noqa: E402
from tinyloc.classes import BUILDING, CLASSES, GRASS, NUM_CLASSES, ROAD, SIDEWALK, SKY, TREE  # noqa: E402
from tinyloc.perception.overhead import IS_GROUND, OverheadParams  # noqa: E402
from tinyloc.perception.pipeline import Perception, PerceptionParams  # noqa: E402
from tinyloc.perception.segment import labels_at, preset  # noqa: E402

NAMES = [c.name for c in CLASSES]
GROUPS = {"sky": [SKY], "building": [BUILDING], "road": [ROAD], "sidewalk": [SIDEWALK], "grass": [GRASS],
          "tree": [TREE], "road+sidewalk": [ROAD, SIDEWALK], "vegetation": [TREE, GRASS]}
BEV = {"building": BUILDING, "road": ROAD, "sidewalk": SIDEWALK, "grass": GRASS}


def _value(v: str):
    for t in (int, float):
        try:
            return t(v)
        except ValueError:
            pass
    return v


def _feet_sources(perc, lab_small, counts, max_range_m=20.0):
    """Count the true class of the lowest 3 pixels of each building run standing on ground within range."""
    for j, i, top in _building_runs(perc.labels, perc.horizon):
        gp = perc.projector.pixel_to_ground(np.array([[j, i + 0.5]]))[0]
        if i - top >= 3 and np.hypot(*gp) <= max_range_m:
            counts[np.bincount(lab_small[i - 2:i + 1, j], minlength=256).argmax()] += 1


def _building_runs(L, hr):
    """(column, foot row, row above the top) of each building run standing on ground below the horizon."""
    h, w = L.shape
    for j in range(w):
        i = h - 2
        while i >= max(int(np.floor(hr[j])) + 1, 0):
            if L[i, j] == BUILDING and IS_GROUND[L[i + 1, j]]:
                top = i
                while top >= 0 and L[top, j] == BUILDING:
                    top -= 1
                yield j, i, top
                i = top
            else:
                i -= 1


def _block_majority(lab, w, h):
    """Majority class of each (H/h) x (W/w) block of a label image (the truth at the raster's size)."""
    big_h, big_w = lab.shape
    fy, fx = big_h // h, big_w // w
    b = lab[:h * fy, :w * fx].reshape(h, fy, w, fx).transpose(0, 2, 1, 3).reshape(h * w, fy * fx)
    return np.array([np.bincount(r, minlength=256).argmax() for r in b], np.uint8).reshape(h, w)


def _placed_causes(perc, truth_small, counts):
    """Count each building run placed as building by the true class of its pixels (see the module doc).

    Each run is projected alone: every other foot is hidden by turning the ground pixels below the
    horizon into "unlabelled" (neither ground nor object, a gap for the top's bridging) in the other
    columns and above the run in its own column, and the objects below it into its foot's ground.
    """
    L, hr = perc.labels, perc.horizon
    h, w = L.shape
    ground_below = (np.arange(h)[:, None] > np.floor(hr)[None, :]) & IS_GROUND[L].astype(bool)
    grid = perc.new_grid()
    for j, i, top in _building_runs(L, hr):
        if i - top >= perc.params.overhead.min_run_px:
            alone = L.copy()
            hide = ground_below.copy()
            hide[i + 1:, j] = False
            alone[hide] = 255
            alone[i + 1:, j] = L[i + 1, j]
            perc.projector.project(perc.probs, alone, perc._level, hr, grid, tilted=True, lab=perc.segmenter.lab)
            if grid.evidence[BUILDING].max() > 0:
                t = int(np.bincount(truth_small[top + 1:i + 1, j], minlength=256).argmax())
                run_c = NAMES[t] if t < len(NAMES) else "unlabelled"
                if run_c == "building":
                    foot = np.bincount(truth_small[max(i - 2, top + 1):i + 1, j], minlength=256).argmax()
                    run_c = "building, own foot" if foot == BUILDING else "building, foot of something in front"
                counts[run_c] = counts.get(run_c, 0) + 1


def analyse(seeds, *, every=15, segment=None, overhead=None, work="/tmp/tinyloc-acc", causes=False):
    """Figures (dict) over every ``every``-th frame of the cached drives of ``seeds``."""
    segment = segment if segment is not None else preset("sidewalk")
    overhead = overhead if overhead is not None else OverheadParams()
    conf = np.zeros((256, 256), np.int64)
    bconf = np.zeros((NUM_CLASSES, NUM_CLASSES), np.int64)
    bev = {k: np.zeros(2, np.int64) for k in BEV}
    feet = np.zeros(256, np.int64)
    cells = dict(ours=0, near=0, oracle=0, found=0)
    lut = np.full(256, 255, np.uint8)
    lut[:NUM_CLASSES] = np.arange(NUM_CLASSES)
    used = []
    placed = {}
    for seed in seeds:
        run = Path(work) / f"run{seed}_300"
        if not (run / "labels").is_dir():
            print(f"seed {seed}: no run with labels at {run} (run benchmarks/loop_accuracy.py first)", file=sys.stderr)
            continue
        used.append(seed)
        cam = load_camera(run / "camera.toml")
        imu = np.loadtxt(run / "imu.csv", delimiter=",", skiprows=1, ndmin=2)
        with open(run / "frames.csv", newline="") as f:
            rows = list(csv.DictReader(f))[::every]
        perc = Perception(cam, PerceptionParams(segment=segment, overhead=overhead))
        ours, oracle = perc.new_grid(), perc.new_grid()
        sw, sh = perc.segmenter.size
        for row in rows:
            img = cv2.imread(str(run / row["file"]), cv2.IMREAD_COLOR)
            lab = cv2.imread(str(run / "labels" / Path(row["file"]).name), cv2.IMREAD_GRAYSCALE)
            grav = imu[int(np.argmin(np.abs(imu[:, 0] - float(row["t"])))), 1:4]
            perc.process(img, grav, ours)
            pred = labels_at(perc.probs, (cam.width, cam.height))
            np.add.at(conf, (lab.ravel(), pred.ravel()), 1)
            _feet_sources(perc, cv2.resize(lab, (sw, sh), interpolation=cv2.INTER_NEAREST), feet)
            if causes:
                _placed_causes(perc, _block_majority(lab, sw, sh), placed)
            perc.process_labels(lab, grav, oracle, lut)
            seen = oracle.visible > 0
            o_best = np.where(oracle.evidence.max(0) > 0.3, oracle.evidence.argmax(0), 254)
            u_best = np.where((ours.visible > 0) & (ours.evidence.max(0) > 0.3), ours.evidence.argmax(0), 255)
            for k, c in BEV.items():
                a, b = seen & (u_best == c), seen & (o_best == c)
                bev[k] += np.count_nonzero(a & b), np.count_nonzero(a | b)
            both = seen & (o_best < NUM_CLASSES) & (u_best < NUM_CLASSES)
            np.add.at(bconf, (o_best[both], u_best[both]), 1)
            ob = o_best == BUILDING
            ub = u_best == BUILDING
            d_o = distance_transform_edt(~ob) * ours.res_m if ob.any() else np.full(ob.shape, 1e9)
            d_u = distance_transform_edt(~ub) * ours.res_m if ub.any() else np.full(ob.shape, 1e9)
            cells["ours"] += int(ub.sum())
            cells["near"] += int((ub & (d_o <= 1.0)).sum())
            cells["oracle"] += int(ob.sum())
            cells["found"] += int((ob & (d_u <= 1.0)).sum())
    iou = {}
    for k, cs in GROUPS.items():
        tp = conf[np.ix_(cs, cs)].sum()
        iou[k] = round(float(tp / max(conf[cs].sum() + conf[:, cs].sum() - tp, 1)), 3)
    return {"seeds": used, "every": every, "pixel_iou": iou,
            "bev_iou_vs_true_labels": {k: round(float(v[0] / max(v[1], 1)), 3) for k, v in bev.items()},
            "bev_confusion_true_to_ours": {NAMES[r]: {NAMES[c]: int(bconf[r, c]) for c in range(NUM_CLASSES)
                                                      if bconf[r, c] > 0.01 * bconf[r].sum()}
                                           for r in range(NUM_CLASSES) if bconf[r].sum()},
            "building_cells": cells,
            "building_feet_true_class": {NAMES[i] if i < len(NAMES) else str(i): int(n)
                                         for i, n in enumerate(feet) if n},
            **({"building_runs_placed_by_true_class": dict(sorted(placed.items(), key=lambda t: -t[1]))}
               if causes else {})}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--seeds", type=int, nargs="+", default=[11, 12, 13, 14, 15, 16, 17])
    ap.add_argument("--every", type=int, default=15)
    ap.add_argument("--preset", default="sidewalk")
    ap.add_argument("--work", default="/tmp/tinyloc-acc")
    ap.add_argument("--set", action="append", default=[], help="segment.KEY=VALUE or overhead.KEY=VALUE")
    ap.add_argument("--causes", action="store_true", help="count the placed building runs by true class (slow)")
    ap.add_argument("--json", action="store_true")
    a = ap.parse_args(argv)
    seg, ov = {}, {}
    for s in a.set:
        key, _, val = s.partition("=")
        part, _, name = key.partition(".")
        {"segment": seg, "overhead": ov}[part][name] = _value(val)
    out = analyse(a.seeds, every=a.every, segment=dataclasses.replace(preset(a.preset), **seg),
                  overhead=OverheadParams(**ov), work=a.work, causes=a.causes)
    if a.json:
        print(json.dumps(out))
    else:
        for k, v in out.items():
            print(f"{k}: {v}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
