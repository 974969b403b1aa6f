"""Regenerate the demo site ``demo_block.geojson`` and its packed map ``demo_block.tlm``.

The site is invented ("Fennick Row", a few blocks of a small town that does not
exist); its georeference origin is an arbitrary spot chosen for the demo. Run
from the repository root::

    python maps_packed/make_demo_block.py
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np

from tinyloc.geo import LocalFrame
from tinyloc.maps.compile import pack_geojson

HERE = Path(__file__).resolve().parent
ORIGIN = (44.43850, -101.22170, 0.0)   # invented; named after nothing
FRAME = LocalFrame(*ORIGIN)


def ll(pts):
    a = np.asarray(pts, dtype=float).reshape(-1, 2)
    lat, lon = FRAME.to_latlon(a[:, 0], a[:, 1])
    return [[round(float(o), 8), round(float(t), 8)] for o, t in zip(np.atleast_1d(lon), np.atleast_1d(lat))]


def rect(x0, y0, x1, y1, yaw_deg=0.0):
    c = np.array([(x0 + x1) / 2, (y0 + y1) / 2])
    pts = np.array([(x0, y0), (x1, y0), (x1, y1), (x0, y1)]) - c
    a = math.radians(yaw_deg)
    r = np.array([[math.cos(a), -math.sin(a)], [math.sin(a), math.cos(a)]])
    return (pts @ r.T + c).tolist()


def blob(cx, cy, r, n=24, wobble=0.15, seed=0):
    rng = np.random.default_rng(seed)
    a = np.linspace(0, 2 * math.pi, n, endpoint=False)
    rad = r * (1 + wobble * np.sin(3 * a + rng.uniform(0, 6)))
    return np.stack([cx + rad * np.cos(a), cy + rad * np.sin(a)], axis=1).tolist()


def poly(rings, **props):
    coords = [ll(r) + [ll(r)[0]] for r in rings]
    return {"type": "Feature", "properties": props, "geometry": {"type": "Polygon", "coordinates": coords}}


def line(pts, **props):
    return {"type": "Feature", "properties": props, "geometry": {"type": "LineString", "coordinates": ll(pts)}}


def points(pts, **props):
    return {"type": "Feature", "properties": props, "geometry": {"type": "MultiPoint", "coordinates": ll(pts)}}


def point(p, **props):
    return {"type": "Feature", "properties": props, "geometry": {"type": "Point", "coordinates": ll(p)[0]}}


def build() -> dict:
    f = []
    # Streets (centrelines). Tallow Street and Brindle Avenue run east-west, Ashcomb Lane and Corvel Way north-south.
    streets = [
        ("Tallow Street", [(-120, 0), (120, 0)], {"lanes": "2"}, 6.0),
        ("Brindle Avenue", [(-120, 90), (120, 90)], {"lanes": "4"}, 12.0),
        ("Ashcomb Lane", [(-50, -50), (-50, 130)], {"width": "7"}, 7.0),
        ("Corvel Way", [(50, -50), (50, 130)], {}, 6.0),
    ]
    for name, pts, extra, width in streets:
        f.append(line(pts, highway="residential", name=name, **extra))
        # Sidewalks both sides, 2 m wide, 1.5 m clear of the kerb.
        off = width / 2 + 1.5
        (x0, y0), (x1, y1) = pts
        dx, dy = x1 - x0, y1 - y0
        n = math.hypot(dx, dy)
        nx, ny = -dy / n, dx / n
        for s in (-1, 1):
            sw = [(x0 + s * off * nx, y0 + s * off * ny), (x1 + s * off * nx, y1 + s * off * ny)]
            f.append(line(sw, highway="footway", footway="sidewalk"))
            # Street trees every 14 m and lamps every 28 m, on the kerb side of the sidewalk.
            t_off = off - 1.6
            trees, lamps = [], []
            for k in range(int(n // 14)):
                t = (k + 0.5) * 14 / n
                px, py = x0 + t * dx + s * t_off * nx, y0 + t * dy + s * t_off * ny
                # Skip the crossings.
                if min(abs(px - 50), abs(px + 50)) < 9 and abs(dy) < 1e-9:
                    continue
                if min(abs(py), abs(py - 90)) < 11 and abs(dx) < 1e-9:
                    continue
                (trees if k % 2 == 0 else lamps).append((px, py))
            f.append(points(trees, natural="tree"))
            f.append(points(lamps, highway="street_lamp"))

    # Block between Ashcomb and Corvel, Tallow and Brindle: the Fennick Row terrace, a courtyard house,
    # a parking lot with a fence, and a small park with a pond.
    f.append(poly([rect(-40, 9, -22, 24)], building="yes", name="Fennick Row 1"))
    f.append(poly([rect(-19, 9, -4, 24)], building="yes", name="Fennick Row 3"))
    f.append(poly([rect(0, 9, 36, 36), rect(10, 17, 26, 28)], building="apartments", name="Quarrow Court"))
    f.append(poly([rect(-42, 44, -14, 78)], amenity="parking", parking="surface"))
    f.append(line([(-14, 44), (-42, 44), (-42, 78), (-14, 78)], barrier="fence"))
    f.append(line([(-28, 78), (-28, 84.5)], highway="service"))
    f.append(poly([rect(-8, 42, 44, 80)], leisure="park", name="Mallow Green"))
    f.append(poly([blob(20, 60, 8.5, seed=3)], natural="water", name="Mallow Pond"))
    f.append(points([(20 + 13 * math.cos(a), 60 + 13 * math.sin(a)) for a in np.linspace(0.3, 6.0, 7)],
                    natural="tree"))
    f.append(line([(-8, 42), (44, 42)], barrier="hedge"))
    f.append(line([(-6, 61), (8, 61)], highway="path"))
    f.append(point((6, 66), **{"class": "pole"}, note="flagpole, plain class property"))

    # East block: a rotated workshop and a lawn.
    f.append(poly([rect(62, 14, 90, 32, yaw_deg=18)], building="industrial", name="Sorrel Works"))
    f.append(poly([rect(60, 44, 106, 80)], landuse="grass"))
    f.append(poly([rect(66, 50, 80, 62)], building="yes", name="Pike House"))

    # West block: two houses with gardens.
    f.append(poly([rect(-108, 10, -60, 80)], landuse="grass"))
    f.append(poly([rect(-100, 14, -84, 28)], building="house"))
    f.append(poly([rect(-78, 50, -62, 66, yaw_deg=-8)], building="house"))
    f.append(points([(-92, 40), (-70, 36), (-96, 70)], natural="tree"))

    # South of Tallow Street: a row of small houses and their shared hedge.
    for k, x in enumerate(range(-40, 40, 16)):
        f.append(poly([rect(x, -28, x + 11, -12)], building="house", name=f"Tallow Cottage {k + 1}"))
    f.append(line([(-42, -34), (40, -34)], barrier="hedge"))
    return {"type": "FeatureCollection", "name": "Fennick Row demo block (invented)",
            "origin": {"lat": ORIGIN[0], "lon": ORIGIN[1], "h": ORIGIN[2]}, "features": f}


def main() -> None:
    doc = build()
    src = HERE / "demo_block.geojson"
    src.write_text(json.dumps(doc, indent=None, separators=(",", ":")) + "\n")
    rep = pack_geojson(src, HERE / "demo_block.tlm")
    print("\n".join(rep.lines()))


if __name__ == "__main__":
    main()
