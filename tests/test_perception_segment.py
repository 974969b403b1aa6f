"""The segmenter's kernels against the plain-NumPy reference (tests/_perception_reference.py)."""

import cv2
import numpy as np
import pytest

from _perception_reference import segment_reference
from test_perception_frames import _street_like
from tinyloc.errors import InputError
from tinyloc.perception.segment import PRESETS, SegmentParams, Segmenter, preset, segment_image


def _frames():
    rng = np.random.default_rng(4)
    yield "street-like", cv2.resize(_street_like(seed=2), (480, 360))
    noise = rng.integers(0, 256, (240, 320, 3)).astype(np.uint8)
    yield "noise", noise
    smooth = cv2.GaussianBlur(noise, (0, 0), 6)
    yield "smooth noise", smooth
    dull = cv2.resize(_street_like(seed=5), (480, 360))
    dull[:120] = np.clip(rng.normal(0, 1.5, (120, 480, 3)) + (140, 141, 143), 0, 255).astype(np.uint8)
    yield "overcast", dull  # a grey sky darker than sky_v: only the sky-by-colour rule takes it


CASES = {**{n: preset(n) for n in PRESETS},
         "poles and fences on": SegmentParams(pole_contrast=0.05, pole_run=0.1, fence_top=0.08, crown_model=""),
         "crown model on": SegmentParams(crown_model="default", gap_model=""),
         "crown and sky-gap models on": SegmentParams(crown_model="default", gap_model="default"),
         "sky by colour on": SegmentParams(sky_ref_dist=20.0, crown_model=""),
         # a low gap threshold and no nearness condition make the sky-gap model fire on the street-like
         # frame's sky, so it is compared
         "sky-gap model, low threshold": SegmentParams(gap_threshold=0.5, gap_near=0.0),
         "crown model off": SegmentParams(crown_model="")}


@pytest.mark.parametrize("name", list(CASES))
def test_kernels_match_reference(name):
    p = CASES[name]
    seen = set()
    for what, img in _frames():
        seg = Segmenter((img.shape[1], img.shape[0]), p)
        hrow = np.linspace(0.45, 0.6, seg.size[0]) * seg.size[1]
        probs, labels = seg.run(img, hrow)
        rp, rl = segment_reference(img, p, hrow)
        # the kernel's logistic is a table (error < 3e-6): a few near-ties may flip
        assert np.mean(labels != rl) < 0.002, (what, np.mean(labels != rl))
        same = labels == rl
        assert np.max(np.abs(probs[:, same] - rp[:, same])) < 1e-4, what
        assert np.allclose(probs.sum(axis=0)[same], rp.sum(axis=0)[same], atol=1e-5)
        seen |= set(np.unique(labels).tolist())
    if name == "poles and fences on":
        assert {5, 6} <= seen  # both optional rules fired on these frames, so they were compared
    if name == "sky by colour on":  # the overcast frame's sky is taken by colour only
        img = list(_frames())[-1][1]
        hrow = np.linspace(0.45, 0.6, 160) * 120
        on = Segmenter((480, 360), p).run(img, hrow)[1]
        off = Segmenter((480, 360), SegmentParams(crown_model="")).run(img, hrow)[1]
        assert np.mean(on[:35] == 9) > 0.9 and np.mean(off[:35] == 9) < 0.1
    if name == "crown model on":
        assert {0, 4} <= seen  # the crown model split building from tree on these frames
    if name == "sky-gap model, low threshold":
        seg = Segmenter((480, 360), p)
        img = next(_frames())[1]
        hrow = np.linspace(0.45, 0.6, seg.size[0]) * seg.size[1]
        _, lab = seg.run(img, hrow)
        off = Segmenter((480, 360), SegmentParams(gap_model="")).run(img, hrow)[1]
        assert np.sum(lab != off) > 500  # the gap model relabelled sky, and the result matched the reference


def test_probabilities_are_valid():
    img = cv2.resize(_street_like(seed=3), (640, 480))
    probs, labels, full = segment_image(img)
    assert probs.shape == (11, 120, 160) and labels.shape == (120, 160) and full.shape == (480, 640)
    assert probs.min() >= 0.0 and probs.max() <= 1.0 + 1e-6
    s = probs.sum(axis=0)
    assert np.all((np.abs(s - 1.0) < 1e-5) | (s == 0))


def test_params_validated():
    with pytest.raises(InputError, match="segmentation width"):
        SegmentParams(width=8)
    with pytest.raises(InputError, match="robot_on"):
        SegmentParams(robot_on="lawn")
    with pytest.raises(InputError, match="unknown segmentation preset"):
        preset("moon")
    with pytest.raises(InputError, match="must be finite"):
        SegmentParams(sky_v=float("nan"))
    with pytest.raises(InputError, match="expected an"):
        segment_image(np.zeros((10, 10), np.uint8))
