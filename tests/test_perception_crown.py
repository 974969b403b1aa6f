"""The crown model (linear tree-vs-building score): file format, folding, and the fit.

Outside reference for the fit: SciPy's BFGS minimiser (scipy.optimize.minimize) on the same
L2-penalised, weighted logistic log-likelihood; the data are seeded random samples of a planted model.
The fitting tool's truth reduction is checked against OpenCV's INTER_AREA of the class masks; the colour
models' extra planes against OpenCV's floating-point Lab conversion, a cumulative sum and SciPy's
``uniform_filter``; the segmenter with the colour models against tests/_perception_reference.py.
"""

import dataclasses
import json

import cv2
import numpy as np
import pytest
from scipy.optimize import minimize

from tinyloc.errors import InputError
from tinyloc.perception import _kernels as K
from tinyloc.perception.crown_model import (DEFAULT_PATH, FEATURES, GAP_FEATURES, GAP_PATH, CrownModel, fit_crown_model,
                                            load_crown_model)


def _planted(rng, n=4000):
    x = rng.normal(0.0, 1.0, (n, K.NT)) * rng.uniform(0.5, 3.0, K.NT) + rng.uniform(-2, 2, K.NT)
    w_true = np.zeros(K.NT)
    w_true[[1, 5, 7, 12]] = [1.5, -2.0, 0.8, 1.0]
    z = (x - x.mean(0)) / x.std(0) @ w_true + 0.3
    y = rng.random(n) < 1.0 / (1.0 + np.exp(-z))
    return x, y


def test_fit_matches_scipy_minimiser():
    rng = np.random.default_rng(11)
    x, y = _planted(rng)
    sw = np.where(y, 0.5 / y.mean(), 0.5 / (1 - y.mean()))
    m = fit_crown_model(x, y, sw, l2=1e-2)
    zs = (x - m.mean) / m.scale

    def nll(th):
        z = zs @ th[:-1] + th[-1]
        return np.sum(sw * (np.logaddexp(0.0, z) - y * z)) + 0.5e-2 * np.sum(th[:-1] ** 2)

    ref = minimize(nll, np.zeros(K.NT + 1), method="BFGS", options={"gtol": 1e-8, "maxiter": 2000}).x
    assert np.max(np.abs(m.weights - ref[:-1])) < 1e-3 and abs(m.bias - ref[-1]) < 1e-3
    # the planted non-zero weights are found, the zero ones stay small
    assert np.all(np.abs(m.weights[[1, 5, 7, 12]]) > 0.5) and np.max(np.abs(np.delete(m.weights, [1, 5, 7, 12]))) < 0.2


def test_folded_weights_give_the_same_score(tmp_path):
    rng = np.random.default_rng(3)
    x, y = _planted(rng, 500)
    m = fit_crown_model(x, y, provenance={"data": "seeded test"})
    w, b = m.folded()
    assert np.max(np.abs((b + x @ w) - m.score(x))) < 1e-9
    p = tmp_path / "crown.json"
    m.save(p)
    back = CrownModel.load(p)
    assert np.array_equal(back.weights, m.weights) and back.bias == m.bias and back.provenance == {"data": "seeded test"}


def test_shipped_model_loads_with_provenance():
    m = load_crown_model("default")
    assert m is not None and load_crown_model("") is None and load_crown_model("off") is None
    prov = m.provenance
    assert "image_folder" in prov and prov["image_folder"]["ids"] == "even"  # the odd ids stay unseen
    assert json.loads(DEFAULT_PATH.read_text())["features"] == list(FEATURES)
    g = load_crown_model("default", gaps=True)
    assert g.features == GAP_FEATURES and g.provenance["stage"] == "gaps" and g.provenance["image_folder"]["ids"] == "even"
    with pytest.raises(InputError, match="feature list"):
        CrownModel.load(GAP_PATH)  # a sky-gap file is not a crown model


def test_bad_model_files(tmp_path):
    bad = tmp_path / "bad.json"
    bad.write_text("{not json")
    with pytest.raises(InputError, match="not valid JSON"):
        CrownModel.load(bad)
    d = json.loads(DEFAULT_PATH.read_text())
    d["features"] = d["features"][::-1]
    bad.write_text(json.dumps(d))
    with pytest.raises(InputError, match="feature list"):
        CrownModel.load(bad)
    d = json.loads(DEFAULT_PATH.read_text())
    d["scale"][0] = 0.0
    bad.write_text(json.dumps(d))
    with pytest.raises(InputError, match="scales"):
        CrownModel.load(bad)
    with pytest.raises(InputError, match="cannot read"):
        CrownModel.load(tmp_path / "missing.json")
    with pytest.raises(InputError, match="expected"):
        fit_crown_model(np.zeros((5, 3)), np.zeros(5, bool))


def test_fit_tool_on_a_small_labelled_folder(tmp_path):
    """``python -m tinyloc.perception.crown_fit`` end to end on four synthetic frames with hand-made labels:
    a flat facade (label building) beside a textured crown (label tree) above the horizon."""
    import cv2

    from tinyloc.perception.crown_fit import main
    from tinyloc.perception.labels_in import save_label_map

    rng = np.random.default_rng(7)
    (tmp_path / "img").mkdir()
    (tmp_path / "lab").mkdir()
    for k in range(4):
        img = np.zeros((240, 320, 3), np.uint8)
        img[:60] = (235, 225, 215)  # sky
        img[60:135, :160] = (80 + 10 * k, 95, 130)  # facade, flat
        crown = rng.integers(30, 120, (75, 160, 3)).astype(np.uint8)  # fine, isotropic texture
        img[60:135, 160:] = crown
        for c0 in range(176, 320, 40):  # sky between branches, open to the sky above, labelled tree
            img[60:95, c0:c0 + 12] = (235, 225, 215)
        img[135:] = (100, 100, 100)  # road
        lab = np.full((240, 320), 3, np.uint8)
        lab[:60] = 0
        lab[60:135, :160] = 1
        lab[60:135, 160:] = 5
        cv2.imwrite(str(tmp_path / "img" / f"{k:04d}.png"), img)
        cv2.imwrite(str(tmp_path / "lab" / f"{k:04d}.png"), lab)
    save_label_map(tmp_path / "map.toml", {0: "sky", 1: "building", 3: "road", 5: "tree"})
    out = tmp_path / "crown.json"
    assert main(["--images", str(tmp_path / "img"), "--labels", str(tmp_path / "lab"), "--label-map",
                 str(tmp_path / "map.toml"), "--ids", "all", "-o", str(out)]) == 0
    m = CrownModel.load(out)
    assert m.provenance["image_folder"]["frames"] == 4 and m.provenance["stage"] == "crown"
    assert m.provenance["fit_recall"]["tree"] > 0.9 and m.provenance["fit_recall"]["other"] > 0.9
    # the colour feature set, then a sky-gap model on top of it: the lists follow each other
    args = ["--images", str(tmp_path / "img"), "--labels", str(tmp_path / "lab"), "--label-map",
            str(tmp_path / "map.toml"), "--ids", "all"]
    col = tmp_path / "colour.json"
    assert main(args + ["--features", "colour", "--note", "data=four synthetic frames", "-o", str(col)]) == 0
    mc = CrownModel.load(col)
    assert mc.features[:len(FEATURES) + 4] == FEATURES + ("astar", "bstar", "skyabove", "nonsky31")
    assert len(mc.features) == len(FEATURES) + 16
    assert mc.provenance["data"] == "four synthetic frames" and mc.provenance["features"] == "colour"
    gap = tmp_path / "gaps.json"
    assert main(args + ["--stage", "gaps", "--crown", str(col), "-o", str(gap)]) == 0
    assert load_crown_model(str(gap), gaps=True, base=mc.features).features == mc.features + GAP_FEATURES[-4:]
    # a context model on top of the colour one: the file holds both; a texture model cannot be the first
    ctx = tmp_path / "context.json"
    assert main(args + ["--first", str(col), "-o", str(ctx)]) == 0
    mx = CrownModel.load(ctx)
    assert mx.features == mc.features + ("crown7", "crown15", "crown31", "crown_col", "crown_row")
    assert np.array_equal(mx.first.weights, mc.weights) and mx.provenance["features"] == "context"
    assert main(args + ["--first", str(out), "-o", str(tmp_path / "x.json")]) == 2
    # without data, or with a malformed note: a one-line error and exit status 2
    assert main(["-o", str(tmp_path / "x.json")]) == 2
    assert main(args + ["--note", "no equals sign", "-o", str(tmp_path / "x.json")]) == 2
    save_label_map(tmp_path / "no_tree.toml", {0: "sky", 1: "building", 3: "road"})  # one class only
    assert main(args[:4] + ["--label-map", str(tmp_path / "no_tree.toml"), "-o", str(tmp_path / "x.json")]) == 2
    assert not (tmp_path / "x.json").exists()


def test_fit_truth_is_the_block_majority():
    """The fitting tool's truth at the raster is each block's majority class (the features describe the whole
    area-averaged block), checked against OpenCV's INTER_AREA of each class mask at the set's 3x reduction; a
    nearest-pixel pick would take the block's top-left pixel instead."""
    import cv2

    from tinyloc.perception.crown_fit import reduce_truth

    rng = np.random.default_rng(5)
    raw = rng.integers(0, 4, (36, 48)).astype(np.uint8)  # ids 0..3; 3 is unmapped
    raw[:, :21] = 1  # a boundary inside a block (column 21 = block 7, pixel 0)
    lut = np.full(256, 255, np.uint8)
    lut[[0, 1, 2]] = [9, 0, 4]  # sky, building, tree
    got = reduce_truth(raw, lut, (16, 12))
    masks = [(raw == 3)] + [(lut[raw] == c) for c in range(11)]  # unmapped first: it wins ties, as documented
    shares = np.stack([cv2.resize(m.astype(np.float32), (16, 12), interpolation=cv2.INTER_AREA) for m in masks])
    want = shares.argmax(axis=0) - 1
    want = np.where(want < 0, 255, want).astype(np.uint8)
    assert np.array_equal(got, want)
    nearest = cv2.resize(lut[raw], (16, 12), interpolation=cv2.INTER_NEAREST)
    assert not np.array_equal(got, nearest)  # the check can tell the two reductions apart


# --- the colour models' extra planes (crown_features.py) -----------------------------------------------------

def colour_features_reference(bgr_small, sky, texture, *, lab8=False):
    """The EXTRA_FEATURES planes from their definitions: Lab a*, b* from OpenCV's floating-point Lab
    conversion (an independent path from the 8-bit one the kernel reads; they differ by rounding, < 1 unit),
    the column's sky share from a cumulative sum, the 31 x 31 non-sky share from SciPy's
    ``uniform_filter`` (edge pixels repeated, as ``mode="nearest"``), and the height products from
    ``texture``, the 23 texture planes (``FEATURES`` order). ``lab8``: a*, b* from OpenCV's 8-bit Lab minus
    128 instead (the definition the segmenter uses, for comparing whole segmentations)."""
    from scipy.ndimage import uniform_filter

    if lab8:
        lab = cv2.cvtColor(bgr_small, cv2.COLOR_BGR2Lab).astype(np.float64) - 128.0
    else:
        lab = cv2.cvtColor(bgr_small.astype(np.float32) / 255.0, cv2.COLOR_BGR2Lab)
    sky = sky.astype(bool)
    above = np.cumsum(sky, axis=0) / np.arange(1, sky.shape[0] + 1)[:, None]
    nonsky = uniform_filter((~sky).astype(np.float64), size=31, mode="nearest")
    tx = dict(zip(FEATURES, texture))
    u = tx["u"]
    own = [lab[..., 1], lab[..., 2], above, nonsky]
    prods = [u * lab[..., 1], u * lab[..., 2], u * above] + \
        [u * tx[n] for n in ("v", "s", "exgr", "coh9", "fr", "logen9", "var9", "axis9", "nonsky9")]
    return np.stack(own + prods)


def test_colour_planes_match_reference():
    from tinyloc.perception.crown_features import EXTRA_FEATURES, CrownExtras

    rng = np.random.default_rng(21)
    small = cv2.GaussianBlur(rng.integers(0, 256, (60, 80, 3)).astype(np.uint8), (0, 0), 1.5)
    sky = np.zeros((60, 80), np.uint8)
    sky[:20] = 1
    sky[20:35, 30:50] = rng.random((15, 20)) < 0.4  # gaps in a crown
    lab8 = cv2.cvtColor(small, cv2.COLOR_BGR2Lab)
    nt, ne = K.NT, len(EXTRA_FEATURES)
    tf = np.full((nt + ne, 60, 80), np.nan, np.float32)
    tf[:nt] = rng.uniform(0.0, 1.0, (nt, 60, 80))  # stand-in texture planes: the products only read them
    tf[K.T_U] = np.linspace(0.4, -0.3, 60)[:, None]
    CrownExtras(60, 80).fill(lab8, sky, tf)
    ref = colour_features_reference(small, sky, tf[:nt].astype(np.float64))
    out = tf[nt:]
    assert np.all(np.isfinite(out)) and len(ref) == ne
    assert np.max(np.abs(out[:2] - ref[:2])) < 1.0  # 8-bit Lab rounds a* and b* to whole units
    assert np.max(np.abs(out[4:6] - ref[4:6])) < 0.4  # ... times |u| <= 0.4
    assert np.max(np.abs(out[2:4] - ref[2:4])) < 1e-5 and np.max(np.abs(out[6:] - ref[6:])) < 1e-5
    assert out[2, 0, 0] == 1.0 and out[3, 0, 0] < out[3, 59, 0]  # sky at the top; a street canyon is non-sky
    with pytest.raises(InputError, match="tfeat must be"):
        CrownExtras(60, 80).fill(lab8, sky, np.zeros((nt + 3, 60, 80), np.float32))


def test_segmenter_with_colour_models_matches_reference(monkeypatch):
    """The whole segmenter with the colour crown and sky-gap models against the plain-NumPy reference of
    tests/_perception_reference.py, its crown feature planes extended by the reference above when it has
    only the texture planes."""
    import _perception_reference as R
    from test_perception_segment import _frames
    from tinyloc.perception.segment import SegmentParams, Segmenter

    texture = R.crown_features_reference

    def extended(bgr, g01, s, v, exgr, u, sky):
        h, w = g01.shape
        small = bgr if bgr.shape[:2] == (h, w) else cv2.resize(bgr, (w, h), interpolation=cv2.INTER_AREA)
        tx = texture(bgr, g01, s, v, exgr, u, sky)
        return np.concatenate([tx, colour_features_reference(small, sky, tx, lab8=True)])

    p0 = SegmentParams(crown_model="colour", gap_model="colour")
    img0 = next(_frames())[1]
    try:  # a reference that computes the colour planes itself is used as it is
        R.segment_reference(img0, p0, np.linspace(0.45, 0.6, 160) * 120)
    except ValueError:  # it computes the texture planes only: add ours (the model then has 16 weights more)
        monkeypatch.setattr(R, "crown_features_reference", extended)
    # the second set makes the sky-gap model fire on the street-like frame's sky, so it is compared too
    for p in (SegmentParams(crown_model="colour", gap_model="colour"),
              SegmentParams(crown_model="colour", gap_model="colour", gap_threshold=0.5, gap_near=0.0)):
        seen, changed = set(), 0
        for what, img in _frames():
            seg = Segmenter((img.shape[1], img.shape[0]), p)
            assert seg.tfeat.shape[0] == K.NT + 16 and seg.gap_model.features == seg.crown_model.features + \
                ("tree9", "tree15", "tex", "crown")
            hrow = np.linspace(0.45, 0.6, seg.size[0]) * seg.size[1]
            probs, labels = seg.run(img, hrow)
            rp, rl = R.segment_reference(img, p, hrow)
            # the kernel's logistic is a table (error < 3e-6): a few near-ties may flip
            assert np.mean(labels != rl) < 0.002, (what, np.mean(labels != rl))
            same = labels == rl
            assert np.max(np.abs(probs[:, same] - rp[:, same])) < 1e-4, what
            seen |= set(np.unique(labels).tolist())
            off = Segmenter((img.shape[1], img.shape[0]), dataclasses.replace(p, gap_model="")).run(img, hrow)[1]
            changed += int(np.sum((labels != off) & (off == 9)))
        assert {0, 4} <= seen  # the colour crown model split building from tree on these frames
        if p.gap_threshold == 0.5:
            assert changed > 500  # the sky-gap model relabelled sky, and the result matched the reference


def test_colour_models_ship_and_pair():
    from tinyloc.perception.crown_model import COLOUR_FEATURES, NAMED

    c = load_crown_model("colour")
    g = load_crown_model("colour", gaps=True, base=c.features)
    assert c.features == COLOUR_FEATURES and c.n_extra == 16 and g.n_extra == 16
    assert c.provenance["image_folder"]["ids"] == "even" and g.provenance["image_folder"]["ids"] == "even"
    assert load_crown_model("default", gaps=True, base=c.features) is g  # "default" follows the crown model
    with pytest.raises(InputError, match="do not follow"):
        load_crown_model(str(NAMED["default"][1]), gaps=True, base=c.features)  # a texture sky-gap model


# --- the context models (two scores: a colour model, then one on its crown map's layout) ---------------------

def context_planes_reference(crown):
    """CONTEXT_FEATURES from their definitions: SciPy ``uniform_filter`` window means (edge pixels repeated),
    the mean over rows 0 .. i of the column from a cumulative sum, and the row mean."""
    from scipy.ndimage import uniform_filter

    c = crown.astype(np.float64)
    col = np.cumsum(c, axis=0) / np.arange(1, c.shape[0] + 1)[:, None]
    row = np.repeat(c.mean(axis=1, keepdims=True), c.shape[1], axis=1)
    return np.stack([uniform_filter(c, size=n, mode="nearest") for n in (7, 15, 31)] + [col, row])


def test_context_planes_match_reference():
    from tinyloc.perception.crown_features import CONTEXT_FEATURES, CrownContext

    rng = np.random.default_rng(8)
    crown = cv2.GaussianBlur(rng.random((60, 80)).astype(np.float32), (0, 0), 3)
    out = np.full((len(CONTEXT_FEATURES), 60, 80), np.nan, np.float32)
    CrownContext(60, 80).fill(crown, out)
    assert np.max(np.abs(out - context_planes_reference(crown))) < 1e-5
    with pytest.raises(InputError, match="out must be"):
        CrownContext(60, 80).fill(crown, out[:4])


def _sig(z):
    return 1.0 / (1.0 + np.exp(-z))


def test_context_crown_map_matches_reference():
    """The segmenter's two-pass crown map against NumPy from the same feature planes (checked above and in
    tests/test_perception_segment.py): first score, raised to the vegetation score, masked mean over
    ``crown_smooth``; its context planes; the second score the same way."""
    from scipy.ndimage import uniform_filter
    from test_perception_segment import _frames
    from tinyloc.perception.segment import SegmentParams, Segmenter

    p = SegmentParams(crown_model="context", gap_model="context")
    for what, img in _frames():
        seg = Segmenter((img.shape[1], img.shape[0]), p)
        m2 = seg.crown_model
        assert m2.first is not None and seg.tfeat.shape[0] == len(m2.features)
        hrow = np.linspace(0.45, 0.6, seg.size[0]) * seg.size[1]
        seg.run(img, hrow)
        f = seg.feat.astype(np.float64)
        green = _sig((f[K.F_EXGR] - p.green0) / p.green_w)
        mask = (seg.sky == 0) & (f[K.F_U] > p.crown_u_min)

        def smoothed(model, planes):
            pt = np.where(mask, np.maximum(_sig(model.score(np.moveaxis(planes, 0, -1))), green), 0.0)
            num = uniform_filter(pt, size=p.crown_smooth, mode="nearest")
            den = uniform_filter(mask.astype(float), size=p.crown_smooth, mode="nearest")
            return np.where(den > 1e-6, num / np.where(den > 1e-6, den, 1.0), 0.0)

        n1 = len(m2.first.features)
        c1 = smoothed(m2.first, seg.tfeat[:n1].astype(np.float64))
        ctx = context_planes_reference(c1)
        assert np.max(np.abs(seg.tfeat[n1:] - ctx)) < 1e-4, what
        c2 = smoothed(m2, np.concatenate([seg.tfeat[:n1].astype(np.float64), ctx]))
        assert np.max(np.abs(seg.crown - c2)) < 1e-4, what


def test_context_model_files(tmp_path):
    from tinyloc.perception.crown_model import CONTEXT_FEATURES_ALL, COLOUR_FEATURES

    c = load_crown_model("context")
    g = load_crown_model("default", gaps=True, base=c.features)  # "default" follows the crown model
    assert c.features == CONTEXT_FEATURES_ALL and c.first.features == COLOUR_FEATURES and c.n_extra == 21
    assert g is load_crown_model("context", gaps=True) and g.n_extra == 21 and g.first is None
    assert c.provenance["image_folder"]["ids"] == "even" and g.provenance["image_folder"]["ids"] == "even"
    p = tmp_path / "ctx.json"
    c.save(p)
    back = CrownModel.load(p)
    assert np.array_equal(back.weights, c.weights) and np.array_equal(back.first.weights, c.first.weights)
    d = json.loads(p.read_text())
    del d["first"]
    p.write_text(json.dumps(d))
    with pytest.raises(InputError, match="needs its first model"):
        CrownModel.load(p)
