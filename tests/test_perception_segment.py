"""The segmenter's kernels against the plain-NumPy reference (tests/_perception_reference.py)."""

from dataclasses import replace

import cv2
import numpy as np
import pytest

from _perception_reference import segment_reference
from test_perception_frames import _street_like
from tinyloc.classes import GRASS, ROAD, SIDEWALK
from tinyloc.errors import InputError
from tinyloc.perception.features import exg_minus_exr
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
    yield "facade with a dark base", _plinth_frame()  # the base-band rule (wall_base) changes many pixels
    yield "facade behind a dark strip", _plinth_frame(strip=True)  # ... and here its side check undoes it
    yield "vehicle on the road", _vehicle_frame()  # the dark-gap rule (wall_dark) changes many pixels


def _plinth_frame(seed=3, strip=False):
    """480 x 360: sky, paving below the test's horizon (0.45 .. 0.6 of the raster's height, 160 x 120), and
    from raster column 80 on a facade whose lower edge and dark base band are lines through the horizon's
    left end at depths 0.12 and 0.24 raster rows per column (the band's top at half its bottom's depth).
    With ``strip`` the dark band goes on from column 40, beside the facade: a strip of ground in front."""
    rng = np.random.default_rng(seed)
    width, height = 480, 360
    hrow = np.linspace(0.45, 0.6, 160) * 120
    img = np.empty((height, width, 3), np.float64)
    img[:] = (235, 215, 190)
    rows, j = np.arange(height)[:, None], np.arange(width)[None, :] // 3
    hz = (hrow[j] + 0.5) * 3
    img[np.broadcast_to(rows > hz, (height, width))] = (165, 165, 165)
    fac = j >= 80
    top, bot = hz + 0.36 * j, hz + 0.72 * j
    img[np.broadcast_to(fac & (rows <= top), (height, width))] = (120, 130, 140)
    img[np.broadcast_to((j >= (40 if strip else 80)) & (rows > top) & (rows <= bot), (height, width))] = (70, 72, 72)
    img += rng.normal(0, 2.0, img.shape)
    return np.clip(img, 0, 255).astype(np.uint8)


def _vehicle_frame(seed=6):
    """480 x 360: sky, asphalt below the test's horizon (0.45 .. 0.6 of the raster's height, 160 x 120) and
    from raster column 30 to 100 a grey body (a parked van's side) from 10 raster rows above the
    horizon down to 12 rows below it, then the dark gap under it (6 raster rows, L about 20) on the road,
    and lighter paving (the robot's surface) from 24 rows below the horizon."""
    rng = np.random.default_rng(seed)
    width, height = 480, 360
    hrow = np.linspace(0.45, 0.6, 160) * 120
    img = np.empty((height, width, 3), np.float64)
    img[:] = (235, 215, 190)
    rows, j = np.arange(height)[:, None] / 3.0, np.arange(width)[None, :] // 3
    hz = hrow[j] + 0.5
    img[np.broadcast_to(rows > hz, (height, width))] = (95, 95, 95)
    img[np.broadcast_to(rows > hz + 24, (height, width))] = (175, 178, 180)
    body = (j >= 30) & (j < 100)
    img[np.broadcast_to(body & (rows > hz - 10) & (rows <= hz + 12), (height, width))] = (120, 130, 140)
    img[np.broadcast_to(body & (rows > hz + 12) & (rows <= hz + 18), (height, width))] = (22, 22, 24)
    img += rng.normal(0, 2.0, img.shape)
    return np.clip(img, 0, 255).astype(np.uint8)


CASES = {**{n: preset(n) for n in PRESETS},
         "poles and fences on": SegmentParams(pole_contrast=0.05, pole_run=0.1, fence_top=0.08, crown_model=""),
         "crown model on": SegmentParams(crown_model="default", gap_model=""),
         "crown and sky-gap models on": SegmentParams(crown_model="default", gap_model="default"),
         "sky by colour on": SegmentParams(sky_ref_dist=20.0, crown_model=""),
         # a low gap threshold and no nearness condition make the sky-gap model fire on the street-like
         # frame's sky, so it is compared
         "sky-gap model, low threshold": SegmentParams(gap_threshold=0.5, gap_near=0.0),
         "crown model off": SegmentParams(crown_model=""),
         # the soil rule and the per-frame surface decision (on in "sidewalk"), each alone on the default set
         "soil rule on": SegmentParams(soil_b=3.0, crown_model=""),
         "surface decided per frame": SegmentParams(surface_auto=5.0, surface_share=0.005, crown_model=""),
         "surface with the darker-paving guard": SegmentParams(surface_auto=5.0, surface_share=0.005,
                                                               surface_dark=0.05, crown_model=""),
         "facades starting above the horizon": replace(preset("sidewalk"), wall_reach=2),
         "facade base bands": replace(preset("sidewalk"), wall_base=0.6),
         "dark gaps under objects": replace(preset("sidewalk"), wall_dark=0.5),
         "dark gaps and base bands": replace(preset("sidewalk"), wall_dark=0.5, wall_base=0.6, wall_reach=2),
         # the paving-joint decision alone (no lightness rule), and a threshold the noise frame's patch passes
         "paving joints alone": replace(preset("sidewalk"), surface_auto=0.0, surface_joints=0.02),
         "paving joints, high share": replace(preset("sidewalk"), surface_joints=0.9)}


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
    if name in ("soil rule on", "surface decided per frame"):  # the rule changed labels, so it was compared
        img = list(_frames())[1][1]
        hrow = np.linspace(0.45, 0.6, 160) * 120
        off = Segmenter((320, 240), SegmentParams(crown_model="")).run(img, hrow)[1]
        assert np.sum(Segmenter((320, 240), p).run(img, hrow)[1] != off) > 100
    if name == "poles and fences on":
        assert {5, 6} <= seen  # both optional rules fired on these frames, so they were compared
    if name == "sky by colour on":  # the overcast frame's sky is taken by colour only
        img = dict(_frames())["overcast"]
        hrow = np.linspace(0.45, 0.6, 160) * 120
        on = Segmenter((480, 360), p).run(img, hrow)[1]
        off = Segmenter((480, 360), SegmentParams(crown_model="")).run(img, hrow)[1]
        assert np.mean(on[:35] == 9) > 0.9 and np.mean(off[:35] == 9) < 0.1
    if name == "facade base bands":  # the band rule moved feet on the facade frame, so it was compared
        img = dict(_frames())["facade with a dark base"]
        hrow = np.linspace(0.45, 0.6, 160) * 120
        off = Segmenter((480, 360), preset("sidewalk")).run(img, hrow)[1]
        assert np.sum(Segmenter((480, 360), p).run(img, hrow)[1] != off) > 400
        img = dict(_frames())["facade behind a dark strip"]
        off = Segmenter((480, 360), preset("sidewalk")).run(img, hrow)[1]
        assert np.sum(Segmenter((480, 360), p).run(img, hrow)[1] != off) == 0
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
    with pytest.raises(InputError, match="wall_reach"):
        SegmentParams(wall_reach=-1)
    with pytest.raises(InputError, match="wall_reach"):
        SegmentParams(wall_reach=1.5)
    with pytest.raises(InputError, match="wall_base"):
        SegmentParams(wall_base=-0.1)
    with pytest.raises(InputError, match="wall_base"):
        SegmentParams(wall_base=1.0)  # a band as tall as the camera reaches the horizon: no bound at all
    SegmentParams(wall_base=0.0), SegmentParams(wall_base=0.99)


def _ground_frame(ground_bgr, patch_bgr=None, side_bgr=None, side_cols=(0, 40)):
    """A 160 x 120 frame (the raster's own size): brick-red wall above row 50, ``ground_bgr`` below, the
    robot's bottom-centre patch in ``patch_bgr`` and a block of ``side_bgr`` on the left (rows 70..119)."""
    img = np.zeros((120, 160, 3), np.uint8)
    img[:50] = (50, 60, 150)  # brick red: not carried down onto the grey ground by the facade rule
    img[50:] = ground_bgr
    if side_bgr is not None:
        img[70:, side_cols[0]:side_cols[1]] = side_bgr
    if patch_bgr is not None:
        img[95:, 50:110] = patch_bgr
    return img


HROW = np.full(160, 49.5)


def test_soil_rule_hand_worked():
    """Yellowish bare ground beside grey paving is grass with the soil rule, paving without it.

    Hand-worked: BGR (60, 120, 150) has chromatic r = 150/330, g = 120/330, b = 60/330, so ExG - ExR =
    (2g - r - b) - (1.4r - g) = 3g - 2.4r - b = (360 - 360 - 60)/330 = -0.182, below the vegetation threshold
    (not green); its b* (OpenCV's 8-bit Lab, the reference) is far above that of the grey paving.
    """
    paving, soil = (120, 125, 130), (60, 120, 150)
    lab = cv2.cvtColor(np.array([[paving, soil]], np.uint8), cv2.COLOR_BGR2Lab).astype(float)[0]
    db = lab[1, 2] - lab[0, 2]
    assert db > 20.0  # well above soil_b = 6
    exgr = float(exg_minus_exr(np.array([[soil]], np.uint8))[0, 0])
    assert abs(exgr - (-60.0 / 330.0)) < 1e-9 and exgr < preset("sidewalk").green0
    img = _ground_frame(paving, side_bgr=soil)
    # (the paving-joint decision off: this hand-made paving is smooth and would be taken for asphalt)
    on = Segmenter((160, 120), replace(preset("sidewalk"), soil_b=6.0, surface_joints=0.0)).run(img, HROW)[1]
    off = Segmenter((160, 120), replace(preset("sidewalk"), soil_b=0.0, surface_joints=0.0)).run(img, HROW)[1]
    assert np.all(on[75:, 2:38] == GRASS)
    assert not np.any(off[75:, 2:38] == GRASS)
    # the paving itself is untouched (its b* equals the reference's)
    assert np.all(on[75:, 60:100] == SIDEWALK) and np.all(off[75:, 60:100] == SIDEWALK)


@pytest.mark.parametrize("patch, side, expect", [((60, 60, 62), (140, 145, 150), "road"),
                                                  ((140, 145, 150), (60, 60, 62), "sidewalk")])
def test_surface_decided_per_frame(patch, side, expect):
    """The robot on dark asphalt with lighter paving beside it is on the road (a crossing); on paving with
    darker asphalt beside it, on the sidewalk. The other surface gets the other paved class."""
    p = replace(preset("sidewalk"), surface_auto=20.0, surface_joints=0.0)  # the lightness rule alone
    lab = cv2.cvtColor(np.array([[patch, side]], np.uint8), cv2.COLOR_BGR2Lab).astype(float)[0]
    assert abs(lab[1, 0] - lab[0, 0]) > 2 * 20.0  # lightness apart by far more than the margin
    other = {"road": SIDEWALK, "sidewalk": ROAD}[expect]
    mine = {"road": ROAD, "sidewalk": SIDEWALK}[expect]
    for ground in (patch, side):  # the rest of the ground either surface: the decision does not depend on it
        seg = Segmenter((160, 120), p)
        lab_img = seg.run(_ground_frame(ground, patch_bgr=patch, side_bgr=side), HROW)[1]
        assert seg.surface == expect
        assert np.all(lab_img[100:, 60:100] == mine)
        assert np.all(lab_img[75:, 2:38] == other)


def test_surface_kept_without_other_paving():
    """Only the robot's own surface in view (or too little of the other): the preset's robot_on stands."""
    p = replace(preset("sidewalk"), surface_auto=20.0, surface_joints=0.0)  # the lightness rule alone
    seg = Segmenter((160, 120), p)
    seg.run(_ground_frame((60, 60, 62)), HROW)
    assert seg.surface == "sidewalk"
    seg.run(_ground_frame((60, 60, 62), side_bgr=(140, 145, 150), side_cols=(0, 2)), HROW)  # 100 px < 2 %
    assert seg.surface == "sidewalk"


@pytest.mark.parametrize("keep, expect", [(False, "sidewalk"), (True, "road")])
def test_surface_kept_from_previous_frame(keep, expect):
    """With surface_keep, an undecided frame keeps the previous frame's surface instead of robot_on."""
    seg = Segmenter((160, 120), replace(preset("sidewalk"), surface_auto=20.0, surface_keep=keep, surface_joints=0.0))
    seg.run(_ground_frame((60, 60, 62), patch_bgr=(60, 60, 62), side_bgr=(140, 145, 150)), HROW)
    assert seg.surface == "road"
    seg.run(_ground_frame((60, 60, 62)), HROW)  # only asphalt in view: undecided
    assert seg.surface == expect


def test_surface_not_road_when_darker_paving_in_view():
    """The robot on paving in a shadow: sunlit paving beyond is lighter (alone it would say "on the road"),
    but asphalt darker than the patch is in view too, and asphalt is the darkest paving. With
    ``surface_dark`` the frame is not called "on the road" once at least that share of the other paved
    pixels is clearly darker; the share is tested at its limit (read from the segmenter's histogram)."""
    shade, sunlit, asphalt = (100, 100, 102), (170, 175, 180), (40, 40, 42)
    lab = cv2.cvtColor(np.array([[shade, sunlit, asphalt]], np.uint8), cv2.COLOR_BGR2Lab).astype(float)[0]
    assert lab[1, 0] - lab[0, 0] > 20.0 and lab[0, 0] - lab[2, 0] > 20.0  # both beyond surface_auto
    img = _ground_frame(shade, patch_bgr=shade, side_bgr=sunlit, side_cols=(0, 60))
    img[70:, 130:] = asphalt  # less of it than of the sunlit paving: the median is the sunlit paving's
    seg = Segmenter((160, 120), replace(preset("sidewalk"), surface_auto=20.0, surface_joints=0.0))
    seg.run(img, HROW)
    assert seg.surface == "road"  # the known failure without the guard
    n = int(seg.hist[0].sum())
    dark = int(seg.hist[0, :int(seg.ref[0] - 20.0) + 1].sum())
    assert 0 < dark < n / 2
    share = dark / n
    for lim, expect in ((share - 0.01, "sidewalk"), (share + 0.01, "road")):
        seg = Segmenter((160, 120), replace(preset("sidewalk"), surface_auto=20.0, surface_dark=lim, surface_joints=0.0))
        seg.run(img, HROW)
        assert seg.surface == expect, (lim, share)
    # the robot truly on asphalt (nothing darker in view) is still on the road with the guard
    seg = Segmenter((160, 120), replace(preset("sidewalk"), surface_auto=20.0, surface_dark=0.05, surface_joints=0.0))
    seg.run(_ground_frame(asphalt, patch_bgr=asphalt, side_bgr=sunlit), HROW)
    assert seg.surface == "road"


def _wall_column_case(reach, *, start_row, foot_l=60.0, facade_l=120.0, ref_l=200.0, edge_row=None):
    """One hand-made column for the facade carry (kernel ``extend_walls``): 12 rows, horizon at row 5.3
    (so the horizon pixel is row 5), building from row 0 to ``start_row``, sidewalk below it; Lab of
    the facade ``facade_l`` (a = b = 128) down to row 8 and ``foot_l`` from row 9 (its foot) unless an
    edge is drawn instead at ``edge_row``; the robot's surface has lightness ``ref_l``."""
    from tinyloc.perception import _kernels as K
    from tinyloc.perception.segment import _IS_GROUND
    from tinyloc.classes import BUILDING, SIDEWALK, NUM_CLASSES

    h, w = 12, 1
    labels = np.full((h, w), SIDEWALK, np.uint8)
    labels[:start_row + 1] = BUILDING
    lab = np.full((h, w, 3), 128, np.uint8)
    lab[:, :, 0] = int(facade_l)
    if edge_row is None:
        lab[9:, :, 0] = int(foot_l)
    feat = np.zeros((K.NF, h, w), np.float32)
    if edge_row is not None:
        feat[K.F_GY, edge_row] = 0.5
    probs = np.zeros((NUM_CLASSES, h, w), np.float32)
    probs[SIDEWALK] = 1.0
    probs[BUILDING, :start_row + 1], probs[SIDEWALK, :start_row + 1] = 1.0, 0.0
    ref = np.array([ref_l, 128.0, 128.0])
    # the dark-gap rule (on in "sidewalk") off: a band at half the facade's lightness would also be a dark gap
    prm = replace(preset("sidewalk"), wall_reach=reach, wall_dark=0.0).vector()
    K.extend_walls(feat, lab, np.array([5.3]), ref, prm, _IS_GROUND, probs, labels, np.zeros((3, 1), np.int32))
    return labels[:, 0], probs


@pytest.mark.parametrize("reach, start_row, carried", [
    (0, 4, False),   # off: the horizon pixel (row 5) is sidewalk, so nothing is carried (the old rule)
    (1, 4, True),    # the facade starts one row above the horizon pixel: carried down to its foot (row 9)
    (2, 3, True),    # two rows above, within reach 2
    (1, 3, False),   # two rows above, one past reach 1
    (2, 2, False),   # three rows above, one past reach 2
])
def test_wall_reach_hand_worked(reach, start_row, carried):
    from tinyloc.classes import BUILDING, SIDEWALK

    labels, probs = _wall_column_case(reach, start_row=start_row)
    # worked by hand: the facade colour is L 120 from row 0 to 8 (distance 0 to its own mean), the foot row
    # 9 is L 60 (distance 0.5 * 60 = 30 > wall_dist 13.1), the robot's surface L 200 is far (0.8 * 80 = 64)
    want = np.full(12, SIDEWALK)
    want[:start_row + 1] = BUILDING
    if carried:
        want[:9] = BUILDING
    assert labels.tolist() == want.tolist()
    assert np.all(probs[BUILDING, want == BUILDING] == 1.0)
    assert np.all(probs[SIDEWALK, want == SIDEWALK] == 1.0)


def test_wall_reach_needs_a_visible_foot():
    from tinyloc.classes import BUILDING, SIDEWALK

    # a strong horizontal edge at row 8 is a foot as well: carried over rows 5..7
    labels, _ = _wall_column_case(2, start_row=4, edge_row=8)
    assert labels.tolist() == [BUILDING] * 8 + [SIDEWALK] * 4
    # the facade looks like the robot's surface (distance 0 < wall_ground 6): the carry stops at once, with
    # no foot seen, so a facade found above the horizon is not carried at all
    labels, _ = _wall_column_case(2, start_row=4, ref_l=120.0)
    assert labels.tolist() == [BUILDING] * 5 + [SIDEWALK] * 7
    # ... while a facade at the horizon pixel keeps the old rule (carried until that stop: none here either)
    labels, _ = _wall_column_case(0, start_row=5, ref_l=120.0)
    assert labels.tolist() == [BUILDING] * 6 + [SIDEWALK] * 6
    # a facade reaching the bottom of the picture with no foot at all: not carried when found above
    labels, _ = _wall_column_case(2, start_row=4, foot_l=120.0)
    assert labels.tolist() == [BUILDING] * 5 + [SIDEWALK] * 7
    labels, _ = _wall_column_case(0, start_row=5, foot_l=120.0)
    assert labels.tolist() == [BUILDING] * 12


def _base_band_column(base, *, band_end=21, facade_l=120, band_l=60, band_exgr=-0.133, ref_l=200, below=None,
                      band_label=None, reach=0, start_row=5, band_b=128, edge_row=12):
    """One hand-made column of 26 rows for the facade's base band (``wall_base``), horizon at row 5.3:
    building rows 0 .. ``start_row``; rows 6 .. ``edge_row`` - 1 (11) labelled sidewalk but of the facade's
    colour (L ``facade_l``); ``edge_row`` (12) the mixed pixel of the facade's lower edge (L 90); from there
    to ``band_end`` - 1
    the band (L ``band_l``, labelled grass as the segmenter often calls a dark plinth, ExG - ExR
    ``band_exgr``: -0.133 is a neutral grey's, 2/3 - 1/3 - 1/3 minus 1.4/3 - 1/3, worked by hand); from
    ``band_end`` on the robot's surface (L ``ref_l`` = the patch's, labelled sidewalk) or the class
    ``below``. a* = b* = 128 everywhere. Beside it a second column without a wall (sky, then the robot's
    surface), so that the base band's side check sees the ground past the wall."""
    from tinyloc.perception import _kernels as K
    from tinyloc.perception.segment import _IS_GROUND
    from tinyloc.classes import BUILDING, NUM_CLASSES

    from tinyloc.classes import SKY

    h = 26
    labels = np.full((h, 2), SIDEWALK, np.uint8)
    labels[:start_row + 1, 0] = BUILDING
    labels[edge_row + 1:band_end, 0] = GRASS if band_label is None else band_label
    if below is not None:
        labels[band_end:, 0] = below
    labels[:6, 1] = SKY  # beside the wall: sky, and the robot's surface below the horizon (the side check sees it)
    lab = np.full((h, 2, 3), 128, np.uint8)
    lab[:, :, 0] = ref_l
    lab[:edge_row, 0, 0] = facade_l
    lab[edge_row, 0, 0] = 90
    lab[edge_row + 1:band_end, 0, 0] = band_l
    lab[edge_row + 1:band_end, 0, 2] = band_b
    feat = np.zeros((K.NF, h, 2), np.float32)
    feat[K.F_EXGR] = -0.133
    feat[K.F_EXGR, edge_row + 1:band_end, 0] = band_exgr
    probs = np.zeros((NUM_CLASSES, h, 2), np.float32)
    probs[labels, np.arange(h)[:, None], np.arange(2)[None, :]] = 1.0
    ref = np.array([float(ref_l), 128.0, 128.0])
    # the dark-gap rule (on in "sidewalk") off: a band at half the facade's lightness would also be a dark gap
    prm = replace(preset("sidewalk"), wall_base=base, wall_reach=reach, wall_dark=0.0).vector()
    K.extend_walls(feat, lab, np.full(2, 5.3), ref, prm, _IS_GROUND, probs, labels, np.zeros((3, 2), np.int32))
    return labels[:, 0], probs[:, :, 0]


def _building_rows(labels):
    from tinyloc.classes import BUILDING

    return [i for i, c in enumerate(labels) if c == BUILDING]


@pytest.mark.parametrize("base, band_end, foot", [
    # off: the carry stops at the facade's lower edge (row 12: distance 0.5 * 30 = 15 > wall_dist 13.1)
    (0.0, 21, 12),
    # the band's top boundary lies 12 - 0.5 - 5.3 = 6.2 rows below the horizon, its bottom (row 21) at
    # 21 - 0.5 - 5.3 = 15.2: 6.2 >= (1 - 0.6) x 15.2 = 6.08, so the band is the wall's: carried to row 21
    (0.6, 21, 21),
    # one row deeper: 6.2 < 0.4 x 16.2 = 6.48, too thick for a wall's base, the foot stays at row 12
    (0.6, 22, 12),
    # a lower limit: 0.5 needs 6.2 >= 0.5 x 15.2 = 7.6, no
    (0.5, 21, 12),
    # a one-pixel band (rows 13 only) is not a band
    (0.6, 14, 12),
])
def test_wall_base_hand_worked(base, band_end, foot):
    labels, probs = _base_band_column(base, band_end=band_end)
    assert _building_rows(labels) == list(range(foot))
    assert np.all(probs[:, :foot].argmax(axis=0) == 0) and np.all(probs[0, :foot] == 1.0)


def test_wall_base_needs_a_readable_depth():
    # with wall_base 0.9 the ratio passes easily (top >= 0.1 x bottom); the band's top must still lie at least
    # 6 rows below the horizon: edge at row 12 -> 12 - 0.5 - 5.3 = 6.2 rows, carried; at row 11 -> 5.2, not
    labels, _ = _base_band_column(0.9, edge_row=12)
    assert _building_rows(labels) == list(range(21))
    labels, _ = _base_band_column(0.9, edge_row=11)
    assert _building_rows(labels) == list(range(11))


def test_wall_base_not_on_green_or_objects_or_paving():
    from tinyloc.classes import TREE

    # a green band (ExG - ExR 0.05 > green0 -0.02) is a verge in front of the facade, not its base
    labels, _ = _base_band_column(0.6, band_exgr=0.05)
    assert _building_rows(labels) == list(range(12))
    # a yellowish band (b* 8 above the robot's surface's, more than soil_b 6) is dry grass or bare ground
    labels, _ = _base_band_column(0.6, band_b=136)
    assert _building_rows(labels) == list(range(12))
    labels, _ = _base_band_column(0.6, band_b=134)  # 6 above: still a band (the limit is inclusive)
    assert _building_rows(labels) == list(range(21))
    # a band that stands on an object (a tree label below it) has no foot on ground
    labels, _ = _base_band_column(0.6, below=TREE)
    assert _building_rows(labels) == list(range(12))
    # a band the colour of the robot's surface (distance 0 < wall_ground 6) is that surface
    labels, _ = _base_band_column(0.6, band_l=200)
    assert _building_rows(labels) == list(range(12))


def test_wall_base_carries_a_facade_coloured_like_the_paving():
    # the facade's lower part looks like the robot's surface (L 200 = the patch): off, the carry stops at
    # once (row 6); with the band rule the colour carry goes on to the band and through it to the foot
    labels, _ = _base_band_column(0.0, facade_l=200)
    assert _building_rows(labels) == list(range(6))
    labels, _ = _base_band_column(0.6, facade_l=200)
    assert _building_rows(labels) == list(range(21))
    # ... but without a band that passes, it still stops at the first paving-like pixel
    labels, _ = _base_band_column(0.6, facade_l=200, band_end=22)
    assert _building_rows(labels) == list(range(6))
    # found above the horizon (wall_reach 2, facade to row 4): kept, the band's bottom is a visible foot
    labels, _ = _base_band_column(0.6, facade_l=200, reach=2, start_row=4)
    assert _building_rows(labels) == list(range(21))


def _band_raster(beside_l, *, wall_cols=(1, 2, 3), width=5, plain_cols=()):
    """``width`` columns: the hand-made band column (``_base_band_column``'s, wall_base 0.6, passing) in
    ``wall_cols``; elsewhere no wall (sky down to the horizon pixel, row 5) and below it ground labelled
    sidewalk of lightness ``beside_l`` in the band's rows 13-20 and the robot's surface elsewhere; in
    ``plain_cols`` a wall without a band (building down to the horizon pixel, the robot's surface below)."""
    from tinyloc.perception import _kernels as K
    from tinyloc.perception.segment import _IS_GROUND
    from tinyloc.classes import BUILDING, NUM_CLASSES, SKY

    h = 26
    labels = np.full((h, width), SIDEWALK, np.uint8)
    lab = np.full((h, width, 3), 128, np.uint8)
    lab[:, :, 0] = 200
    feat = np.zeros((K.NF, h, width), np.float32)
    feat[K.F_EXGR] = -0.133
    for j in range(width):
        if j in wall_cols:
            labels[:6, j] = BUILDING
            labels[13:21, j] = GRASS
            lab[:12, j, 0], lab[12, j, 0], lab[13:21, j, 0] = 120, 90, 60
        elif j in plain_cols:
            labels[:6, j] = BUILDING
            lab[:6, j, 0] = 120
        else:
            labels[:6, j] = SKY
            lab[13:21, j, 0] = beside_l
    probs = np.zeros((NUM_CLASSES, h, width), np.float32)
    probs[labels, np.arange(h)[:, None], np.arange(width)[None, :]] = 1.0
    ref = np.array([200.0, 128.0, 128.0])
    # the dark-gap rule (on in "sidewalk") off: a band at half the facade's lightness would also be a dark gap
    prm = replace(preset("sidewalk"), wall_base=0.6, wall_dark=0.0).vector()
    K.extend_walls(feat, lab, np.full(width, 5.3), ref, prm, _IS_GROUND, probs, labels, np.zeros((3, width), np.int32))
    return labels


def test_wall_base_not_a_strip_beside_the_wall():
    from tinyloc.classes import BUILDING

    # beside the wall the ground in the band's rows is the robot's surface (L 200, distance 0.5 x 140 from
    # the band's L 60): a wall's base, carried to row 21 in the wall's columns
    labels = _band_raster(200)
    assert [_building_rows(labels[:, j]) for j in (1, 2, 3)] == [list(range(21))] * 3
    assert not np.any(labels[6:, [0, 4]] == BUILDING)
    # the band's colour goes on beside the wall on both sides (L 60, distance 0): a strip of ground in front
    # of it, so the foot stays at the wall's lower edge (row 12) in every column of the run
    labels = _band_raster(60)
    assert [_building_rows(labels[:, j]) for j in (1, 2, 3)] == [list(range(12))] * 3
    # on one side only (L 66 on the left: 0.5 x 6 = 3 <= wall_dist 13.1; the right side is the image's edge)
    labels = _band_raster(66, wall_cols=(1, 2, 3, 4))
    assert [_building_rows(labels[:, j]) for j in (1, 2, 3, 4)] == [list(range(12))] * 4
    # a wall reaching the image's edge on both sides (a facade faced from a few metres): nothing seen beside
    # it, so nothing tells its base from a path in front of it: not carried
    labels = _band_raster(200, wall_cols=(0, 1, 2, 3, 4))
    assert [_building_rows(labels[:, j]) for j in range(5)] == [list(range(12))] * 5
    # one side at the image's edge, the other seen without the band's colour: carried
    labels = _band_raster(200, wall_cols=(0, 1, 2, 3))
    assert [_building_rows(labels[:, j]) for j in range(4)] == [list(range(21))] * 4
    # ... or seen with it: not carried
    labels = _band_raster(60, wall_cols=(0, 1, 2, 3))
    assert [_building_rows(labels[:, j]) for j in range(4)] == [list(range(12))] * 4
    # the wall goes on past the band's run (columns 0-1, left at the image's edge) without a band: the side
    # is the first column past all of it (column 10 here, clean: carried); a wall to the edge: not seen
    labels = _band_raster(200, wall_cols=(0, 1), plain_cols=range(2, 10), width=11)
    assert [_building_rows(labels[:, j]) for j in (0, 1)] == [list(range(21))] * 2
    labels = _band_raster(200, wall_cols=(0, 1), plain_cols=range(2, 11), width=11)
    assert [_building_rows(labels[:, j]) for j in (0, 1)] == [list(range(12))] * 2


def _dark_gap_column(dark, *, gap=(9, 13), gap_l=40, first_l=None, below_l=80, below=None, start_row=5, h=26,
                     reach=0):
    """One hand-made column for the dark gap under an object (``wall_dark``), horizon at row 5.3 (the
    horizon pixel is row 5): building rows 0 .. ``start_row``, then road-labelled pixels of the object's
    colour (L 120) down to the gap, the gap rows ``gap[0]`` .. ``gap[1]`` - 1 (road-labelled, L ``gap_l``;
    the first L ``first_l`` when given, a mixed pixel), and below it road of L ``below_l`` (or the class
    ``below``). The robot's surface is far in colour (L 250). a* = b* = 128 everywhere."""
    from tinyloc.perception import _kernels as K
    from tinyloc.perception.segment import _IS_GROUND
    from tinyloc.classes import BUILDING, NUM_CLASSES

    labels = np.full((h, 1), ROAD, np.uint8)
    labels[:start_row + 1] = BUILDING
    if below is not None:
        labels[gap[1]:] = below
    lab = np.full((h, 1, 3), 128, np.uint8)
    lab[:gap[0], 0, 0] = 120
    lab[gap[0]:gap[1], 0, 0] = gap_l
    if first_l is not None:
        lab[gap[0], 0, 0] = first_l
    lab[gap[1]:, 0, 0] = below_l
    feat = np.zeros((K.NF, h, 1), np.float32)
    probs = np.zeros((NUM_CLASSES, h, 1), np.float32)
    probs[labels, np.arange(h)[:, None], np.arange(1)[None, :]] = 1.0
    ref = np.array([250.0, 128.0, 128.0])
    prm = replace(preset("sidewalk"), wall_dark=dark, wall_reach=reach).vector()
    K.extend_walls(feat, lab, np.array([5.3]), ref, prm, _IS_GROUND, probs, labels, np.zeros((3, 1), np.int32))
    return labels[:, 0], probs[:, :, 0]


@pytest.mark.parametrize("dark, kw, foot", [
    # off: the carry (L 120, rows 6-8) stops at the gap's colour change (row 9: 0.5 x 80 = 40 > wall_dist 13.1)
    (0.0, {}, 9),
    # on: the gap (L 40 <= 0.5 x 120 = 60, rows 9-12) stands on road of L 80 >= 40 + 10; its top lies
    # 9 - 0.5 - 5.3 = 3.2 rows below the horizon (>= 2) and >= 0.2 x (13 - 0.5 - 5.3) = 1.44: carried to row 13
    (0.5, {}, 13),
    (0.5, {"gap_l": 60}, 13),                       # 60 = 0.5 x 120: still dark (the limit is inclusive)
    (0.5, {"gap_l": 61}, 9),                        # one lighter: no gap
    (0.4, {}, 13),                                  # 40 <= 0.4 x 120 = 48: carried ...
    (0.3, {}, 9),                                   # ... and 40 > 0.3 x 120 = 36: not
    # ground above the limit 60 must also be 10 lighter than the gap: 65 = 55 + 10 yes, 64 no
    (0.5, {"gap_l": 55, "below_l": 65}, 13),
    (0.5, {"gap_l": 55, "below_l": 64}, 9),
    (0.5, {"below_l": 60}, 9),                      # ground as dark as the limit is taken for more gap: no foot
    (0.5, {"gap": (9, 10)}, 9),                     # a one-pixel gap is not a gap
    (0.5, {"first_l": 90}, 13),                     # a mixed first pixel (L 90 > 60) is taken with the gap
    (0.5, {"first_l": 90, "gap": (9, 11)}, 9),      # ... but does not count: one dark pixel left
    (0.5, {"below": 4}, 9),                         # a gap standing on a tree (no ground below) has no foot
    # tall gaps: top depth 3.2 >= 0.2 x (21 - 0.5 - 5.3) = 3.04, carried; to row 22: 3.24 > 3.2, not
    (0.5, {"gap": (9, 21)}, 21),
    (0.5, {"gap": (9, 22)}, 9),
])
def test_wall_dark_hand_worked(dark, kw, foot):
    labels, probs = _dark_gap_column(dark, **kw)
    assert _building_rows(labels) == list(range(foot))
    assert np.all(probs[0, :foot] == 1.0)
    assert np.all(labels[foot:] != 0)


def test_wall_dark_needs_a_gap_below_the_horizon():
    from tinyloc.perception import _kernels as K

    # the gap's top must lie at least 2 rows below the horizon (5.3): the object's colour down to row 6 and the
    # gap from row 7 (7 - 0.5 - 5.3 = 1.2 rows): not carried; from row 8 (2.2 rows): carried
    labels, _ = _dark_gap_column(0.5, gap=(7, 11))
    assert _building_rows(labels) == list(range(7))
    labels, _ = _dark_gap_column(0.5, gap=(8, 12))
    assert _building_rows(labels) == list(range(12))
    assert K.DARK_MIN_DEPTH == 2.0 and K.DARK_STEP == 10.0 and K.DARK_MAX_SHARE == 0.8  # the figures above


def test_wall_dark_on_a_rendered_vehicle():
    # the frame's van side (raster columns 30-99) ends in a dark gap 12 .. 18 rows below the horizon: off, its
    # lower edge is the gap's top and the gap is road; on, the building label reaches the gap's bottom
    img = _vehicle_frame()
    hrow = np.linspace(0.45, 0.6, 160) * 120
    out = {}
    for dark in (0.0, 0.5):
        seg = Segmenter((img.shape[1], img.shape[0]), replace(preset("sidewalk"), wall_dark=dark))
        _, labels = seg.run(img, hrow)
        out[dark] = labels.copy()
    cols = np.arange(35, 95)
    lowest = {d: np.array([np.flatnonzero(out[d][:, j] == 0).max() - hrow[j] for j in cols]) for d in out}
    assert np.all(lowest[0.0] < 13.5), lowest[0.0]          # stops at the body's lower edge (12 rows down)
    assert np.all(np.abs(lowest[0.5] - 18) <= 1.5), lowest[0.5]  # reaches the gap's bottom (18 rows down)
    # beside the van the rule changes nothing
    assert np.array_equal(out[0.0][:, :25], out[0.5][:, :25]) and np.array_equal(out[0.0][:, 105:], out[0.5][:, 105:])
    with pytest.raises(InputError, match="wall_dark"):
        SegmentParams(wall_dark=1.0)
    with pytest.raises(InputError, match="wall_dark"):
        SegmentParams(wall_dark=-0.1)


def test_patch_edge_share_hand_worked():
    """The kernel counts the patch pixels whose |dI/dx| + |dI/dy| exceeds the threshold (strictly)."""
    from tinyloc.perception import _kernels as K

    feat = np.zeros((K.NF, 4, 5), np.float32)
    feat[K.F_GX, 1, 1], feat[K.F_GY, 1, 1] = 0.015, 0.01   # 0.025 > 0.02
    feat[K.F_GX, 2, 3] = 0.02                               # exactly 0.02: not above
    feat[K.F_GY, 3, 4] = 0.5                                # outside the patch
    assert K.patch_edge_share(feat, 0, 3, 0, 4, 0.02) == pytest.approx(1 / 12)
    assert K.patch_edge_share(feat, 0, 3, 0, 4, 0.019) == pytest.approx(2 / 12)
    assert K.patch_edge_share(feat, 0, 4, 0, 5, 0.019) == pytest.approx(3 / 20)
    assert K.patch_edge_share(feat, 2, 2, 0, 5, 0.01) == 0.0   # an empty patch


def _paved_frame(patch_joints: bool, patch_bgr=(150, 150, 152)):
    """160 x 120: brick-red wall above row 50, uniform ground below; the robot's patch (rows 95.., columns
    50-110) in ``patch_bgr``, with dark joint lines every 8 pixels across and along when ``patch_joints``."""
    img = np.zeros((120, 160, 3), np.uint8)
    img[:50] = (50, 60, 150)
    img[50:] = patch_bgr
    if patch_joints:
        img[96::8, 50:110] = (110, 110, 112)
        img[95:, 52:110:8] = (110, 110, 112)
    return img


@pytest.mark.parametrize("joints, expect", [(True, "sidewalk"), (False, "road")])
def test_surface_by_paving_joints(joints, expect):
    """Paving slabs under the robot show joint lines (grey steps of 40 / 255 across two pixels: |dI/dx| about
    0.078 > 0.02 at every joint's neighbours); smooth asphalt shows none: the robot is on the road. Lightness is
    the same for both (the other paved ground is the patch's colour: the lightness rule stays undecided)."""
    seg = Segmenter((160, 120), replace(preset("sidewalk"), surface_joints=0.02))
    seg.run(_paved_frame(joints), HROW)
    assert seg.surface == expect
    # the share of joint pixels in the patch (rows 102-119, columns 56-103 of the 160 x 120 raster) is far from
    # the threshold either way
    from tinyloc.perception import _kernels as K

    r0, r1, c0, c1 = seg._patch
    share = K.patch_edge_share(seg.feat, r0, r1, c0, c1, K.JOINT_EDGE)
    assert (share > 0.2) if joints else (share == 0.0)
    # off: the preset's robot_on stands whatever the patch shows
    seg = Segmenter((160, 120), replace(preset("sidewalk"), surface_joints=0.0))
    seg.run(_paved_frame(False), HROW)
    assert seg.surface == "sidewalk"
    # the joints only add "road": a frame the lightness rule calls road stays road with joints under the robot
    seg = Segmenter((160, 120), replace(preset("sidewalk"), surface_auto=20.0, surface_joints=0.02))
    img = _ground_frame((60, 60, 62), patch_bgr=(60, 60, 62), side_bgr=(140, 145, 150))
    img[96::8, 50:110] = (20, 20, 22)
    seg.run(img, HROW)
    assert seg.surface == "road"
    with pytest.raises(InputError, match="surface_joints"):
        SegmentParams(surface_joints=1.0)


def _sill_column(median, sill_rows, *, bottom=5, sill=(200, 128, 110)):
    """One hand-made column for the facade's colour in the carry (``wall_median``): 12 rows, horizon at row
    5.3 (horizon pixel row 5), building rows 0 to ``bottom``, sidewalk below; facade Lab (120, 128, 128) down
    to row 8, its foot L 60 from row 9; ``sill_rows`` drawn as a light window sill ``sill``; the robot's
    surface L 200, far from the facade (0.8 x 80 = 64 > wall_ground 6)."""
    from tinyloc.perception import _kernels as K
    from tinyloc.perception.segment import _IS_GROUND
    from tinyloc.classes import BUILDING, SIDEWALK, NUM_CLASSES

    h, w = 12, 1
    labels = np.full((h, w), SIDEWALK, np.uint8)
    labels[:bottom + 1] = BUILDING
    lab = np.full((h, w, 3), 128, np.uint8)
    lab[:, :, 0] = 120
    lab[9:, :, 0] = 60
    for r in sill_rows:
        lab[r, 0] = sill
    feat = np.zeros((K.NF, h, w), np.float32)
    probs = np.zeros((NUM_CLASSES, h, w), np.float32)
    probs[SIDEWALK] = 1.0
    probs[BUILDING, :bottom + 1], probs[SIDEWALK, :bottom + 1] = 1.0, 0.0
    ref = np.array([200.0, 128.0, 128.0])
    prm = replace(preset("sidewalk"), wall_dark=0.0, wall_median=median).vector()
    K.extend_walls(feat, lab, np.array([5.3]), ref, prm, _IS_GROUND, probs, labels, np.zeros((3, 1), np.int32))
    return [int(i) for i in np.flatnonzero(labels[:, 0] == BUILDING)]


@pytest.mark.parametrize("median, sill_rows, bottom, carried_to", [
    (False, [], 5, 8),      # no sill: the facade (distance 0 to its own colour) is carried to its foot, row 9
    (False, [3], 5, 5),     # a sill in one of the rows 3-5 at the horizon: their mean is L 146.7, b* 122, so
    #                         row 6 is 0.5 x 26.7 + 6 = 19.3 from it (> wall_dist 13.125): the carry stops at once
    (True, [3], 5, 8),      # the median of the lowest three building pixels (rows 3-5) is the facade's colour
    (True, [4], 5, 8),      # the sill in the middle one: the same
    (True, [3, 4], 5, 5),   # two of three are sill: the median is the sill (distance 0.5 x 80 + 18 = 58): stops
    (False, [3, 4], 6, 6),  # building scored down to row 6: the mean of rows 3-5 (two sill) stops the carry at 7
    (True, [3, 4], 6, 8),   # ... the lowest three building pixels are rows 4-6 (one sill): carried to the foot
])
def test_wall_median_hand_worked(median, sill_rows, bottom, carried_to):
    assert _sill_column(median, sill_rows, bottom=bottom) == list(range(carried_to + 1))


def test_wall_median_is_the_middle_value():
    from itertools import permutations
    from tinyloc.perception import _kernels as K

    # against NumPy's median, all orders of three values (with ties)
    for v in [(1, 2, 3), (5, 5, 1), (0, 255, 128), (7, 7, 7)]:
        for perm in set(permutations(v)):
            assert K._median3(*perm) == float(np.median(perm))


def test_ground_power_hand_worked():
    """``ground_power`` on one hand-made ground pixel: the robot on the sidewalk and an asphalt-grey pixel far
    from its colour (on = 0), smooth (texture 0), ExG - ExR = green0 (the vegetation step at 1/2), well below
    the horizon. Scores worked by hand: road = other_weight x (1 - 1/2) = 0.103, sidewalk = ground_floor x 1/2 =
    0.032625, grass = grass_weight x 1/2 = 0.29; power 2 re-splits their sum 0.425625 as 0.103^2 : 0.032625^2 :
    0.29^2. The label (grass, the largest) is the same with and without."""
    from tinyloc.perception import _kernels as K
    from tinyloc.classes import ROAD, SIDEWALK, GRASS, NUM_CLASSES

    def one_pixel(power):
        p = replace(preset("sidewalk"), soil_b=0.0, ground_power=power)
        feat = np.zeros((K.NF, 1, 1), np.float32)
        feat[K.F_EXGR] = p.green0
        feat[K.F_U] = -0.5
        lab = np.array([[[60, 128, 128]]], np.uint8)
        ref = np.array([200.0, 128.0, 128.0])
        z = np.zeros((1, 1), np.float32)
        probs = np.zeros((NUM_CLASSES, 1, 1), np.float32)
        labels = np.zeros((1, 1), np.uint8)
        K.seg_scores(feat, lab, z, np.zeros((1, 1), np.uint8), z, z, z, z, ref, p.vector(), probs, labels)
        return probs[[ROAD, SIDEWALK, GRASS], 0, 0].astype(np.float64), int(labels[0, 0])

    s = np.array([0.206 * 0.5, 0.06525 * 0.5, 0.58 * 0.5])
    p1, l1 = one_pixel(1.0)
    np.testing.assert_allclose(p1, s / s.sum(), atol=1e-5)
    p2, l2 = one_pixel(2.0)
    np.testing.assert_allclose(p2, s ** 2 / (s ** 2).sum(), atol=1e-5)
    assert l1 == l2 == GRASS
    assert abs(p2.sum() - 1.0) < 1e-5  # only ground scored here: the ground share stays all of the pixel
    with pytest.raises(InputError, match="ground_power"):
        SegmentParams(ground_power=0.5)
