"""The class table: one list of semantic classes that every stage speaks.

Indices are stable and part of the packed-map format. Classes with a map
geometry (area, line, point) are map channels, in index order, and come first;
image-only classes (sky, moving things) exist only in segmentation output.

``width_m`` is the default rasterization width of line features, ``radius_m``
the default radius of point features (both metres; the map compiler's rules may
override them per feature). Colours are tinyloc's own palette (BGR, OpenCV order).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class ClassInfo:
    """One row of the class table."""

    index: int
    name: str
    kind: str  # "area", "line", "point" (map channels) or "image" (segmentation only)
    width_m: float  # default width of line features (m); for areas, width of a line-tagged variant
    radius_m: float  # default radius of point features (m)
    vertical: bool  # stands up from the ground (projected by its ground contact)
    color_bgr: tuple[int, int, int]
    description: str


CLASSES: tuple[ClassInfo, ...] = (
    ClassInfo(0, "building", "area", 0.0, 0.0, True, (92, 70, 168), "building footprints"),
    ClassInfo(1, "road", "area", 6.0, 0.0, False, (96, 96, 96), "carriageway for vehicles"),
    ClassInfo(2, "sidewalk", "area", 2.0, 0.0, False, (176, 196, 214), "footways, paths, plazas"),
    ClassInfo(3, "grass", "area", 1.0, 0.0, False, (86, 170, 112), "lawn, meadow, planted ground"),
    ClassInfo(4, "tree", "point", 0.0, 0.6, True, (40, 100, 30), "tree trunks (crown not mapped)"),
    ClassInfo(5, "pole", "point", 0.0, 0.25, True, (30, 200, 240), "poles, posts, lamps, signs"),
    ClassInfo(6, "fence", "line", 0.3, 0.0, True, (60, 90, 140), "fences, walls, hedges"),
    ClassInfo(7, "parking", "area", 5.0, 0.0, False, (150, 130, 120), "parking surfaces"),
    ClassInfo(8, "water", "area", 2.0, 0.0, False, (200, 140, 60), "ponds, streams"),
    ClassInfo(9, "sky", "image", 0.0, 0.0, False, (235, 206, 135), "sky (image only)"),
    ClassInfo(10, "dynamic", "image", 0.0, 0.0, True, (40, 40, 220), "vehicles and people (image only)"),
)

NUM_CLASSES = len(CLASSES)
MAP_CLASSES: tuple[ClassInfo, ...] = tuple(c for c in CLASSES if c.kind != "image")
NUM_MAP_CLASSES = len(MAP_CLASSES)
BY_NAME: dict[str, ClassInfo] = {c.name: c for c in CLASSES}

BUILDING, ROAD, SIDEWALK, GRASS, TREE, POLE, FENCE, PARKING, WATER, SKY, DYNAMIC = range(NUM_CLASSES)
UNKNOWN_COLOR_BGR = (20, 20, 20)


def class_index(name: str) -> int:
    """Index of a class by name; raises KeyError naming the valid names."""
    try:
        return BY_NAME[name].index
    except KeyError:
        raise KeyError(f"unknown class {name!r}; known: {', '.join(BY_NAME)}") from None


def palette_bgr() -> np.ndarray:
    """(NUM_CLASSES, 3) uint8 palette in BGR order."""
    return np.array([c.color_bgr for c in CLASSES], dtype=np.uint8)


def _check_table() -> None:
    for i, c in enumerate(CLASSES):
        if c.index != i:
            raise RuntimeError(f"class table out of order at {c.name}")
    if any(c.kind == "image" for c in CLASSES[:NUM_MAP_CLASSES]):
        raise RuntimeError("map classes must come before image-only classes")


_check_table()
