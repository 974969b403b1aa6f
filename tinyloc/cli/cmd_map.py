"""``tinyloc map``: compile open vector map data into a packed map, inspect it, preview it."""

from __future__ import annotations

import json
import math
import sys
import time

NAME = "map"
HELP = "pack a GeoJSON site map, inspect a packed map, render a preview"
DESCRIPTION = """\
Site maps. The robot carries a packed map (.tlm): per-class coverage rasters in
compressed, checksummed tiles, read a window at a time. Build one from open vector
map data of the site (GeoJSON, RFC 7946, lon/lat):

  tinyloc map pack site.geojson -o site.tlm              default rules, 0.5 m cells
  tinyloc map pack site.geojson -o site.tlm --res 0.25 --rules my_rules.toml
  tinyloc map info site.tlm --at 44.43215,-101.23440     class coverage at a point
  tinyloc map render site.tlm -o preview.png             colour preview with legend

Classes: building, road, sidewalk, grass, tree, pole, fence, parking, water.
The default rules (tinyloc/maps/default_rules.toml) read common open-map tags and a
plain "class" property; see docs/maps.md to write your own."""

_PACK_HELP = """\
Rasterize every feature the rules map to a class: polygons (with holes) by exact
area coverage, lines with a per-class width (roads by their lanes or width
property), points with a per-class radius. Features no rule maps are counted and
reported, not silently dropped. Writes the file atomically.

examples:
  tinyloc map pack site.geojson -o site.tlm
  tinyloc map pack site.geojson -o site.tlm --res 0.25 --rules my_rules.toml
  tinyloc map pack site.geojson -o site.tlm --origin 44.4385,-101.2217 --json"""

_INFO_HELP = """\
Print a packed map's georeference, extent, tiles and classes. With --at LAT,LON
also the coverage (0..1) of every class in the cell holding that point; with --json
one JSON object (and with both, a "coverage" object: class name -> 0..1, or null
outside the map).

examples:
  tinyloc map info site.tlm
  tinyloc map info site.tlm --at 44.43880,-101.22160 --json
  tinyloc map info site.tlm --check            verify every tile (e.g. after copying to the robot)"""

_RENDER_HELP = """\
Write a colour preview (PNG) of the whole map or of a square window, with a legend,
a scale bar and a north mark. Unknown cells (outside the map or in a damaged tile)
are near-black.

examples:
  tinyloc map render site.tlm -o preview.png
  tinyloc map render site.tlm -o near.png --center 44.43880,-101.22160 --size 60"""


def register(parser):
    import argparse

    from .main import group

    sub = group(parser, "map_command")
    p = sub.add_parser("pack", help="compile a GeoJSON FeatureCollection into a packed map",
                       description=_PACK_HELP,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("src", metavar="SRC.geojson", help="site map, GeoJSON FeatureCollection in lon/lat (RFC 7946)")
    p.add_argument("-o", "--out", metavar="SITE.tlm", required=True, help="packed map to write")
    p.add_argument("--res", metavar="M", type=float, default=0.5, help="cell size in metres (default 0.5)")
    p.add_argument("--rules", metavar="R.toml", help="class rules file (default: the bundled rules)")
    p.add_argument("--origin", metavar="LAT,LON[,H]",
                   help="ENU origin of the map (default: the file's \"origin\" member, else the data's centre)")
    p.add_argument("--json", action="store_true", help="print the pack report as one JSON object")
    p.add_argument("-q", "--quiet", action="store_true", help="no progress on stderr")
    p.set_defaults(func=_pack)

    p = sub.add_parser("info", help="show a packed map's metadata, or the class coverage at a point",
                       description=_INFO_HELP,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("map", metavar="SITE.tlm", help="packed map")
    p.add_argument("--at", metavar="LAT,LON", help="report the coverage of every class at this point (degrees)")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.add_argument("--check", action="store_true",
                   help="also read every tile and verify its checksum and stream (exit status 1 if any is damaged)")
    p.set_defaults(func=_info)

    p = sub.add_parser("render", help="write a colour preview PNG with a legend", description=_RENDER_HELP,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("map", metavar="SITE.tlm", help="packed map")
    p.add_argument("-o", "--out", metavar="preview.png", required=True, help="image to write (PNG)")
    p.add_argument("--center", metavar="LAT,LON", help="centre of a square window (default: the whole map)")
    p.add_argument("--size", metavar="M", type=float, help="window side in metres (with --center; default 100)")
    p.add_argument("--px", metavar="N", type=int, default=1600, help="longest side of the map image (default 1600)")
    p.set_defaults(func=_render)


class _Progress:
    """Progress on stderr, at most a few updates a second, only once the work has run for a while."""

    def __init__(self, enabled: bool):
        self.enabled = enabled
        self.t0 = time.monotonic()
        self.last = 0.0
        self.shown = False

    def __call__(self, done, total, what):
        if not self.enabled:
            return
        now = time.monotonic()
        if done < total and (now - self.t0 < 1.0 or now - self.last < 0.5):
            return
        if done == total and (not self.shown or what != "bands"):
            return
        self.last = now
        self.shown = True
        end = "\n" if done == total else ""
        msg = f"packing: {what} {done}/{total} ({100 * done / total:.0f}%)"
        print(f"\r{msg:<48}", end=end, file=sys.stderr, flush=True)


def _pack(args) -> int:
    from ..geo import parse_latlon
    from ..maps.compile import pack_geojson

    origin = parse_latlon(args.origin, what="--origin") if args.origin else None
    prog = _Progress(not args.quiet and not args.json)
    rep = pack_geojson(args.src, args.out, res_m=args.res, rules=args.rules, origin=origin, progress=prog)
    if args.json:
        print(json.dumps(rep.to_dict(), sort_keys=True))
    else:
        print("\n".join(rep.lines()))
    return 0


def _info_dict(pm) -> dict:
    m = pm.meta
    return {
        "file": str(pm.path), "bytes": pm.file_size, "version": m.version,
        "origin": {"lat": m.lat0_deg, "lon": m.lon0_deg, "h": m.h0_m},
        "res_m": m.res_m, "rows": m.rows, "cols": m.cols,
        "x_min": m.x_min, "x_max": m.x_max, "y_min": m.y_min, "y_max": m.y_max,
        "tile": m.tile, "tiles": m.tile_rows * m.tile_cols, "empty_tiles": pm.empty_tiles,
        "classes": list(m.class_names),
    }


def _info(args) -> int:
    from ..geo import parse_latlon
    from ..maps.packfile import PackedMap

    with PackedMap.open(args.map) as pm:
        d = _info_dict(pm)
        at = None
        if args.at:
            lat, lon = parse_latlon(args.at, what="--at")[:2]
            x, y = pm.frame.to_enu_xy(lat, lon)
            r, c = pm.cell_of(x, y)
            cov = pm.coverage_at(x, y)
            at = {"lat": lat, "lon": lon, "x": x, "y": y, "row": math.floor(r), "col": math.floor(c),
                  "known": cov is not None}
            d["at"] = at
            d["coverage"] = None if cov is None else {n: round(float(v), 4) for n, v in zip(pm.meta.class_names, cov)}
        if args.check:
            d["damaged_tiles"] = pm.check_tiles()
    rc = 1 if d.get("damaged_tiles") else 0
    if args.json:
        print(json.dumps(d))
        return rc
    o = d["origin"]
    print(f"file        {d['file']} ({d['bytes'] / 1024:.1f} KiB, format version {d['version']})")
    print(f"origin      lat {o['lat']:.7f}, lon {o['lon']:.7f}, h {o['h']:.2f} m (ENU x east, y north)")
    print(f"cells       {d['rows']} rows x {d['cols']} cols at {d['res_m']:g} m")
    print(f"extent      x {d['x_min']:.1f} .. {d['x_max']:.1f} m, y {d['y_min']:.1f} .. {d['y_max']:.1f} m")
    print(f"tiles       {d['tiles']} of {d['tile']} x {d['tile']} cells ({d['empty_tiles']} empty)")
    print(f"classes     {', '.join(d['classes'])}")
    if args.check:
        n = d["damaged_tiles"]
        print(f"check       {'all tiles sound' if n == 0 else f'{n} damaged tile(s): their cells read as unknown'}")
    if at is not None:
        print(f"at          lat {at['lat']:.7f}, lon {at['lon']:.7f} -> x {at['x']:.2f} m, y {at['y']:.2f} m "
              f"(cell row {at['row']}, col {at['col']})")
        if d["coverage"] is None:
            print("coverage    unknown (outside the map or in a damaged tile)")
        else:
            for n, v in d["coverage"].items():
                print(f"  {n:<10} {v:.3f}")
    return rc


def _render(args) -> int:
    from ..geo import parse_latlon
    from ..maps.packfile import PackedMap
    from ..maps.render import write_preview
    from ..errors import InputError

    if args.size is not None and not args.center:
        raise InputError("--size needs --center LAT,LON")
    with PackedMap.open(args.map) as pm:
        center = None
        if args.center:
            lat, lon = parse_latlon(args.center, what="--center")[:2]
            center = pm.frame.to_enu_xy(lat, lon)
        if not 64 <= args.px <= 8192:
            raise InputError(f"--px must be 64..8192, got {args.px}")
        shape = write_preview(pm, args.out, center_xy=center, size_m=args.size, max_px=args.px)
    print(f"wrote {args.out} ({shape[1]} x {shape[0]} px)")
    return 0
