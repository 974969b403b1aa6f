"""GeoJSON input (RFC 7946) and class rules: parsing, the bad-input table, and self-intersection.

Each bad input is run through the CLI and must give exactly one stderr line naming
the file and the fault, exit status 2, and no traceback. The self-intersection
test is checked against a brute-force O(n^2) segment test (tests/_maps_helpers.py).
"""

import json

import numpy as np
import pytest

from tinyloc.cli.main import main
from tinyloc.errors import GeoJSONError, RulesError
from tinyloc.maps.geojson import load_geojson, ring_self_intersection
from tinyloc.maps.rules import default_rules, load_rules, parse_metres

from _maps_helpers import brute_self_intersects, collection, point, polygon, star_polygon

SQUARE = [(0, 0), (20, 0), (20, 20), (0, 20)]


def run_cli(argv, capsys):
    rc = main(argv)
    cap = capsys.readouterr()
    return rc, cap.out, cap.err


BAD = [
    ("not_json", "{\"type\": \"FeatureCollection\", \"features\": [", r"not JSON \(Expecting value at line 1 column 44\)"),
    ("not_fc", json.dumps({"type": "Feature", "properties": {}, "geometry": None}),
     r"not a FeatureCollection \(top-level \"type\" is 'Feature'\)"),
    ("array", "[1, 2]", r"not a FeatureCollection \(top level is a JSON list\)"),
    ("lon_range", json.dumps(collection([{"type": "Feature", "properties": {"building": "yes"}, "geometry": {
        "type": "Point", "coordinates": [200.0, 44.0]}}])),
     r"feature 0: coordinates out of range \(lon 200, lat 44; need lon in \[-180, 180\], lat in \[-90, 90\], "
     r"in that order\)"),
    ("lat_range", json.dumps(collection([{"type": "Feature", "properties": {}, "geometry": {
        "type": "LineString", "coordinates": [[-101.0, 44.0], [-101.0, 91.5]]}}])),
     r"feature 0: coordinates out of range \(lon -101, lat 91.5"),
    ("nan", '{"type": "FeatureCollection", "features": [{"type": "Feature", "id": "p7", "properties": {}, '
            '"geometry": {"type": "Point", "coordinates": [NaN, 44.0]}}]}',
     r"feature 0 \(id 'p7'\): coordinates not finite \(NaN or infinity\)"),
    ("inf", '{"type": "FeatureCollection", "features": [{"type": "Feature", "properties": {}, '
            '"geometry": {"type": "Point", "coordinates": [-101.0, Infinity]}}]}',
     r"feature 0: coordinates not finite"),
    ("unknown_type", json.dumps(collection([{"type": "Feature", "properties": {}, "geometry": {
        "type": "Circle", "coordinates": [-101.0, 44.0], "radius": 5}}])),
     r"feature 0: unknown geometry type 'Circle' \(expected one of Point, MultiPoint, LineString, "
     r"MultiLineString, Polygon, MultiPolygon, GeometryCollection\)"),
    ("bowtie", json.dumps(collection([polygon([SQUARE], building="yes"),
                                      polygon([[(0, 0), (20, 20), (20, 0), (0, 20)]], building="yes")])),
     r"feature 1: self-intersecting polygon \(ring 0, edges 0 and 2 cross near lon -?\d+\.\d{7}, lat \d+\.\d{7}\)"),
    ("projected", json.dumps(dict(collection([point((1, 1), natural="tree")]), crs={
        "type": "name", "properties": {"name": "urn:ogc:def:crs:EPSG::3857"}})),
     r"declares coordinate system 'urn:ogc:def:crs:EPSG::3857'; GeoJSON \(RFC 7946\) positions must be WGS84 "
     r"longitude/latitude: reproject the data first"),
    ("empty", json.dumps(collection([])), r"empty map \(the FeatureCollection has no features\)"),
    ("nothing_mapped", json.dumps(collection([polygon([SQUARE], foo="bar"), point((3, 3), colour="red")])),
     r"empty map \(none of the 2 features matched a class rule: 2 unmapped, 0 ignored, 0 without geometry\)"),
    ("short_ring", json.dumps(collection([{"type": "Feature", "properties": {}, "geometry": {
        "type": "Polygon", "coordinates": [[[-101.0, 44.0], [-101.001, 44.0], [-101.0, 44.0]]]}}])),
     r"feature 0: polygon ring 0 has fewer than 3 distinct positions"),
    ("bad_position", json.dumps(collection([{"type": "Feature", "properties": {}, "geometry": {
        "type": "Point", "coordinates": ["-101.0", 44.0]}}])),
     r"feature 0: malformed position \[\"-101.0\", 44.0\] \(expected \[lon, lat\] numbers\)"),
]


@pytest.mark.parametrize("name,text,msg", BAD, ids=[b[0] for b in BAD])
def test_bad_geojson_gives_one_clear_line(tmp_path, capsys, name, text, msg):
    src = tmp_path / f"{name}.geojson"
    src.write_text(text)
    rc, out, err = run_cli(["map", "pack", str(src), "-o", str(tmp_path / "o.tlm"), "-q"], capsys)
    assert rc == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert "Traceback" not in err
    import re
    assert re.fullmatch(rf"tinyloc: error: {re.escape(str(src))}: {msg}.*", lines[0]), lines[0]
    assert not (tmp_path / "o.tlm").exists()
    assert not (tmp_path / "o.tlm.part").exists()
    with pytest.raises(GeoJSONError):
        from tinyloc.maps.compile import pack_geojson
        pack_geojson(src, tmp_path / "o.tlm")


BAD_RULES = [
    ("syntax", 'format = "tinyloc-map-rules"\nversion = 1\n[[rule]\nwhen = ["a=b"]\n', r"TOML syntax error: "),
    ("format", 'format = "something-else"\nversion = 1\n', r"not a rules file \(expected format = \"tinyloc-map-rules\"\)"),
    ("newer", 'format = "tinyloc-map-rules"\nversion = 9\n[[rule]]\nwhen = ["a=b"]\nclass = "road"\n',
     r"rules version 9 is newer than this tinyloc supports \(1\)"),
    ("class", 'format = "tinyloc-map-rules"\nversion = 1\n[[rule]]\nwhen = ["a=b"]\nclass = "rood"\n',
     r"rule 1: unknown class 'rood' \(map classes: building, road, sidewalk, grass, tree, pole, fence, parking, water\)"),
    ("cond", 'format = "tinyloc-map-rules"\nversion = 1\n[[rule]]\nwhen = ["highway"]\nclass = "road"\n',
     r"rule 1: condition 'highway' must be \"key=pattern\", \"key!=pattern\" or \"!key\""),
    ("two_actions", 'format = "tinyloc-map-rules"\nversion = 1\n[[rule]]\nwhen = ["a=b"]\nclass = "road"\n'
                    'ignore = true\n', r"rule 1: give exactly one of class, class_from or ignore = true"),
    ("width", 'format = "tinyloc-map-rules"\nversion = 1\n[[rule]]\nwhen = ["a=b"]\nclass = "road"\nwidth_m = -3\n',
     r"rule 1: width_m must be a number in \(0, 200\] metres, got -3"),
    ("key", 'format = "tinyloc-map-rules"\nversion = 1\n[[rule]]\nwhen = ["a=b"]\nclass = "road"\nwidht_m = 3\n',
     r"rule 1: unknown key 'widht_m'"),
]


@pytest.mark.parametrize("name,text,msg", BAD_RULES, ids=[b[0] for b in BAD_RULES])
def test_bad_rules_file_gives_one_clear_line(tmp_path, capsys, name, text, msg):
    import re
    src = tmp_path / "site.geojson"
    src.write_text(json.dumps(collection([polygon([SQUARE], building="yes")])))
    rules = tmp_path / f"{name}.toml"
    rules.write_text(text)
    rc, out, err = run_cli(["map", "pack", str(src), "-o", str(tmp_path / "o.tlm"), "--rules", str(rules), "-q"],
                           capsys)
    assert rc == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert re.match(rf"tinyloc: error: {re.escape(str(rules))}: {msg}", lines[0]), lines[0]
    with pytest.raises(RulesError):
        load_rules(rules)


def test_self_intersection_agrees_with_brute_force():
    rng = np.random.default_rng(8)
    n_hit = 0
    for trial in range(300):
        n = int(rng.integers(4, 12))
        if trial % 3 == 0:
            xy = star_polygon(rng, (0, 0), 1, 5, n)  # simple by construction
        else:
            xy = rng.integers(0, 6, (n, 2)).astype(float)  # small integer grid: many touching cases
            keep = np.ones(n, bool)
            keep[1:] = np.any(xy[1:] != xy[:-1], axis=1)
            xy = xy[keep]
            if len(xy) < 4:
                continue
        want = brute_self_intersects(xy)
        got = ring_self_intersection(xy) is not None
        assert got == want, xy.tolist()
        n_hit += want
    assert 20 < n_hit < 280  # both outcomes well represented


def test_parts_holes_multigeometries_and_collections(tmp_path):
    doc = collection([
        polygon([SQUARE, [(5, 5), (5, 10), (10, 10), (10, 5)]], building="yes"),
        {"type": "Feature", "properties": {"natural": "tree"}, "geometry": {"type": "MultiPoint", "coordinates": [
            [-101.2345, 44.4321], [-101.2344, 44.4321]]}},
        {"type": "Feature", "properties": {"class": "fence"}, "geometry": {"type": "GeometryCollection", "geometries": [
            {"type": "LineString", "coordinates": [[-101.2345, 44.4321], [-101.2344, 44.4322]]},
            {"type": "MultiLineString", "coordinates": [[[-101.2345, 44.4322], [-101.2344, 44.4323]]]}]}},
        {"type": "Feature", "properties": {"x": 1}, "geometry": None},
        {"type": "Feature", "properties": None, "geometry": {"type": "MultiPolygon", "coordinates": []}},
    ])
    fs = load_geojson(doc)
    f0, f1, f2, f3, f4 = fs.features
    assert f0.kind == "area" and len(f0.polygons[0]) == 2 and len(f0.polygons[0][0]) == 4  # closing repeat dropped
    assert f1.kind == "point" and f1.points[0].shape == (2, 2)
    assert f2.kind == "line" and len(f2.lines) == 2
    assert f3.kind == "none" and f4.kind == "none"
    assert fs.origin == pytest.approx((44.4321, -101.2345, 0.0))


def test_rules_semantics():
    r = default_rules()
    assert r.match({"building": "yes"}, "area").class_index == 0
    assert r.match({"building": "no"}, "area") == "ignored"
    m = r.match({"highway": "residential", "lanes": "3"}, "line")
    assert m.class_index == 1 and m.width_m == pytest.approx(9.0)
    m = r.match({"highway": "residential", "lanes": "3", "width": "7.5 m"}, "line")
    assert m.width_m == pytest.approx(7.5)  # a width property beats lanes
    assert r.match({"highway": "service"}, "line").width_m == pytest.approx(4.0)
    assert r.match({"highway": "footway", "footway": "sidewalk"}, "line").class_index == 2
    assert r.match({"highway": "street_lamp"}, "point").class_index == 5
    assert r.match({"natural": "tree"}, "point").radius_m == pytest.approx(0.6)
    assert r.match({"barrier": "hedge"}, "line").width_m == pytest.approx(1.0)
    assert r.match({"amenity": "parking"}, "area").class_index == 7
    assert r.match({"amenity": "parking"}, "point") is None  # no footprint: unmapped
    assert r.match({"leisure": "park"}, "area").class_index == 3
    assert r.match({"natural": "water"}, "area").class_index == 8
    assert r.match({"class": "water"}, "line").class_index == 8
    assert r.match({"class": "lava"}, "area") is None
    assert r.match({"man_made": "flagpole"}, "point").class_index == 5


def test_rule_conditions(tmp_path):
    p = tmp_path / "r.toml"
    p.write_text('format = "tinyloc-map-rules"\nversion = 1\n'
                 '[[rule]]\nwhen = ["surface=pav*|concrete", "!covered", "access!=private"]\nclass = "parking"\n'
                 '[[rule]]\nwhen = ["kind=?ond"]\ngeometry = "area"\nclass = "water"\n')
    r = load_rules(p)
    assert r.match({"surface": "paving_stones"}, "area").class_index == 7
    assert r.match({"surface": "concrete", "access": "yes"}, "area").class_index == 7
    assert r.match({"surface": "concrete", "access": "private"}, "area") is None
    assert r.match({"surface": "concrete", "covered": "yes"}, "area") is None
    assert r.match({"kind": "pond"}, "area").class_index == 8
    assert r.match({"kind": "pond"}, "line") is None
    assert r.match({"kind": "ponds"}, "area") is None


@pytest.mark.parametrize("v,want", [(7, 7.0), ("7.5", 7.5), ("3 m", 3.0), ("12m", 12.0), ("2;3", 2.0),
                                    ("wide", None), (-1, None), (True, None), ("0", None), (1e6, None)])
def test_parse_metres(v, want):
    assert parse_metres(v) == want
