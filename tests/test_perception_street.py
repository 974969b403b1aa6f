"""Segmentation quality on the labelled street-image set (real camera frames with per-pixel labels).

Outside reference: the set's own hand-made labels (see its README beside the data; it is kept outside the
project and used for evaluation only). Its classes are mapped to ours once, as its README suggests:
sky -> sky; building -> building; fence -> fence; road -> road; pavement -> sidewalk; tree (also bushes)
-> vegetation (our tree and grass together); pole and sign -> pole; car, pedestrian, bicyclist ->
dynamic; unlabelled -> left out of scoring. Every labelled pixel counts: pixels of classes we do not
detect (vehicles, people) count against whatever class we give them.

The thresholds were tuned on every 4th image of this folder (ids 0, 4, 8, ...) together with rendered
frames of simulated sites 1 and 2, and the crown model (the linear tree-vs-building texture score of
the "street" preset, tinyloc/perception/crown_default.json), its threshold and the sky-gap model
(crown_gaps_default.json) were fitted and chosen on the even ids with simulated drives of sites 11 and
12; the odd ids were never used for tuning or fitting, so their figures are reported separately.
Floors are the measured IoU minus about 0.02 (docs/perception-real.md has the tables and commands).
The issue's goal (road/sidewalk, building, vegetation and sky each >= 0.5) is met on the odd ids with
the `street` preset's context models (a second score on the layout of the colour model's crown map,
the default since they measured best: vegetation 0.568); the earlier models are checked on the odd
ids too: the colour models (Lab a*, b*, sky context and height products; 0.536) and the first texture
models (crown_model / gap_model "default"; vegetation 0.504).
"""

import dataclasses

import cv2
import numpy as np
import pytest

from conftest import require_street_seg
from tinyloc.classes import BUILDING, DYNAMIC, FENCE, GRASS, POLE, ROAD, SIDEWALK, SKY, TREE
from tinyloc.perception.segment import Segmenter, labels_at, preset

# The set's index -> ours (255 = not scored).
SET_TO_OURS = np.array([SKY, BUILDING, POLE, ROAD, SIDEWALK, TREE, POLE, FENCE, DYNAMIC, DYNAMIC, DYNAMIC, 255],
                       np.uint8)
GROUPS = {"sky": [SKY], "building": [BUILDING], "road": [ROAD], "sidewalk": [SIDEWALK],
          "road+sidewalk": [ROAD, SIDEWALK], "vegetation": [TREE, GRASS], "pole": [POLE], "fence": [FENCE]}
# Measured on this folder with the "street" preset (see docs/perception.md), minus a margin.
FLOORS_ALL = {"sky": 0.78, "building": 0.60, "road": 0.73, "road+sidewalk": 0.82, "vegetation": 0.55}
FLOORS_UNSEEN = {"sky": 0.78, "building": 0.59, "road": 0.74, "road+sidewalk": 0.82, "vegetation": 0.55}
FLOORS_FIRST_UNSEEN = {"sky": 0.78, "building": 0.57, "road": 0.74, "road+sidewalk": 0.82, "vegetation": 0.48}
FLOORS_COLOUR_UNSEEN = {"sky": 0.78, "building": 0.57, "road": 0.74, "road+sidewalk": 0.82, "vegetation": 0.51}


def street_counts(root, ids, params):
    """Per image and class group: (intersection, union) pixel counts, shape (len(ids), len(GROUPS), 2)."""
    out = np.zeros((len(ids), len(GROUPS), 2), np.int64)
    seg = None
    for n, i in enumerate(ids):
        img = cv2.imread(str(root / "images" / f"{i:04d}.png"), cv2.IMREAD_COLOR)
        raw = cv2.imread(str(root / "labels" / f"{i:04d}.png"), cv2.IMREAD_GRAYSCALE)
        if img is None or raw is None:
            raise FileNotFoundError(f"{root}: image or label {i:04d} unreadable")
        gt = SET_TO_OURS[np.minimum(raw, 11)]
        if seg is None:
            seg = Segmenter((img.shape[1], img.shape[0]), params)
        probs, _ = seg.run(img)
        pred = labels_at(probs, (img.shape[1], img.shape[0]))
        m = gt != 255
        for g, cs in enumerate(GROUPS.values()):
            a = np.isin(pred, cs) & m
            b = np.isin(gt, cs) & m
            out[n, g] = np.count_nonzero(a & b), np.count_nonzero(a | b)
    return out


def iou_of(counts):
    tot = counts.sum(axis=0)
    return {k: tot[g, 0] / tot[g, 1] if tot[g, 1] else float("nan") for g, k in enumerate(GROUPS)}


@pytest.fixture(scope="module")
def counts():
    root = require_street_seg()
    n = len(list((root / "images").glob("*.png")))
    return street_counts(root, list(range(n)), preset("street"))


def test_street_iou_whole_folder(counts):
    iou = iou_of(counts)
    print("IoU (all images):", {k: round(v, 3) for k, v in iou.items()})
    for k, floor in FLOORS_ALL.items():
        assert iou[k] >= floor, (k, iou[k])


def test_street_iou_images_not_used_for_tuning(counts):
    iou = iou_of(counts[1::2])
    print("IoU (odd ids, never tuned on):", {k: round(v, 3) for k, v in iou.items()})
    for k, floor in FLOORS_UNSEEN.items():
        assert iou[k] >= floor, (k, iou[k])


@pytest.mark.parametrize("model,floors", [("colour", FLOORS_COLOUR_UNSEEN), ("default", FLOORS_FIRST_UNSEEN)],
                         ids=["colour models", "first texture models"])
def test_earlier_models_on_images_not_used_for_tuning(model, floors):
    root = require_street_seg()
    p = dataclasses.replace(preset("street"), crown_model=model, gap_model=model)
    iou = iou_of(street_counts(root, list(range(1, 184, 2)), p))
    print(f"IoU (odd ids, crown/gap models {model!r}):", {k: round(v, 3) for k, v in iou.items()})
    for k, floor in floors.items():
        assert iou[k] >= floor, (k, iou[k])
