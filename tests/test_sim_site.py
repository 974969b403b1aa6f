"""Site generator: determinism, a valid and packable GeoJSON map, map errors as configured, world round trip."""

import json
import math

import numpy as np
import pytest

from tinyloc.classes import BUILDING, MAP_CLASSES
from tinyloc.geo import LocalFrame
from tinyloc.sim.site import DEMO_PARAMS, SiteParams, generate_site
from tinyloc.sim.world import B_CLS, World, ground_raster, shadow_raster, sun_vector


def _dump(site):
    return json.dumps(site.geojson, sort_keys=True), json.dumps(site.world.to_dict(), sort_keys=True)


def test_same_seed_same_bytes_different_seed_differs():
    a, b, c = generate_site(5, DEMO_PARAMS), generate_site(5, DEMO_PARAMS), generate_site(6, DEMO_PARAMS)
    assert _dump(a) == _dump(b)
    da, dc = _dump(a), _dump(c)
    assert da[0] != dc[0] and da[1] != dc[1]
    assert a.world.origin != c.world.origin


def test_geojson_is_valid_and_packs_every_class(tmp_path):
    from tinyloc.maps.compile import pack_geojson
    from tinyloc.maps.geojson import load_geojson

    site = generate_site(2, DEMO_PARAMS)
    p = tmp_path / "site.geojson"
    p.write_text(json.dumps(site.geojson))
    fs = load_geojson(p)  # the map compiler's own validator (RFC 7946 structure, ranges, ring checks)
    assert len(fs.features) == len(site.geojson["features"]) and fs.origin == site.world.origin
    rep = pack_geojson(p, tmp_path / "site.tlm")
    assert rep.unmapped == 0 and rep.ignored == 0
    for c in MAP_CLASSES:
        assert rep.mapped.get(c.name, 0) > 0, c.name
    # no heights in the map: footprints only
    for f in site.geojson["features"]:
        assert not any(k in f["properties"] for k in ("height", "building:levels", "ele"))


def test_geojson_is_georeferenced_at_the_origin():
    """A mapped tree's lon/lat, taken back to ENU, is where the world's trunk stands."""
    site = generate_site(4, DEMO_PARAMS.with_errors(0.0))
    fr = LocalFrame(*site.world.origin)
    trees = [f for f in site.geojson["features"] if f["properties"].get("natural") == "tree"]
    trunks = site.world.cyls[site.world.cyls[:, 5] == 4][:, :2]
    assert len(trees) == len(trunks)
    for f in trees[:20]:
        lon, lat = f["geometry"]["coordinates"]
        x, y = fr.to_enu_xy(lat, lon)
        assert np.min(np.hypot(trunks[:, 0] - x, trunks[:, 1] - y)) < 1e-3  # coordinates rounded to 1e-9 deg


def _building_polys(site):
    fr = LocalFrame(*site.world.origin)
    out = []
    for f in site.geojson["features"]:
        if "building" in f["properties"]:
            ring = np.array(f["geometry"]["coordinates"][0][:-1])
            x, y = fr.to_enu_xy(ring[:, 1], ring[:, 0])
            out.append(np.stack([x, y], axis=1))
    return out


def _area(p):
    return 0.5 * abs(np.sum(p[:, 0] * np.roll(p[:, 1], -1) - np.roll(p[:, 0], -1) * p[:, 1]))


def test_map_errors_as_configured():
    perfect = generate_site(8, SiteParams().with_errors(0.0))
    noisy = generate_site(8, SiteParams())
    # same world (map errors touch only the map), different map
    assert np.array_equal(perfect.world.boxes, noisy.world.boxes)
    pp, pn = _building_polys(perfect), _building_polys(noisy)
    assert len(pp) == len(pn)
    shifts = np.array([np.linalg.norm(a.mean(0) - b.mean(0)) for a, b in zip(pp, pn)])
    p = SiteParams()
    assert shifts.max() <= p.building_shift_max_m + 1e-6
    assert np.median(shifts) > 0.2 * p.building_shift_max_m
    # footprints keep their shape and size (rigid motion)
    assert max(abs(_area(a) - _area(b)) for a, b in zip(pp, pn)) < 1e-2  # m^2; lon/lat kept to 1e-9 deg
    # the perfect map's footprints cover exactly the world's building boxes' area
    boxes = perfect.world.boxes[perfect.world.boxes[:, B_CLS] == BUILDING]
    assert abs(sum(_area(a) for a in pp) - float(np.sum(4 * boxes[:, 2] * boxes[:, 3]))) < 1e-2 * len(boxes)
    # trees: a share missing, a few extra
    n_real = int(np.sum(noisy.world.cyls[:, 5] == 4))
    n_mapped = sum(1 for f in noisy.geojson["features"] if f["properties"].get("natural") == "tree")
    expect = n_real * (1 - p.missing_tree_frac) + round(p.extra_tree_frac * n_real)
    assert abs(n_mapped - expect) < 4 * math.sqrt(n_real * p.missing_tree_frac) + 2
    # no parked cars or people in any map
    assert len(noisy.world.walkers) > 0 and np.any(noisy.world.boxes[:, B_CLS] == 10)
    assert not any("car" in json.dumps(f["properties"]) for f in noisy.geojson["features"])


def test_site_has_the_expected_elements():
    site = generate_site(9, SiteParams())
    tags = [f["properties"] for f in site.geojson["features"]]

    def has(k, v):
        return any(t.get(k) == v for t in tags)
    for k, v in (("natural", "tree"), ("highway", "street_lamp"), ("footway", "sidewalk"), ("amenity", "parking"),
                 ("natural", "water"), ("landuse", "grass"), ("barrier", "fence")):
        assert has(k, v), (k, v)
    assert any(t.get("highway") in ("residential", "tertiary") and "width" in t for t in tags)
    heights = site.world.boxes[site.world.boxes[:, B_CLS] == BUILDING][:, 6]
    assert heights.min() < 8 and heights.max() > 15  # houses and taller blocks
    names = {t["name"] for t in tags if "name" in t and "highway" in t}
    assert len(names) >= 6  # every street has its own invented name


def test_world_round_trip(tmp_path):
    site = generate_site(1, DEMO_PARAMS)
    site.world.save(tmp_path / "world.json")
    w = World.load(tmp_path / "world.json")
    for k in ("boxes", "cyls", "spheres", "walkers"):
        assert np.array_equal(getattr(w, k), getattr(site.world, k))
    g1 = ground_raster(site.world, res_m=0.2)
    g2 = ground_raster(w, res_m=0.2)
    assert np.array_equal(g1.data, g2.data)
    s = shadow_raster(w, sun_vector(180.0, 30.0), res_m=0.25)
    assert 0.02 < np.mean(s.data < 128) < 0.5  # shadows exist and do not cover everything


def test_world_file_errors_are_one_line(tmp_path):
    from tinyloc.errors import InputError

    p = tmp_path / "world.json"
    p.write_text("{")
    with pytest.raises(InputError, match="world.json: not a readable world file"):
        World.load(p)
    p.write_text(json.dumps({"format": "tinyloc-world", "version": 1, "origin": {"lat": 1, "lon": 2},
                             "bounds": [0, 0, 1, 1], "boxes": [[1, 2, 3]]}))
    with pytest.raises(InputError, match="'boxes' must be rows of 14 finite numbers"):
        World.load(p)
    with pytest.raises(InputError, match="no such file"):
        World.load(tmp_path / "nothing.json")
