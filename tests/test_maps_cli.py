"""End to end through the installed ``tinyloc`` command: pack a GeoJSON written here, query it, render it.

Reference values: coverage 1 inside a footprint and on a road centreline, a tree
disk of the class-table radius, 0 in open space (by construction of the site);
the summed coverage of a polygon against its shoelace area (surveyor's formula).
"""

import json
import shutil
import subprocess
import sys
from pathlib import Path

import cv2
import numpy as np
import pytest

from tinyloc.classes import BY_NAME
from tinyloc.cli.main import main
from tinyloc.maps.compile import PackParams, pack_geojson
from tinyloc.maps.packfile import PackedMap

from _maps_helpers import FRAME, collection, line, point, polygon, shoelace, star_polygon, write_json

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "maps_packed"


def tinyloc_cmd():
    exe = shutil.which("tinyloc")
    return [exe] if exe else [sys.executable, "-m", "tinyloc"]


def latlon_arg(x, y):
    lat, lon = FRAME.to_latlon(x, y)
    return f"{lat:.9f},{lon:.9f}"


# A small site nobody has packed before: an L-shaped building with a courtyard, a two-lane street,
# a footway, a tree, a lamp, a hedge, a lawn and a pond; lots of open space around.
BUILDING = [(10, 10), (40, 10), (40, 25), (25, 25), (25, 40), (10, 40)]
COURTYARD = [(14, 14), (14, 20), (20, 20), (20, 14)]
STREET = [(-20, 0), (80, 0)]          # lanes=2 -> 6 m wide, centreline y = 0
FOOTWAY = [(-20, 5.5), (80, 5.5)]
TREE = (55.3, 12.1)
LAMP = (60.0, 4.0)
LAWN = [(45, 30), (70, 30), (70, 45), (45, 45)]
POND = star_polygon(np.random.default_rng(1), (60.0, 62.0), 9.0, 12.0, 11)


def site():
    return collection([
        polygon([BUILDING, COURTYARD], building="yes", name="Harrow Hall"),
        line(STREET, highway="residential", lanes="2", name="Quillon Street"),
        line(FOOTWAY, highway="footway", footway="sidewalk"),
        point(TREE, natural="tree"),
        point(LAMP, highway="street_lamp"),
        line([(45, 28), (70, 28)], barrier="hedge"),
        polygon([LAWN], landuse="grass"),
        polygon([POND], natural="water"),
        point((0, 30), amenity="bench"),               # unmapped on purpose
        polygon([[(-10, 20), (0, 20), (0, 28)]], building="no"),  # ignored on purpose
    ])


@pytest.fixture(scope="module")
def packed(tmp_path_factory):
    d = tmp_path_factory.mktemp("cli")
    src = write_json(d / "fresh_site.geojson", site())
    out = d / "fresh_site.tlm"
    r = subprocess.run(tinyloc_cmd() + ["map", "pack", str(src), "-o", str(out), "--json"],
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    return d, src, out, json.loads(r.stdout)


def test_pack_report_counts(packed):
    _, _, _, rep = packed
    assert rep["features"] == 10
    assert rep["mapped"] == {"building": 1, "road": 1, "sidewalk": 1, "grass": 1, "tree": 1, "pole": 1,
                             "fence": 1, "parking": 0, "water": 1}
    assert rep["unmapped"] == 1 and rep["ignored"] == 1
    assert rep["unmapped_keys"] == [{"key": "amenity", "count": 1}]


@pytest.mark.parametrize("where,xy,want", [
    ("inside the building", (30.0, 15.0), {"building": 1.0}),
    ("inside the other wing", (15.0, 35.0), {"building": 1.0}),
    ("in the courtyard", (17.0, 17.0), {}),
    ("on the street centreline", (33.3, 0.0), {"road": 1.0}),
    ("on the footway", (12.0, 5.5), {"sidewalk": 1.0}),
    ("at the tree", TREE, {"tree": (0.8, 1.0)}),
    ("on the lawn", (57.0, 40.0), {"grass": 1.0}),
    ("in the pond", (60.0, 60.0), {"water": 1.0}),
    ("in open space", (-5.0, 45.0), {}),
])
def test_info_at_points(packed, where, xy, want):
    _, _, out, _ = packed
    r = subprocess.run(tinyloc_cmd() + ["map", "info", str(out), "--json", "--at", latlon_arg(*xy)],
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    d = json.loads(r.stdout)
    assert d["at"]["known"] is True
    assert set(d["coverage"]) == set(BY_NAME[n].name for n in d["classes"])
    for name, v in d["coverage"].items():
        w = want.get(name, 0.0)
        if isinstance(w, tuple):
            assert w[0] <= v <= w[1], (where, name, v)
        else:
            assert v == pytest.approx(w, abs=1e-3), (where, name, v)


def test_info_text_and_outside_point(packed, capsys):
    _, _, out, _ = packed
    assert main(["map", "info", str(out)]) == 0
    text = capsys.readouterr().out
    assert "cells" in text and "building, road, sidewalk" in text
    assert main(["map", "info", str(out), "--at", latlon_arg(2000.0, 0.0), "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert d["at"]["known"] is False and d["coverage"] is None
    assert main(["map", "info", str(out), "--at", latlon_arg(30.0, 15.0)]) == 0
    text = capsys.readouterr().out
    assert "building   1.000" in text


def test_info_check_finds_damaged_tiles(packed, tmp_path, capsys):
    _, _, out, _ = packed
    assert main(["map", "info", str(out), "--check"]) == 0
    assert "all tiles sound" in capsys.readouterr().out
    raw = bytearray(out.read_bytes())
    raw[-20] ^= 0xFF  # inside the last stored tile
    bad = tmp_path / "damaged.tlm"
    bad.write_bytes(bytes(raw))
    assert main(["map", "info", str(bad), "--check", "--json"]) == 1
    assert json.loads(capsys.readouterr().out)["damaged_tiles"] == 1


def test_polygon_coverage_matches_shoelace_area(packed):
    _, _, out, _ = packed
    with PackedMap.open(out) as pm:
        cov = pm.read_all()
        res2 = pm.meta.res_m ** 2
        building = shoelace(BUILDING) - abs(shoelace(COURTYARD))
        pond = shoelace(POND)
        assert building > 200 and pond > 200
        got_b = float(cov[0].sum()) * res2
        got_w = float(cov[8].sum()) * res2
    assert abs(got_b - building) / building < 0.02
    assert abs(got_w - pond) / pond < 0.02


def test_random_polygons_shoelace_through_the_whole_pipeline(tmp_path):
    rng = np.random.default_rng(55)
    feats, areas = [], []
    for k in range(6):
        c = (k * 70.0, (k % 2) * 60.0)
        ring = star_polygon(rng, c, 9.0, 9.0 + 20.0 * rng.random(), int(rng.integers(5, 25)))
        feats.append(polygon([ring], **{"class": "parking"}))
        areas.append(shoelace(ring))
    src = write_json(tmp_path / "polys.geojson", collection(feats))
    pack_geojson(src, tmp_path / "polys.tlm", params=None)
    with PackedMap.open(tmp_path / "polys.tlm") as pm:
        n = int(64 / pm.meta.res_m)
        buf = np.zeros((pm.meta.n_channels, n, n), dtype=np.float32)
        for k, area in enumerate(areas):
            assert area > 200
            x0, y0 = k * 70.0 - 32, (k % 2) * 60.0 + 32  # north-west corner of a 64 m box around polygon k
            r0, c0 = (int(v) for v in np.floor(pm.cell_of(x0, y0)))
            pm.read_window(r0, c0, buf)
            got = float(buf[7].sum()) * pm.meta.res_m ** 2
            assert abs(got - area) / area < 0.02


def test_render_writes_png_with_legend(packed, capsys):
    d, _, out, _ = packed
    png = d / "preview.png"
    assert main(["map", "render", str(out), "-o", str(png), "--px", "400"]) == 0
    img = cv2.imread(str(png))
    assert img is not None and img.shape[1] > 400
    legend = img[:, -190:]
    for name in ("building", "road", "water"):
        col = np.array(BY_NAME[name].color_bgr, dtype=np.uint8)
        assert np.any(np.all(legend == col, axis=2)), name
    win = d / "window.png"
    assert main(["map", "render", str(out), "-o", str(win), "--center", latlon_arg(30, 15), "--size", "20"]) == 0
    img = cv2.imread(str(win))
    # The window is inside the building: the map part is building-coloured.
    assert np.all(img[10, 10] == np.array(BY_NAME["building"].color_bgr, dtype=np.uint8))
    capsys.readouterr()


def test_cli_errors_are_one_line(packed, tmp_path, capsys):
    d, _, out, _ = packed
    rc = main(["map", "render", str(out), "-o", str(tmp_path / "x.png"), "--size", "30"])
    assert rc == 2 and capsys.readouterr().err.strip() == "tinyloc: error: --size needs --center LAT,LON"
    rc = main(["map", "info", str(out), "--at", "44.4,north"])
    err = capsys.readouterr().err.strip()
    assert rc == 2 and err == "tinyloc: error: --at: expected LAT,LON in decimal degrees, got '44.4,north'"
    bad = tmp_path / "bad.tlm"
    bad.write_bytes(b"TLMAP\r\n")
    rc = main(["map", "info", str(bad)])
    err = capsys.readouterr().err.strip().splitlines()
    assert rc == 2 and len(err) == 1 and err[0].startswith(f"tinyloc: error: {bad}: truncated")
    assert main(["map"]) == 2  # group without sub-command shows its help
    assert "pack" in capsys.readouterr().out


def test_progress_reports_every_band(tmp_path):
    calls = []
    src = write_json(tmp_path / "s.geojson", site())
    rep = pack_geojson(src, tmp_path / "s.tlm", progress=lambda d, t, w: calls.append((d, t, w)))
    bands = -(-rep.rows // PackParams().tile)
    assert [c for c in calls if c[2] == "bands"] == [(b + 1, bands, "bands") for b in range(bands)]
    assert [c for c in calls if c[2] == "features"][-1] == (10, 10, "features")


@pytest.mark.parametrize("argv,msg", [
    (["--res", "0"], "resolution 0.0 m is outside 0.02..50 m"),
    (["-o", "/nonexistent-dir/o.tlm"], "/nonexistent-dir/o.tlm: directory /nonexistent-dir does not exist"),
    (["--origin", "95,10"], "--origin: latitude must be in [-90, 90] and longitude in [-180, 180] degrees"),
])
def test_bad_pack_options(tmp_path, capsys, argv, msg):
    src = write_json(tmp_path / "s.geojson", site())
    rc = main(["map", "pack", str(src), "-o", str(tmp_path / "o.tlm"), "-q"] + argv)  # a later -o wins
    assert rc == 2 and capsys.readouterr().err.strip() == f"tinyloc: error: {msg}"


def test_demo_block_is_current():
    src, tlm = DEMO / "demo_block.geojson", DEMO / "demo_block.tlm"
    if not src.exists():
        pytest.fail("maps_packed/demo_block.geojson is missing")
    with PackedMap.open(tlm) as pm:
        shipped = pm.read_all()
        meta = pm.meta
    import tempfile
    with tempfile.TemporaryDirectory() as td:
        rep = pack_geojson(src, Path(td) / "again.tlm")
        with PackedMap.open(Path(td) / "again.tlm") as pm:
            again = pm.read_all()
            assert pm.meta == meta
    assert np.array_equal(shipped, again)
    assert rep.unmapped == 0
    for name in ("building", "road", "sidewalk", "grass", "tree", "pole", "parking", "water"):
        assert rep.mapped[name] > 0, name
