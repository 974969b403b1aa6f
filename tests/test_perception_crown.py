"""The crown model (linear tree-vs-building score): file format, folding, and the fit.

Outside reference for the fit: SciPy's BFGS minimiser (scipy.optimize.minimize) on the same
L2-penalised, weighted logistic log-likelihood; the data are seeded random samples of a planted model.
"""

import json

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
    # without data: a one-line error and exit status 2
    assert main(["-o", str(tmp_path / "x.json")]) == 2


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
