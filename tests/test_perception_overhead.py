"""Overhead projection: geometry against OpenCV's homography tools, kernels against NumPy references.

References: for an undistorted pinhole camera, ground plane -> image is a homography; we build it with
cv2.getPerspectiveTransform from four ground points projected by cv2.projectPoints, and compare our
pixel -> ground mapping (cv2.perspectiveTransform) and our per-cell bilinear gather (cv2.warpPerspective
with WARP_INVERSE_MAP) with it. With distortion, cv2.projectPoints itself is the reference.
"""

import math
from dataclasses import replace

import cv2
import numpy as np
import pytest

from tinyloc.camera.model import CameraModel, Mount
from tinyloc.classes import BUILDING, FENCE, NUM_CLASSES, ROAD, SIDEWALK, TREE
from tinyloc.frames import rot_x, rot_y
from tinyloc.perception import _kernels as K
from tinyloc.perception.gravity import horizon_rows_reference, level_from_base
from tinyloc.perception.overhead import IS_GROUND, STACK_CHROMA_OFF, STACK_DIST_15, TO_MAP, OverheadParams, \
    OverheadProjector


def _cam(dist=(0.0,) * 5, mount=Mount(0.8, 10.0, 0.0, 0.0, 0.0, 0.0)):
    return CameraModel(160, 120, 125.0, 124.0, 79.5, 60.2, tuple(dist), mount)


def _project_cv(cam, pts_base):
    r_bc, t_bc = cam.mount.base_from_camera()
    rvec, _ = cv2.Rodrigues(r_bc.T)
    uv, _ = cv2.projectPoints(np.asarray(pts_base, float), rvec, -r_bc.T @ t_bc, cam.K, cam.dist_array)
    return uv.reshape(-1, 2)


@pytest.mark.parametrize("mount", [Mount(0.8, 10.0), Mount(0.5, 4.0, 1.0, 3.0, 0.2, -0.1), Mount(1.4, 22.0)])
def test_pixel_to_ground_matches_homography(mount):
    cam = _cam(mount=mount)
    proj = OverheadProjector(cam)
    ground = np.array([[3.0, -2.0, 0], [3.0, 2.0, 0], [12.0, -4.0, 0], [12.0, 4.0, 0]])
    uv = _project_cv(cam, ground)
    h = cv2.getPerspectiveTransform(uv.astype(np.float32), ground[:, :2].astype(np.float32))
    rng = np.random.default_rng(3)
    pts = np.stack([rng.uniform(2.0, 10.0, 200), rng.uniform(-3.0, 3.0, 200), np.zeros(200)], 1)
    pix = _project_cv(cam, pts)
    ok = (pix[:, 0] > 0) & (pix[:, 0] < cam.width - 1) & (pix[:, 1] > 0) & (pix[:, 1] < cam.height - 1)
    ours = proj.pixel_to_ground(pix[ok])
    ref = cv2.perspectiveTransform(pix[ok].reshape(-1, 1, 2), h).reshape(-1, 2)
    # float32 homography: its own rounding is ~1e-4 m at 10 m; the goal is 1 cm.
    assert ok.sum() > 100
    assert np.max(np.hypot(*(ours - ref).T)) < 0.01
    assert np.max(np.hypot(*(ours - pts[ok, :2]).T)) < 1e-6  # and the exact truth


def test_cell_lookup_matches_projectpoints_with_distortion():
    cam = _cam(dist=(-0.2, 0.05, 0.001, -0.0005, 0.0))
    proj = OverheadProjector(cam)
    ref = _project_cv(cam, proj.cells)
    ok = np.isfinite(proj.lut_u)
    assert ok.sum() > 500
    err = np.hypot(proj.lut_u[ok] - ref[ok, 0], proj.lut_v[ok] - ref[ok, 1])
    assert np.max(err) < 1e-6
    # every cell that is in view for OpenCV and within the undistorted field is in our lookup
    inside = (ref[:, 0] >= 0) & (ref[:, 0] <= cam.width - 1) & (ref[:, 1] >= 0) & (ref[:, 1] <= cam.height - 1)
    assert np.all(ok[inside & (proj.cells[:, 0] > 1.0)])


def test_ground_gather_matches_warpperspective():
    cam = _cam()
    p = OverheadParams(max_range_m=50.0)
    proj = OverheadProjector(cam, p)
    grid = p.new_grid()
    h_img, w_img = cam.height, cam.width
    yy, xx = np.mgrid[0:h_img, 0:w_img]
    smooth = (0.5 + 0.25 * np.sin(xx / 9.0) + 0.2 * np.cos(yy / 7.0)).astype(np.float32)
    probs = np.zeros((NUM_CLASSES, h_img, w_img), np.float32)
    probs[ROAD] = smooth
    labels = np.full((h_img, w_img), ROAD, np.uint8)
    hrow = proj.horizon(np.eye(3))
    proj.project(probs, labels, np.eye(3), hrow, grid, tilted=False)
    # Homography BEV cell (col, row) -> pixel, from four cell centres projected by OpenCV.
    cells = np.array([[6.5, 20.5], [6.5, 44.5], [40.5, 10.5], [40.5, 54.5]])  # (col, row)
    body = np.stack([(cells[:, 0] - p.origin_col) * p.res_m, (p.origin_row - cells[:, 1]) * p.res_m,
                     np.zeros(4)], 1)
    uv = _project_cv(cam, body)
    hm = cv2.getPerspectiveTransform((cells - 0.5).astype(np.float32), uv.astype(np.float32))
    warped = cv2.warpPerspective(smooth, hm, (p.cols, p.rows), flags=cv2.INTER_LINEAR | cv2.WARP_INVERSE_MAP,
                                 borderMode=cv2.BORDER_CONSTANT, borderValue=-1.0)
    seen = grid.visible > 0
    both = seen & (warped >= 0)
    assert both.sum() > 800
    assert np.max(np.abs(grid.evidence[ROAD][both] - warped[both])) < 0.01  # OpenCV's 5-bit bilinear weights
    assert np.max(np.abs(grid.free[seen] - np.minimum(grid.evidence[ROAD][seen], 1.0))) < 1e-6


def _gather_reference(probs, labels, pu, pv, rng_m, max_range, hrow, grid_shape):
    """Plain-loop reference of the ground gather."""
    C, h, w = probs.shape
    ev = np.zeros((9,) + grid_shape, np.float32)
    free = np.zeros(grid_shape, np.float32)
    vis = np.zeros(grid_shape, np.float32)
    for n in range(grid_shape[0] * grid_shape[1]):
        u, v = pu[n], pv[n]
        if not (np.isfinite(u) and 0 <= u <= w - 1 and 0 <= v <= h - 1) or rng_m[n] > max_range:
            continue
        iu, iv = int(u + 0.5), int(v + 0.5)
        if iv <= hrow[iu] or not IS_GROUND[labels[iv, iu]]:
            continue
        r, c = divmod(n, grid_shape[1])
        j0, i0 = min(int(u), w - 2), min(int(v), h - 2)
        fu, fv = u - j0, v - i0
        samp = ((1 - fu) * (1 - fv) * probs[:, i0, j0] + fu * (1 - fv) * probs[:, i0, j0 + 1]
                + (1 - fu) * fv * probs[:, i0 + 1, j0] + fu * fv * probs[:, i0 + 1, j0 + 1])
        for k in range(C):
            if IS_GROUND[k] and TO_MAP[k] >= 0:
                ev[TO_MAP[k], r, c] = samp[k]
        free[r, c] = min(sum(samp[k] for k in range(C) if IS_GROUND[k]), 1.0)
        vis[r, c] = 1
    return ev, free, vis


def test_ground_gather_kernel_vs_reference(rng):
    cam = _cam(dist=(-0.1, 0.01, 0, 0, 0))
    p = OverheadParams(rows=32, cols=32, res_m=0.5, origin_row=16.0)
    proj = OverheadProjector(cam, p)
    probs = rng.random((NUM_CLASSES, cam.height, cam.width)).astype(np.float32)
    probs /= probs.sum(axis=0, keepdims=True)
    labels = probs.argmax(axis=0).astype(np.uint8)
    hrow = proj.horizon(np.eye(3))
    grid = p.new_grid()
    K.ground_gather(probs, labels, proj.lut_u, proj.lut_v, proj.cell_range, p.max_range_m, IS_GROUND, TO_MAP,
                    hrow, grid.evidence, grid.free, grid.visible)
    ev, free, vis = _gather_reference(probs, labels, proj.lut_u, proj.lut_v, proj.cell_range, p.max_range_m,
                                      hrow, (32, 32))
    assert vis.sum() > 50
    assert np.max(np.abs(grid.evidence - ev)) < 1e-5
    assert np.max(np.abs(grid.free - free)) < 1e-5
    assert np.array_equal(grid.visible, vis)


def _wall_scene(cam, top, cols=None):
    """Labels/probs of a road with a wall whose foot is at row 80 and whose top is at row ``top``."""
    h, w = cam.height, cam.width
    labels = np.full((h, w), ROAD, np.uint8)
    sl = slice(None) if cols is None else cols
    labels[top:81, sl] = BUILDING
    probs = np.zeros((NUM_CLASSES, h, w), np.float32)
    probs[BUILDING][labels == BUILDING] = 1.0
    probs[ROAD][labels == ROAD] = 1.0
    return probs, labels


def _expected_cells(proj, grid, cols, d_m):
    """Cells hit by the foot points of ``cols`` moved ``d_m`` metres further along their horizontal ray."""
    gp = proj.pixel_to_ground(np.stack([cols, np.full(len(cols), 80.5)], 1))
    cam_xy = proj.camera.mount.base_from_camera()[1][:2]
    u = gp - cam_xy
    u /= np.linalg.norm(u, axis=1, keepdims=True)
    gp = gp + d_m * u
    rows, cc = grid.cell_of(gp[:, 0], gp[:, 1])
    expect = np.zeros(grid.shape, bool)
    for r, c in zip(np.floor(rows).astype(int), np.floor(cc).astype(int)):
        if 0 <= r < grid.shape[0] and 0 <= c < grid.shape[1]:
            expect[r, c] = True
    return expect


@pytest.mark.parametrize("start_m", [0.0, 0.25])
def test_vertical_contact_range(start_m):
    """A facade whose foot is at row 80 in every column lands where the ray through the row edge meets the
    ground (moved ``building_start_m`` further along the ray)."""
    cam = _cam()
    p = OverheadParams(building_depth_m=0.0, building_start_m=start_m, min_building_height_m=3.0,
                       min_building_width_m=1.0)
    proj = OverheadProjector(cam, p)
    w = cam.width
    probs, labels = _wall_scene(cam, 0)  # leaves the picture at the top: tall enough
    grid = p.new_grid()
    hrow = proj.horizon(np.eye(3))
    feet = proj.project(probs, labels, np.eye(3), hrow, grid, tilted=False)
    assert feet == w  # every column finds the wall's foot within range
    # The foot: halfway between pixel centres 80 and 81 (one-hot probabilities cross 0.5 there).
    expect = _expected_cells(proj, grid, np.arange(w), start_m)
    got = grid.evidence[BUILDING] > 0
    assert np.array_equal(got, expect)
    assert np.all(grid.free[got] == 0) and np.all(grid.visible[got] == 1)
    # Nothing is seen behind the wall.
    assert grid.evidence[TREE].sum() == 0 and grid.evidence[SIDEWALK].sum() == 0


def test_low_and_narrow_buildings():
    """Size checks: a building run topping out below the camera (row 40 is under this camera's horizon,
    row 38.2) is too low for a house and is not placed; a tall run 4 columns wide (about 0.2 m at the
    foot's 6 m) is placed as a tree trunk; with both checks off the low wall is placed as building."""
    cam = _cam()
    p = OverheadParams(building_depth_m=0.0, building_start_m=0.0, min_building_height_m=3.0,
                       min_building_width_m=1.0, low_building_as="none")
    proj = OverheadProjector(cam, p)
    hrow = proj.horizon(np.eye(3))
    assert 38.0 < hrow[80] < 38.5
    grid = p.new_grid()
    probs, labels = _wall_scene(cam, 40)
    assert proj.project(probs, labels, np.eye(3), hrow, grid, tilted=False) == 0
    assert grid.evidence[BUILDING].sum() == 0 and grid.evidence[TREE].sum() == 0
    p_off = OverheadParams(building_depth_m=0.0, building_start_m=0.0, min_building_height_m=0.0,
                           min_building_width_m=0.0)
    assert OverheadProjector(cam, p_off).project(probs, labels, np.eye(3), hrow, grid, tilted=False) == cam.width
    assert grid.evidence[BUILDING].sum() > 0
    # Height just at the limit: the top pixel's ray at the foot's range, computed here in NumPy.
    gp = proj.pixel_to_ground([[80.0, 80.5]])[0]
    t, d = cam.pixel_rays_base(np.array([[80.0, 10.0]]))
    cam_xy = cam.mount.base_from_camera()[1]
    top_h = cam_xy[2] + d[0, 2] * np.hypot(*(gp - cam_xy[:2])) / np.hypot(d[0, 0], d[0, 1])
    probs, labels = _wall_scene(cam, 10)
    for lim, placed in ((top_h - 0.05, True), (top_h + 0.05, False)):
        pp = OverheadParams(building_depth_m=0.0, building_start_m=0.0, min_building_height_m=float(lim),
                            min_building_width_m=1.0)
        n = OverheadProjector(cam, pp).project(probs, labels, np.eye(3), hrow, grid, tilted=False)
        assert (grid.evidence[BUILDING, :, :].sum() > 0) == placed, (lim, n)
    # A low run as a fence (the default since the loop measured it better): fence evidence object_depth_m
    # deep, no building.
    d = OverheadParams()
    assert (d.min_building_height_m, d.min_building_width_m, d.low_building_as) == (3.0, 0.0, "fence")
    pf = OverheadParams(building_depth_m=0.0, building_start_m=0.0)
    probs, labels = _wall_scene(cam, 40)
    assert OverheadProjector(cam, pf).project(probs, labels, np.eye(3), hrow, grid, tilted=False) == cam.width
    assert grid.evidence[BUILDING].sum() == 0 and grid.evidence[FENCE].sum() > 0
    # A narrow tall run: a trunk.
    probs, labels = _wall_scene(cam, 0, cols=slice(78, 82))
    assert proj.project(probs, labels, np.eye(3), hrow, grid, tilted=False) == 4
    assert grid.evidence[BUILDING].sum() == 0
    assert np.array_equal(grid.evidence[TREE] > 0, _expected_cells(proj, grid, np.arange(78, 82), 0.0) |
                          _expected_cells(proj, grid, np.arange(78, 82), p.object_depth_m))


def test_horizon_kernel_vs_reference():
    cam = _cam(dist=(-0.15, 0.02, 0, 0, 0), mount=Mount(0.8, 6.0, 2.0))
    proj = OverheadProjector(cam)
    for f in [(0.0, 0.0, 9.81), (-1.0, 0.5, 9.7), (0.8, -0.3, 9.75)]:
        lv, st = level_from_base(f)
        assert st == "ok"
        got = proj.horizon(lv).copy()
        ref = horizon_rows_reference(cam, lv)
        assert np.max(np.abs(got - ref)) < 1e-9


def test_level_from_base_recovers_tilt():
    g = 9.81
    pitch, roll = math.radians(7.0), math.radians(-4.0)
    r_true = rot_y(pitch) @ rot_x(roll)
    f_base = r_true.T @ np.array([0.0, 0.0, g])  # what the accelerometer reads on the tilted base
    lv, st = level_from_base(f_base)
    assert st == "ok" and np.max(np.abs(lv - r_true)) < 1e-12
    assert np.allclose(lv @ f_base, [0, 0, g])
    for bad, why in [((np.nan, 0, 9.8), "not finite"), ((0, 0, 0.1), "not near 1 g"),
                     ((9.81 * math.sin(math.radians(50)), 0, 9.81 * math.cos(math.radians(50))), "tilted")]:
        lv, st = level_from_base(bad)
        assert st.startswith("bad-gravity") and why in st and np.array_equal(lv, np.eye(3))
    assert level_from_base(None)[1] == "no-imu"


def test_tilted_lookup_equals_remounted_camera():
    """A base pitched up by 5 deg under a 12 deg-down mount sees the ground as a level base with a 7 deg mount
    (and the camera centre rotated with the base about the base origin)."""
    cam = _cam(mount=Mount(0.8, 12.0))
    proj = OverheadProjector(cam)
    lv = rot_y(math.radians(-5.0))  # level_from_base of a base pitched 5 deg up (nose up)
    pu, pv = proj.lookup(lv, tilted=True)
    c = lv @ np.array([0.0, 0.0, 0.8])
    ref = OverheadProjector(cam.with_mount(pitch_deg=7.0, x_m=c[0], height_m=c[2]))
    ok = np.isfinite(ref.lut_u)
    assert ok.sum() > 300
    assert np.nanmax(np.abs(pu[ok] - ref.lut_u[ok])) < 1e-6 and np.nanmax(np.abs(pv[ok] - ref.lut_v[ok])) < 1e-6


def _row_heights(cam, proj, foot_row=80.5, col=80.0):
    """Height above the ground (m) of every pixel row of column ``col`` where it meets the vertical plane at
    the foot's horizontal range (NumPy, from the camera model: independent of the kernel's arithmetic)."""
    gp = proj.pixel_to_ground([[col, foot_row]])[0]
    cam_xyz = cam.mount.base_from_camera()[1]
    dh = np.hypot(*(gp - cam_xyz[:2]))
    _, d = cam.pixel_rays_base(np.stack([np.full(cam.height, col), np.arange(cam.height, dtype=float)], 1))
    return cam_xyz[2] + d[:, 2] * dh / np.hypot(d[:, 0], d[:, 1])


def _tall_wall(cam, foot):
    """Labels/probs of a road with a wall from the image's top down to row ``foot``."""
    h, w = cam.height, cam.width
    labels = np.full((h, w), ROAD, np.uint8)
    labels[:foot + 1] = BUILDING
    probs = np.zeros((NUM_CLASSES, h, w), np.float32)
    probs[BUILDING][labels == BUILDING] = 1.0
    probs[ROAD][labels == ROAD] = 1.0
    return probs, labels


def _stack_lab(cam, z, base_lab, upper_lab, n_upper_like_base=0, foot=72):
    """Lab raster: rows below 1.5 m (at the foot's range) ``base_lab``, rows above ``upper_lab``, except
    the ``n_upper_like_base`` lowest rows at least 3 m up, which get ``base_lab`` again."""
    lab = np.zeros((cam.height, cam.width, 3), np.uint8)
    lab[:] = upper_lab
    lab[z < 1.5] = base_lab
    up = np.flatnonzero((z >= 3.0) & (np.arange(cam.height) <= foot))[::-1]  # rows from low to high
    lab[up[:n_upper_like_base]] = base_lab
    return lab, len(up)


def test_stacked_object_in_front_of_facade():
    """A tall building run whose base (0.2 .. 1 m up) has a colour that its part above 3 m does not share
    is a car or garden wall in front of the facade: placed as the low class (a fence by default), the
    facade not at all. Hand-made Lab rasters; the share and the colour distance are tested at their
    limits. Without colour (an external label image) the check is skipped."""
    cam = _cam(mount=Mount(0.8, 0.0))  # level camera: a wall 8 m away fills the column from 0 to 4.7 m
    p = OverheadParams(building_depth_m=0.0, stack_share=0.2, stack_dist=20.0)
    proj = OverheadProjector(cam, p)
    hrow = proj.horizon(np.eye(3))
    z = _row_heights(cam, proj, foot_row=72.5)
    assert z[72] < 0.2 and np.count_nonzero((z >= 0.2) & (z <= 1.0)) >= 2 and z[0] > 3.0
    probs, labels = _tall_wall(cam, 72)
    grid = p.new_grid()
    base, facade = (100, 128, 128), (100, 150, 128)  # distance 22 > 20
    lab, nu = _stack_lab(cam, z, base, facade)
    assert nu >= 3
    assert proj.project(probs, labels, np.eye(3), hrow, grid, tilted=False, lab=lab) == cam.width
    assert grid.evidence[BUILDING].sum() == 0 and grid.evidence[FENCE].sum() > 0
    # one colour throughout: a facade
    lab1, _ = _stack_lab(cam, z, base, base)
    proj.project(probs, labels, np.eye(3), hrow, grid, tilted=False, lab=lab1)
    assert grid.evidence[BUILDING].sum() > 0 and grid.evidence[FENCE].sum() == 0
    # colour distance at the limit (0.5 |dL|): 19 counts as the base's colour, 21 does not
    for dl, stacked in ((38, False), (42, True)):
        labd, _ = _stack_lab(cam, z, base, (100 + dl, 128, 128))
        proj.project(probs, labels, np.eye(3), hrow, grid, tilted=False, lab=labd)
        assert (grid.evidence[BUILDING].sum() == 0) == stacked, dl
    # share at the limit: the base's colour on ceil(0.2 nu) upper pixels keeps the facade, one fewer does not
    m = int(np.ceil(0.2 * nu))
    for n_like, stacked in ((m, False), (m - 1, True)):
        labs, _ = _stack_lab(cam, z, base, facade, n_like)
        proj.project(probs, labels, np.eye(3), hrow, grid, tilted=False, lab=labs)
        assert (grid.evidence[BUILDING].sum() == 0) == stacked, (n_like, nu)
    # without the height check there is no upper part to compare: no check
    OverheadProjector(cam, replace(p, min_building_height_m=0.0)).project(probs, labels, np.eye(3), hrow, grid,
                                                                         tilted=False, lab=lab)
    assert grid.evidence[BUILDING].sum() > 0
    # no colour (label images): the facade is placed
    proj.project(probs, labels, np.eye(3), hrow, grid, tilted=False)
    assert grid.evidence[BUILDING].sum() > 0
    # on by default (0.2, 10 since the eighth round; 15 before); off at 0
    assert (OverheadParams().stack_share, OverheadParams().stack_dist) == (0.2, 10.0)
    # the default's colour distance at its limit (0.5 |dL| by hand): 9 counts as the base's colour, 11 does not
    pd = OverheadProjector(cam, OverheadParams(building_depth_m=0.0))
    for dl, stacked in ((18, False), (22, True)):
        labd, _ = _stack_lab(cam, z, base, (100 + dl, 128, 128))
        pd.project(probs, labels, np.eye(3), hrow, grid, tilted=False, lab=labd)
        assert (grid.evidence[BUILDING].sum() == 0) == stacked, dl
    # ... where the previous 15 kept the facade for both
    pp = OverheadProjector(cam, OverheadParams(building_depth_m=0.0, **STACK_DIST_15))
    labd, _ = _stack_lab(cam, z, base, (122, 128, 128))
    pp.project(probs, labels, np.eye(3), hrow, grid, tilted=False, lab=labd)
    assert grid.evidence[BUILDING].sum() > 0
    OverheadProjector(cam, OverheadParams(building_depth_m=0.0, stack_share=0.0)).project(
        probs, labels, np.eye(3), hrow, grid, tilted=False, lab=lab)
    assert grid.evidence[BUILDING].sum() > 0


def test_stacked_object_by_hue():
    """``stack_chroma``: an upper pixel matches the base only when its hue distance |da| + |db| is within
    the limit too. Worked by hand on the drive-26 case (ninth round, docs/perception.md): a wooden fence
    L 83, a* 129, b* 132 in front of a grey facade L 84, a* 128, b* 124 is 0.5 x 1 + 1 + 8 = 9.5 from it,
    under ``stack_dist`` 10, so the default places the pair as one facade at the fence's foot; with
    ``stack_chroma`` 8 the hue distance 9 > 8 makes the fence another object; 9 (equal: still near)
    keeps the facade. A base of the same hue but lighter (a grey wall) is unaffected by the limit."""
    cam = _cam(mount=Mount(0.8, 0.0))
    z = _row_heights(cam, OverheadProjector(cam, OverheadParams()), foot_row=72.5)
    probs, labels = _tall_wall(cam, 72)
    base, facade = (83, 129, 132), (84, 128, 124)
    lab, _ = _stack_lab(cam, z, base, facade)
    for chroma, stacked in ((0.0, False), (9.0, False), (8.0, True), (6.0, True)):
        proj = OverheadProjector(cam, OverheadParams(building_depth_m=0.0, stack_chroma=chroma))
        grid = OverheadParams().new_grid()
        proj.project(probs, labels, np.eye(3), proj.horizon(np.eye(3)), grid, tilted=False, lab=lab)
        assert (grid.evidence[BUILDING].sum() == 0) == stacked, chroma
        assert (grid.evidence[FENCE].sum() > 0) == stacked, chroma
    # same hue, lighter by 18 (0.5 x 18 = 9 <= 10): a facade with or without the hue limit
    labg, _ = _stack_lab(cam, z, (100, 128, 128), (118, 128, 128))
    for chroma in (0.0, 8.0):
        proj = OverheadProjector(cam, OverheadParams(building_depth_m=0.0, stack_chroma=chroma))
        grid = OverheadParams().new_grid()
        proj.project(probs, labels, np.eye(3), proj.horizon(np.eye(3)), grid, tilted=False, lab=labg)
        assert grid.evidence[BUILDING].sum() > 0, chroma
    assert OverheadParams().stack_chroma == 6.0  # on by default since the ninth round; off at 0
    assert OverheadParams(**STACK_CHROMA_OFF).stack_chroma == 0.0
    from tinyloc.errors import InputError
    with pytest.raises(InputError, match="stack_chroma"):
        OverheadParams(stack_chroma=-1.0)


def test_trunk_under_a_crown():
    """A tall building run 4 columns wide (about 0.26 m at 8 m) topped by tree pixels is a trunk when
    ``trunk_width_m`` is on; the same run topped by sky, or a wide run under a crown, stays building."""
    cam = _cam(mount=Mount(0.8, 0.0))
    p = OverheadParams(building_depth_m=0.0, trunk_width_m=1.0)
    proj = OverheadProjector(cam, p)
    hrow = proj.horizon(np.eye(3))
    assert _row_heights(cam, proj, foot_row=72.5)[10] > 3.0  # the run (rows 10 .. 72) is tall enough
    grid = p.new_grid()

    def scene(cols, above, foot=72):
        probs, labels = _tall_wall(cam, foot)
        keep = np.zeros(cam.width, bool)
        keep[cols] = True
        labels[:foot + 1, ~keep] = ROAD  # only ``cols`` hold the run (the rest: far road, nothing stands on it)
        labels[:10, keep] = above
        probs[:] = 0.0
        for k in (BUILDING, ROAD, TREE, 9):
            probs[k][labels == k] = 1.0
        return probs, labels

    probs, labels = scene(slice(78, 82), TREE)
    assert proj.project(probs, labels, np.eye(3), hrow, grid, tilted=False) == 4
    assert grid.evidence[BUILDING].sum() == 0 and grid.evidence[TREE].sum() > 0
    assert OverheadParams().trunk_width_m == 1.0 and not OverheadParams().trunk_at_top  # the defaults
    OverheadProjector(cam, OverheadParams(building_depth_m=0.0, trunk_width_m=0.0)).project(
        probs, labels, np.eye(3), hrow, grid, tilted=False)
    assert grid.evidence[BUILDING].sum() > 0 and grid.evidence[TREE].sum() == 0
    probs, labels = scene(slice(78, 82), 9)  # sky above: no crown
    proj.project(probs, labels, np.eye(3), hrow, grid, tilted=False)
    assert grid.evidence[BUILDING].sum() > 0 and grid.evidence[TREE].sum() == 0
    probs, labels = scene(slice(40, 120), TREE)  # 80 columns, about 5 m at 8 m
    proj.project(probs, labels, np.eye(3), hrow, grid, tilted=False)
    assert grid.evidence[BUILDING].sum() > 0 and grid.evidence[TREE].sum() == 0
    # a narrow run leaving the picture at the top below 3 m (foot row 85, 4 m away: the top row is
    # 0.8 + 4 tan(25.8 deg) = 2.7 m up there, so its height is unverified): a trunk only with trunk_at_top
    z_top = _row_heights(cam, proj, foot_row=85.5)[0]
    assert 2.5 < z_top < 3.0
    at_top = OverheadProjector(cam, replace(p, trunk_at_top=True))
    probs, labels = scene(slice(78, 82), BUILDING, foot=85)
    proj.project(probs, labels, np.eye(3), hrow, grid, tilted=False)
    assert grid.evidence[BUILDING].sum() > 0 and grid.evidence[TREE].sum() == 0
    at_top.project(probs, labels, np.eye(3), hrow, grid, tilted=False)
    assert grid.evidence[BUILDING].sum() == 0 and grid.evidence[TREE].sum() > 0
    probs, labels = scene(slice(78, 82), BUILDING)  # ... not one whose top is seen above 3 m (4.7 m at 8 m)
    at_top.project(probs, labels, np.eye(3), hrow, grid, tilted=False)
    assert grid.evidence[BUILDING].sum() > 0 and grid.evidence[TREE].sum() == 0
    probs, labels = scene(slice(40, 120), BUILDING, foot=85)  # ... nor a wide one
    at_top.project(probs, labels, np.eye(3), hrow, grid, tilted=False)
    assert grid.evidence[BUILDING].sum() > 0 and grid.evidence[TREE].sum() == 0


def test_low_run_on_the_road():
    """``low_on_road_as``: a run too low for a house whose foot stands on road or parking (a parked vehicle)
    takes that class instead of ``low_building_as``; on sidewalk it stays a fence. The wall scene's low wall
    (top at row 40, under this camera's horizon) stands on road."""
    cam = _cam()
    hrow = OverheadProjector(cam, OverheadParams()).horizon(np.eye(3))
    probs, labels = _wall_scene(cam, 40)
    grid = OverheadParams().new_grid()
    out = {}
    for what in ("", "dynamic", "none", "fence"):
        p = OverheadParams(building_depth_m=0.0, building_start_m=0.0, low_on_road_as=what)
        n = OverheadProjector(cam, p).project(probs, labels, np.eye(3), hrow, grid, tilted=False)
        out[what] = (n, grid.evidence[FENCE].sum(), grid.free.copy(), grid.visible.copy())
    assert out[""][0] == cam.width and out[""][1] > 0          # off: a fence, as before
    assert out["fence"][1] == out[""][1]
    assert out["dynamic"][0] == cam.width and out["dynamic"][1] == 0  # placed, without map evidence ...
    feet = _expected_cells(OverheadProjector(cam, OverheadParams()), grid, np.arange(cam.width), 0.0)
    assert np.all(out["dynamic"][2][feet] == 0) and np.all(out["dynamic"][3][feet] == 1)  # ... free cleared there
    assert out["none"][0] == 0 and out["none"][1] == 0           # not placed at all
    # the same wall on sidewalk (and on parking) is judged by what it stands on
    from tinyloc.classes import PARKING
    for ground, fence in ((SIDEWALK, True), (PARKING, False)):
        lb = labels.copy()
        lb[81:] = ground
        pr = np.zeros_like(probs)
        pr[BUILDING][lb == BUILDING] = 1.0
        pr[ground][lb == ground] = 1.0
        p = OverheadParams(building_depth_m=0.0, building_start_m=0.0, low_on_road_as="dynamic")
        OverheadProjector(cam, p).project(pr, lb, np.eye(3), hrow, grid, tilted=False)
        assert (grid.evidence[FENCE].sum() > 0) == fence, ground
    from tinyloc.errors import InputError
    with pytest.raises(InputError, match="low_on_road_as"):
        OverheadParams(low_on_road_as="car")
