"""The per-frame API: bad frames give a clear status and an empty-but-valid grid, never an exception."""

import math

import numpy as np
import pytest

from tinyloc.camera.model import CameraModel, Mount
from tinyloc.classes import BUILDING, ROAD
from tinyloc.perception.labels_in import load_label_map, mapping_lut, save_label_map
from tinyloc.perception.pipeline import Perception
from tinyloc.errors import InputError


def _street_like(h=240, w=320, seed=0):
    """A plain synthetic street: blue sky, grey facade, dark road (for API tests, not for quality)."""
    rng = np.random.default_rng(seed)
    img = np.zeros((h, w, 3), np.uint8)
    img[: h // 3] = (230, 190, 150)  # sky (BGR, bluish)
    img[h // 3: h // 2 + 10] = (90, 110, 150)  # facade
    img[h // 3: h // 2 + 10, ::8] = (40, 50, 60)  # window edges: texture
    img[h // 2 + 10:] = (95, 95, 95)  # road
    noise = rng.normal(0, 2, img.shape)
    return np.clip(img + noise, 0, 255).astype(np.uint8)


@pytest.fixture(scope="module")
def perc():
    cam = CameraModel(320, 240, 250.0, 250.0, 159.5, 119.5, mount=Mount(0.8, 8.0))
    return Perception(cam)


def test_good_frame_gives_evidence(perc):
    grid = perc.new_grid()
    st = perc.process(_street_like(), (0.0, 0.0, 9.81), grid)
    assert st == "ok" == grid.status
    assert grid.visible.sum() > 100 and grid.evidence[ROAD].sum() > 50
    assert np.all((grid.evidence >= 0) & (grid.evidence <= 1.0 + 1e-6))


BAD = [
    ("black", lambda f: np.zeros_like(f), "too dark"),
    ("saturated", lambda f: np.full_like(f, 255), "saturated"),
    ("wrong size", lambda f: f[:100, :200].copy(), "size 200x100"),
    ("grayscale", lambda f: f[..., 0].copy(), "grayscale"),
    ("one channel", lambda f: f[..., :1].copy(), "grayscale"),
    ("float", lambda f: f.astype(np.float32), "pixel type"),
    ("missing", lambda f: None, "no image"),
    ("not an array", lambda f: "frame.png", "not an image"),
    ("four channels", lambda f: np.concatenate([f, f[..., :1]], axis=2), "shape"),
]


@pytest.mark.parametrize("name,make,why", BAD, ids=[b[0] for b in BAD])
def test_bad_frames(perc, name, make, why):
    grid = perc.new_grid()
    perc.process(_street_like(), None, grid)  # leave evidence behind, the bad frame must clear it
    st = perc.process(make(_street_like()), (0.0, 0.0, 9.81), grid)
    assert why in st and st == grid.status and st.startswith("bad-frame")
    assert grid.visible.sum() == 0 and grid.evidence.sum() == 0 and grid.free.sum() == 0
    assert grid.evidence.shape == (9, 64, 64) and grid.evidence.dtype == np.float32


@pytest.mark.parametrize("g,why", [((math.nan, 0, 9.8), "not finite"), ((0, math.inf, 9.8), "not finite"),
                                   ((0, 0, 0), "not near 1 g"), ("abc", "not a 3-vector"), ((1, 2), "not a 3-vector")])
def test_bad_gravity(perc, g, why):
    grid = perc.new_grid()
    st = perc.process(_street_like(), g, grid)
    assert st.startswith("bad-gravity") and why in st and grid.visible.sum() == 0


def test_camera_pointing_at_the_sky():
    cam = CameraModel(320, 240, 250.0, 250.0, 159.5, 119.5, mount=Mount(0.8, -50.0))
    p = Perception(cam)
    grid = p.new_grid()
    st = p.process(_street_like(), None, grid)
    assert st.startswith("no-ground") and grid.visible.sum() == 0
    # A level camera whose base pitches nose-up by 28 deg sees no ground either.
    p2 = Perception(cam.with_mount(pitch_deg=0.0))
    a = math.radians(28.0)
    st2 = p2.process(_street_like(), (9.81 * math.sin(a), 0.0, 9.81 * math.cos(a)), grid)
    assert st2.startswith("no-ground") and grid.visible.sum() == 0


def test_external_labels(perc, tmp_path):
    mapping = {0: "sky", 1: "building", 3: "road", 7: "ignore"}
    path = tmp_path / "map.toml"
    save_label_map(path, mapping)
    lut = load_label_map(path)
    assert lut[0] == 9 and lut[1] == BUILDING and lut[3] == ROAD and lut[7] == 255 and lut[200] == 255
    lab = np.zeros((240, 320), np.uint8)
    lab[:130] = 1  # a facade 4.4 m away leaving the picture at the top (a band from row 80 would be a 0.9 m wall)
    lab[130:] = 3
    grid = perc.new_grid()
    assert perc.process_labels(lab, None, grid, lut) == "ok"
    assert grid.evidence[ROAD].max() == pytest.approx(1.0) and grid.evidence[BUILDING].max() > 0.99
    assert perc.process_labels(lab[:10], None, grid, lut).startswith("bad-labels")
    assert grid.visible.sum() == 0
    with pytest.raises(InputError, match="unknown class"):
        mapping_lut({1: "spaceship"})
    with pytest.raises(InputError, match="outside 0..255"):
        mapping_lut({300: "road"})
    bad = tmp_path / "bad.toml"
    bad.write_text('format = "other"\n')
    with pytest.raises(InputError, match="bad.toml: format"):
        load_label_map(bad)


def test_per_frame_path_allocates_no_frame_sized_buffers(perc):
    """Peak traced allocation during one frame stays far below one frame (320x240x3 = 230 kB)."""
    import tracemalloc
    grid = perc.new_grid()
    f = _street_like()
    for _ in range(3):
        perc.process(f, (0.1, 0.0, 9.8), grid)
    tracemalloc.start()
    peaks = []
    for _ in range(5):
        base, _ = tracemalloc.get_traced_memory()
        tracemalloc.reset_peak()
        perc.process(f, (0.1, 0.0, 9.8), grid)
        peaks.append(tracemalloc.get_traced_memory()[1] - base)
    tracemalloc.stop()
    assert max(peaks) < 16_000, peaks


def test_corrupted_file_and_odd_layouts(perc, tmp_path):
    import cv2

    bad = tmp_path / "frame.jpg"
    good = cv2.imencode(".jpg", _street_like())[1].tobytes()
    bad.write_bytes(good[: len(good) // 3])  # truncated JPEG
    img = cv2.imread(str(bad), cv2.IMREAD_COLOR)
    grid = perc.new_grid()
    st = perc.process(img, None, grid)
    # OpenCV either refuses the truncated file (None) or returns a partly grey picture; both are handled
    assert st.startswith("bad-frame: no image") or st in ("ok",) or st.startswith("no-ground")
    garbage = tmp_path / "garbage.png"
    garbage.write_bytes(b"\x89PNG\r\n\x1a\n" + bytes(100))
    st = perc.process(cv2.imread(str(garbage), cv2.IMREAD_COLOR), None, grid)
    assert st.startswith("bad-frame: no image") and grid.visible.sum() == 0
    # a mirrored view (negative strides) and a Fortran-ordered copy are processed like the plain frame
    f = _street_like()
    ref = perc.new_grid()
    perc.process(np.ascontiguousarray(f[:, ::-1]), None, ref)
    for variant in (f[:, ::-1], np.asfortranarray(f[:, ::-1])):
        g = perc.new_grid()
        assert perc.process(variant, None, g) == "ok"
        assert np.array_equal(g.evidence, ref.evidence) and np.array_equal(g.visible, ref.visible)


def test_external_labels_reduce_to_block_shares_centred_like_opencv_area():
    """Each raster cell holds the class shares of its block of label pixels: at integer factors this is
    OpenCV's INTER_AREA reduction of each class mask (an independent reference). A nearest-pixel pick
    (INTER_NEAREST takes a block's top-left pixel) would move every boundary 1.5 pixels down at 4x."""
    import cv2

    from tinyloc.classes import NUM_CLASSES
    from tinyloc.perception.labels_in import UNLABELLED, LabelImporter

    rng = np.random.default_rng(17)
    lut = mapping_lut({0: "sky", 1: "building", 3: "road", 7: "sidewalk"})
    img = rng.choice(np.array([0, 1, 3, 7, 99], np.uint8), size=(480, 640))
    img[241:300] = 3  # a boundary inside a block (rows 240..243 hold 1 row of noise, 3 of road)
    imp = LabelImporter((640, 480), (160, 120), lut)
    probs, labels = imp.run(img)
    mapped = lut[img]
    worst = 0.0
    for c in range(NUM_CLASSES):
        ref = cv2.resize((mapped == c).astype(np.float32), (160, 120), interpolation=cv2.INTER_AREA)
        worst = max(worst, float(np.max(np.abs(ref - probs[c]))))
    assert worst < 1e-6, worst
    # majority class, unlabelled where most of the block is unmapped
    unm = cv2.resize((mapped == UNLABELLED).astype(np.float32), (160, 120), interpolation=cv2.INTER_AREA)
    top = np.max(probs, axis=0)
    decided = np.abs(top - unm) > 1e-6
    want = np.where(unm > top, UNLABELLED, np.argmax(probs, axis=0))
    assert np.array_equal(labels[decided], want[decided])
    assert labels[60, 10] == ROAD and abs(probs[ROAD, 60, 10] - 0.75) < 0.25 + 1e-6
    assert np.all(labels[61:75] == ROAD)
