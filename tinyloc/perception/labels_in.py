"""External label images: plug another segmenter's output into the overhead projector.

A label image holds one class id per pixel in the other segmenter's own numbering. A
mapping table (``tinyloc-label-map`` TOML file, documented in docs/perception.md) says
which of tinyloc's classes each id means; ids it does not list are "unlabelled" (255)
and are neither ground nor objects.

    format = "tinyloc-label-map"
    version = 1
    [classes]
    0 = "sky"
    1 = "building"
    3 = "road"
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..classes import BY_NAME, NUM_CLASSES
from ..errors import InputError
from ..tomlio import read_toml, write_toml
from .._numba import JIT
from numba import njit

FORMAT_NAME = "tinyloc-label-map"
UNLABELLED = 255


def mapping_lut(mapping: dict) -> np.ndarray:
    """(256,) uint8 lookup: external id -> tinyloc class index (255 where not mapped).

    Parameters
    ----------
    mapping : dict
        External id (int 0..255, or its decimal string) -> tinyloc class name, or ``None``/"ignore".
    """
    lut = np.full(256, UNLABELLED, np.uint8)
    for k, v in mapping.items():
        try:
            idx = int(k)
        except (TypeError, ValueError):
            raise InputError(f"label map: id {k!r} is not an integer") from None
        if not 0 <= idx <= 255:
            raise InputError(f"label map: id {idx} is outside 0..255")
        if v is None or v == "ignore":
            continue
        if v not in BY_NAME:
            raise InputError(f"label map: id {idx} maps to unknown class {v!r}; known: {', '.join(BY_NAME)}")
        lut[idx] = BY_NAME[v].index
    return lut


def load_label_map(path) -> np.ndarray:
    """Read a ``tinyloc-label-map`` TOML file into a lookup table (see :func:`mapping_lut`)."""
    doc = read_toml(path)
    if doc.get("format") != FORMAT_NAME:
        raise InputError(f"{path}: format is {doc.get('format')!r}, expected {FORMAT_NAME!r}")
    if not isinstance(doc.get("version"), int) or doc["version"] > 1:
        raise InputError(f"{path}: unsupported version {doc.get('version')!r} (this tinyloc reads 1)")
    cls = doc.get("classes")
    if not isinstance(cls, dict) or not cls:
        raise InputError(f"{path}: missing or empty [classes] table")
    try:
        return mapping_lut(cls)
    except InputError as e:
        raise InputError(f"{path}: {e}") from None


def save_label_map(path, mapping: dict) -> None:
    """Write a mapping (external id -> class name) as a ``tinyloc-label-map`` file."""
    mapping_lut(mapping)  # validate
    write_toml(Path(path), {"format": FORMAT_NAME, "version": 1,
                            "classes": {str(int(k)): v for k, v in sorted(mapping.items(), key=lambda kv: int(kv[0]))
                                        if v not in (None, "ignore")}},
               header="tinyloc label map: external class id -> tinyloc class (docs/perception.md)")


@njit(**JIT)
def _block_shares(ext, lut, counts, labels, probs):
    """Class shares of each raster cell's block of source pixels, and the majority class.

    Cell (i, j) of the (h, w) raster covers source rows ``i H // h .. (i + 1) H // h`` and the
    matching columns, so its value belongs to the block's centre: a nearest-pixel pick (OpenCV's
    INTER_NEAREST takes the block's top-left pixel) puts every class boundary 1.5 source pixels
    too low at a 4x reduction, which the projector turns into ground ranges that are too short.
    Unmapped ids count in the block but toward no class; a cell whose majority is unmapped is
    unlabelled (255). ``counts`` is (NUM_CLASSES + 1,) int64 scratch.
    """
    nc, h, w = probs.shape
    H, W = ext.shape
    for i in range(h):
        r0 = i * H // h
        r1 = max((i + 1) * H // h, r0 + 1)
        for j in range(w):
            c0 = j * W // w
            c1 = max((j + 1) * W // w, c0 + 1)
            for c in range(nc + 1):
                counts[c] = 0
            for r in range(r0, r1):
                for q in range(c0, c1):
                    k = lut[ext[r, q]]
                    counts[k if k < nc else nc] += 1
            n = (r1 - r0) * (c1 - c0)
            best = nc
            for c in range(nc):
                probs[c, i, j] = counts[c] / n
                if counts[c] > counts[best]:
                    best = c
            labels[i, j] = best if best < nc else UNLABELLED


class LabelImporter:
    """Turns external label images of one size into (probs, labels) at the segmentation raster's size.

    Buffers are allocated once; :meth:`run` allocates nothing.
    """

    def __init__(self, frame_size: tuple[int, int], seg_size: tuple[int, int], lut: np.ndarray):
        self.frame_size = (int(frame_size[0]), int(frame_size[1]))
        self.size = (int(seg_size[0]), int(seg_size[1]))
        self.lut = np.ascontiguousarray(lut, np.uint8)
        w, h = self.size
        self._counts = np.zeros(NUM_CLASSES + 1, np.int64)
        self.labels = np.zeros((h, w), np.uint8)
        self.probs = np.zeros((NUM_CLASSES, h, w), np.float32)

    def check(self, label_img) -> str:
        if label_img is None:
            return "bad-labels: no image"
        if not isinstance(label_img, np.ndarray) or label_img.dtype != np.uint8 or label_img.ndim != 2:
            return "bad-labels: expected a single-channel uint8 label image"
        if (label_img.shape[1], label_img.shape[0]) != self.frame_size:
            return (f"bad-labels: size {label_img.shape[1]}x{label_img.shape[0]}, the calibration is for "
                    f"{self.frame_size[0]}x{self.frame_size[1]}")
        return "ok"

    def run(self, label_img: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Map ids to classes and reduce to the raster: per-class shares of each cell's block
        (one-hot at the same size) and the majority class."""
        _block_shares(label_img, self.lut, self._counts, self.labels, self.probs)
        return self.probs, self.labels
