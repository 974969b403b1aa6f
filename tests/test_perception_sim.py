"""Segmentation and bird's-eye evidence on rendered frames, against the simulator's hidden world.

Outside reference: tinyloc's simulator (a separate stage): per-pixel true classes from its ray caster,
and the true class of every ground cell from its world (ground polygons, building boxes); see
tests/_perception_sim.py. The segmenter's thresholds were tuned on sites 1 and 2; these tests use
sites 5 and 6. Floors are measured values minus about 0.03 (docs/perception.md has the tables); they
follow the simulator's rendering, so a change of its look can move them. The issue's bird's-eye goal
(>= 0.6 for buildings and road within 20 m) is met for road and not for buildings; the "oracle" rows
show how much of the gap is segmentation rather than projection.

Bird's-eye IoU is counted over the cells the camera can honestly claim from this pose: cells within
20 m that the "oracle" grid (the true label image through the same projector) marks as seen, i.e.
ground it saw plus, behind every facade foot it saw, the strip from ``building_start_m`` to
``building_start_m + building_depth_m`` along the ray (0 to 2 m by default, 0.25 to 2.25 m with the
optional building checks) (a facade at range r says "building from r on",
the cells just behind it are inside). A building's hidden interior and whatever stands behind it do
not count. The truth in those cells is the world, not the oracle; a cell's predicted class is its
strongest evidence channel when above 0.3. Buildings are also scored with a 1 m tolerance, as
boundary benchmarks match contours (Martin, Fowlkes and Malik 2004, with SciPy's Euclidean distance
transform): precision = share of the cells we mark building that lie within 1 m of a building of the
world, recall = share of the claimable true building cells within 1 m of a cell we mark, and F their
harmonic mean; a facade placed half a metre off then still counts, which the cell IoU does not allow.
"""

import csv
from pathlib import Path

import cv2
import numpy as np
import pytest
from scipy.ndimage import distance_transform_edt

from _perception_sim import WorldRaster, building_frames, gravity_of, rendered_frames, sim_camera
from tinyloc.camera.model import load_camera
from tinyloc.classes import BUILDING, GRASS, NUM_CLASSES, ROAD, SIDEWALK, SKY, TREE
from tinyloc.perception.overhead import CHECKED_BUILDINGS, OverheadParams
from tinyloc.perception.pipeline import Perception, PerceptionParams
from tinyloc.perception.segment import labels_at, preset

SEEDS = (5, 6)
FRAMES = 8
PIX_GROUPS = {"sky": [SKY], "building": [BUILDING], "road": [ROAD], "sidewalk": [SIDEWALK],
              "road+sidewalk": [ROAD, SIDEWALK], "vegetation": [TREE, GRASS]}
BEV_CLASSES = {"building": BUILDING, "road": ROAD, "sidewalk": SIDEWALK, "grass": GRASS}
# road and sidewalk apart: two sidewalk poses in a tree's shadow, with sunlit paving beyond, take the
# shadowed paving for asphalt (the per-frame surface rule, docs/perception.md): 0.736 -> 0.668 and
# 0.809 -> 0.712, while both together and every bird's-eye ground class gained
PIX_FLOORS = {"sky": 0.83, "building": 0.59, "road": 0.64, "sidewalk": 0.68, "road+sidewalk": 0.92, "vegetation": 0.67}
# buildings with the default height check (low runs as fences): 0.136 -> 0.208, F@1m 0.368 -> 0.512; with
# the object-in-front and trunk checks (stack_share, trunk_width_m): 0.212 -> 0.245, precision within 1 m
# 0.425 -> 0.526, F@1m 0.521 -> 0.590
BEV_FLOORS = {"building": 0.21, "road": 0.67, "sidewalk": 0.46, "grass": 0.73, "building F@1m": 0.56,
              "building P@1m": 0.49}
ORACLE_FLOORS = {"building": 0.55, "road": 0.86, "building F@1m": 0.95}
FACING_FLOORS = {"building": 0.40, "building F@1m": 0.79}
FACING_ORACLE_FLOORS = {"building": 0.67}
# with the building size checks and start offset too (overhead.CHECKED_BUILDINGS; not the default, see the docs)
CHECKED_FLOORS = {"building": 0.23, "road": 0.68, "building F@1m": 0.58}
CHECKED_ORACLE_FLOORS = {"building": 0.61, "building F@1m": 0.95}
CHECKED_FACING_FLOORS = {"building": 0.38, "building F@1m": 0.78}


def _evaluate(make_frames, overhead=None):
    cam = sim_camera()
    ov = overhead if overhead is not None else OverheadParams()
    pix = np.zeros((len(PIX_GROUPS), 2), np.int64)
    bev = {k: np.zeros(2, np.int64) for k in BEV_CLASSES}
    oracle = {k: np.zeros(2, np.int64) for k in BEV_CLASSES}
    tol = {k: np.zeros(4, np.int64) for k in ("ours", "oracle")}  # building within 1 m: P hit, P, T hit, T
    percs = {s: Perception(cam, PerceptionParams(segment=preset("street" if s == "road" else "sidewalk"), overhead=ov))
             for s in ("road", "sidewalk")}
    lut = np.full(256, 255, np.uint8)
    lut[:NUM_CLASSES] = np.arange(NUM_CLASSES)
    statuses = []
    for seed in SEEDS:
        site, frames = make_frames(seed, FRAMES, cam)
        truth = WorldRaster(site.world)
        for pose, surface, bgr, lab in frames:
            perc = percs[surface]
            grid, ograd = perc.new_grid(), perc.new_grid()
            g = gravity_of(pose)
            statuses.append(perc.process(bgr, g, grid))
            pred = labels_at(perc.probs, (cam.width, cam.height))
            m = lab != 255
            for n, cs in enumerate(PIX_GROUPS.values()):
                a, b = np.isin(pred, cs) & m, np.isin(lab, cs) & m
                pix[n] += np.count_nonzero(a & b), np.count_nonzero(a | b)
            perc.process_labels(lab, g, ograd, lut)
            true = truth.bev_truth(grid, pose)
            xf, yl = grid.cell_centres()
            near = np.hypot(xf, yl) <= 20.0
            world_bld = (true == BUILDING) & near
            for name, acc, gr in (("ours", bev, grid), ("oracle", oracle, ograd)):
                seen = ograd.visible > 0  # what the camera truly saw
                mask = near & seen & (true != 255)
                best = gr.evidence.argmax(axis=0)
                strong = (gr.visible > 0) & (gr.evidence.max(axis=0) > 0.3)
                for k, c in BEV_CLASSES.items():
                    a = mask & strong & (best == c)
                    b = mask & (true == c)
                    acc[k] += np.count_nonzero(a & b), np.count_nonzero(a | b)
                # tolerance matching (as boundary benchmarks do): a building cell placed within 1 m of the
                # world's buildings is right; a claimable true building cell within 1 m of one placed is found
                placed = near & strong & (best == BUILDING)
                claim = mask & (true == BUILDING)
                d_world = distance_transform_edt(~world_bld) * grid.res_m if world_bld.any() else np.full(true.shape, 1e9)
                d_placed = distance_transform_edt(~placed) * grid.res_m if placed.any() else np.full(true.shape, 1e9)
                tol[name] += (np.count_nonzero(placed & (d_world <= 1.0)), np.count_nonzero(placed),
                              np.count_nonzero(claim & (d_placed <= 1.0)), np.count_nonzero(claim))
    iou_pix = {k: pix[n, 0] / max(pix[n, 1], 1) for n, k in enumerate(PIX_GROUPS)}
    iou_bev = {k: v[0] / max(v[1], 1) for k, v in bev.items()}
    iou_or = {k: v[0] / max(v[1], 1) for k, v in oracle.items()}
    for k, v in tol.items():
        pr, rc = v[0] / max(v[1], 1), v[2] / max(v[3], 1)
        (iou_or if k == "oracle" else iou_bev).update({"building P@1m": pr, "building R@1m": rc,
                                                        "building F@1m": 2 * pr * rc / max(pr + rc, 1e-9)})
    return iou_pix, iou_bev, iou_or, statuses


@pytest.fixture(scope="module")
def results():
    return _evaluate(rendered_frames)


@pytest.fixture(scope="module")
def facing():
    return _evaluate(building_frames)


def test_bev_with_building_checks():
    """The optional building size checks: far fewer false building cells from street poses."""
    ov = OverheadParams(**CHECKED_BUILDINGS)
    _, iou, oracle, _ = _evaluate(rendered_frames, ov)
    _, fiou, _, _ = _evaluate(building_frames, ov)
    print("BEV with building checks (ours):", {k: round(v, 3) for k, v in iou.items()})
    print("BEV with building checks (true labels):", {k: round(v, 3) for k, v in oracle.items()})
    print("BEV with building checks, facing (ours):", {k: round(v, 3) for k, v in fiou.items()})
    for k, floor in CHECKED_FLOORS.items():
        assert iou[k] >= floor, (k, iou[k])
    for k, floor in CHECKED_ORACLE_FLOORS.items():
        assert oracle[k] >= floor, (k, oracle[k])
    for k, floor in CHECKED_FACING_FLOORS.items():
        assert fiou[k] >= floor, (k, fiou[k])


def test_rendered_frames_segmentation_iou(results):
    iou, _, _, statuses = results
    print("rendered-frame IoU:", {k: round(v, 3) for k, v in iou.items()})
    assert statuses.count("ok") == len(statuses)
    for k, floor in PIX_FLOORS.items():
        assert iou[k] >= floor, (k, iou[k])


def test_bev_against_true_world(results):
    _, iou, oracle, _ = results
    print("BEV IoU within 20 m (ours):", {k: round(v, 3) for k, v in iou.items()})
    print("BEV IoU within 20 m (true labels through the projector):", {k: round(v, 3) for k, v in oracle.items()})
    for k, floor in BEV_FLOORS.items():
        assert iou[k] >= floor, (k, iou[k])
    for k, floor in ORACLE_FLOORS.items():
        assert oracle[k] >= floor, (k, oracle[k])


def test_bev_facing_buildings(facing):
    """Poses 5-12 m in front of a building face: the facade's foot is in view, so buildings are measurable."""
    pix, iou, oracle, statuses = facing
    print("facing buildings, pixel IoU:", {k: round(v, 3) for k, v in pix.items()})
    print("facing buildings, BEV IoU (ours):", {k: round(v, 3) for k, v in iou.items()})
    print("facing buildings, BEV IoU (true labels):", {k: round(v, 3) for k, v in oracle.items()})
    for k, floor in FACING_FLOORS.items():
        assert iou[k] >= floor, (k, iou[k])
    for k, floor in FACING_ORACLE_FLOORS.items():
        assert oracle[k] >= floor, (k, oracle[k])


DEMO_RUN = Path(__file__).resolve().parents[1] / "tinyloc" / "data" / "demo" / "run"
# sidewalk 0.823 -> 0.792 with the per-frame surface rule and the tighter colour match (road+sidewalk
# 0.885 -> 0.898, vegetation 0.656 -> 0.674)
DEMO_FLOORS = {"sky": 0.72, "building": 0.23, "sidewalk": 0.76, "road+sidewalk": 0.86, "vegetation": 0.64}


def test_demo_run_frames():
    """The bundled demo run (another site, the rover's own drive on sidewalks, JPEG frames, IMU gravity)."""
    need = ["camera.toml", "frames.csv", "imu.csv", "labels"]
    missing = [n for n in need if not (DEMO_RUN / n).exists()]
    if missing:
        pytest.skip(f"demo run at {DEMO_RUN} lacks {', '.join(missing)} (the simulator regenerates it)")
    cam = load_camera(DEMO_RUN / "camera.toml")
    imu = np.loadtxt(DEMO_RUN / "imu.csv", delimiter=",", skiprows=1, ndmin=2)
    perc = Perception(cam, PerceptionParams(segment=preset("sidewalk")))
    grid = perc.new_grid()
    counts = np.zeros((len(PIX_GROUPS), 2), np.int64)
    with open(DEMO_RUN / "frames.csv", newline="") as f:
        rows = list(csv.DictReader(f))
    for row in rows:
        img = cv2.imread(str(DEMO_RUN / row["file"]), cv2.IMREAD_COLOR)
        lab = cv2.imread(str(DEMO_RUN / "labels" / (Path(row["file"]).stem + ".png")), cv2.IMREAD_GRAYSCALE)
        k = int(np.argmin(np.abs(imu[:, 0] - float(row["t"]))))
        assert perc.process(img, imu[k, 1:4], grid) == "ok"
        pred = labels_at(perc.probs, (cam.width, cam.height))
        m = lab != 255
        for n, cs in enumerate(PIX_GROUPS.values()):
            a, b = np.isin(pred, cs) & m, np.isin(lab, cs) & m
            counts[n] += np.count_nonzero(a & b), np.count_nonzero(a | b)
    iou = {k: counts[n, 0] / max(counts[n, 1], 1) for n, k in enumerate(PIX_GROUPS)}
    print(f"demo run ({len(rows)} frames) IoU:", {k: round(v, 3) for k, v in iou.items()})
    for k, floor in DEMO_FLOORS.items():
        assert iou[k] >= floor, (k, iou[k])
