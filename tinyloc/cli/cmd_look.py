"""``tinyloc look``: see what the robot sees: segmentation overlay, bird's-eye grid, raw labels."""

from __future__ import annotations

import json
from pathlib import Path

NAME = "look"
HELP = "segment one image and show its bird's-eye evidence (debug views)"
DESCRIPTION = """\
Run tinyloc's classical segmenter (and, with --camera, the overhead projector) on one
image and write what it found, so you can see why a frame helps or fails:

  DIR/overlay.png    the image with the classes blended over it, plus a legend
  DIR/labels.png     one class index per pixel at the image's own size (8-bit, for other tools)
  DIR/classes.json   index -> class name and colour (BGR)
  DIR/bev.png        (with --camera) the bird's-eye grid: robot at the left edge facing
                     right, 1 cell = the map's cell, unseen cells dark, free ground light
  DIR/status.txt     the frame's status ("ok" or why it gave no evidence)

examples:
  tinyloc look frame.png -o look/                                   segment only
  tinyloc look frame.png --camera camera.toml --gravity 0.3,0.1,9.8 -o look/
  tinyloc look frame.png --crown-model context -o look/           the stronger crown model
  tinyloc look frame.png --camera camera.toml --labels seg.png --label-map ids.toml -o look/"""


def register(parser):
    p = parser
    p.add_argument("image", metavar="IMAGE", help="colour image (PNG/JPEG)")
    p.add_argument("-o", "--out", required=True, metavar="DIR", help="folder for the views (created)")
    p.add_argument("--camera", metavar="camera.toml", help="calibration; adds the bird's-eye grid")
    p.add_argument("--gravity", metavar="FX,FY,FZ",
                   help="accelerometer specific force in the base frame, m/s^2 (level: 0,0,9.81)")
    p.add_argument("--preset", default="street", help="segmentation preset: street, sidewalk, park (default street)")
    p.add_argument("--crown-model", metavar="NAME|PATH",
                   help="tree-crown score of the preset: default, colour, context (shipped, docs/perception-real.md), "
                        "off (the colour rule), or a model file from crown_fit (default: the preset's own)")
    p.add_argument("--gap-model", metavar="NAME|PATH",
                   help="sky-through-crowns score: default (the one that goes with the crown model), off, or a file")
    p.add_argument("--labels", metavar="LABELS.png", help="use this external label image instead of segmenting")
    p.add_argument("--label-map", metavar="MAP.toml", help="id -> class table for --labels (docs/perception.md)")
    p.add_argument("--scale", type=int, default=6, metavar="N",
                   help="pixels per bird's-eye cell in bev.png (default 6)")
    p.set_defaults(func=_run)


def _parse_gravity(text):
    from ..errors import InputError

    if text is None:
        return None
    try:
        vals = [float(v) for v in text.split(",")]
    except ValueError:
        vals = []
    if len(vals) != 3:
        raise InputError(f"--gravity: expected FX,FY,FZ in m/s^2, got {text!r}")
    return vals


def _legend(classes_shown, width, palette):
    import cv2
    import numpy as np

    from ..classes import CLASSES

    row_h = 18
    img = np.full((row_h * max(1, len(classes_shown)) + 6, width, 3), 255, np.uint8)
    for n, k in enumerate(classes_shown):
        y = 3 + n * row_h
        cv2.rectangle(img, (6, y + 3), (20, y + 15), tuple(int(v) for v in palette[k]), -1)
        cv2.rectangle(img, (6, y + 3), (20, y + 15), (0, 0, 0), 1)
        cv2.putText(img, CLASSES[k].name, (28, y + 14), cv2.FONT_HERSHEY_SIMPLEX, 0.45, (0, 0, 0), 1, cv2.LINE_AA)
    return img


def _with_legend(img, classes_shown, palette, extra_rows=()):
    import cv2
    import numpy as np

    leg = _legend(classes_shown, 150, palette)
    for label, colour in extra_rows:
        row = np.full((18, 150, 3), 255, np.uint8)
        cv2.rectangle(row, (6, 3), (20, 15), colour, -1)
        cv2.rectangle(row, (6, 3), (20, 15), (0, 0, 0), 1)
        cv2.putText(row, label, (28, 14), cv2.FONT_HERSHEY_SIMPLEX, 0.45, (0, 0, 0), 1, cv2.LINE_AA)
        leg = np.vstack([leg, row])
    h = max(img.shape[0], leg.shape[0])
    canvas = np.full((h, img.shape[1] + leg.shape[1], 3), 255, np.uint8)
    canvas[: img.shape[0], : img.shape[1]] = img
    canvas[: leg.shape[0], img.shape[1]:] = leg
    return canvas


def bev_picture(grid, scale: int = 6):
    """BGR picture of a BevGrid: strongest class colour per seen cell, free ground light grey, unseen dark."""
    import cv2
    import numpy as np

    from ..classes import NUM_MAP_CLASSES, UNKNOWN_COLOR_BGR, palette_bgr

    pal = palette_bgr()[:NUM_MAP_CLASSES].astype(np.float32)
    ev = grid.evidence
    best = ev.argmax(axis=0)
    strength = ev.max(axis=0)
    img = np.empty(best.shape + (3,), np.float32)
    img[...] = UNKNOWN_COLOR_BGR
    seen = grid.visible > 0
    img[seen] = (215, 215, 215)
    has = seen & (strength > 0.05)
    a = np.clip(strength[has], 0.0, 1.0)[:, None]
    img[has] = a * pal[best[has]] + (1.0 - a) * np.array([215, 215, 215], np.float32)
    pic = cv2.resize(img.astype(np.uint8), None, fx=scale, fy=scale, interpolation=cv2.INTER_NEAREST)
    # the robot: a triangle at its origin pointing right (+x forward)
    r0, c0 = grid.origin_row * scale, grid.origin_col * scale
    tri = np.array([[c0, r0 - 2 * scale], [c0 + 3 * scale, r0], [c0, r0 + 2 * scale]], np.int32)
    cv2.fillConvexPoly(pic, tri, (0, 0, 255))
    # 5 m range rings
    for rng in range(5, 100, 5):
        rad = int(rng / grid.res_m * scale)
        if rad > max(pic.shape):
            break
        cv2.circle(pic, (int(c0), int(r0)), rad, (150, 150, 150), 1, cv2.LINE_AA)
    return pic


def _run(args) -> int:
    import cv2
    import numpy as np

    from ..camera.model import load_camera
    from ..classes import CLASSES, NUM_CLASSES, UNKNOWN_COLOR_BGR, palette_bgr
    from ..errors import InputError
    from ..perception.labels_in import load_label_map
    from ..perception.pipeline import Perception, PerceptionParams
    from ..perception.segment import Segmenter, labels_at, preset

    path = Path(args.image)
    if not path.is_file():
        raise InputError(f"{path}: no such file")
    img = cv2.imread(str(path), cv2.IMREAD_UNCHANGED)
    if img is None:
        raise InputError(f"{path}: not a readable image (corrupted or unsupported format)")
    if img.dtype != np.uint8:
        raise InputError(f"{path}: {img.dtype} pixels; tinyloc reads 8-bit images")
    if img.ndim == 2 or img.shape[2] == 1:
        raise InputError(f"{path}: grayscale image; the segmenter needs colour")
    img = np.ascontiguousarray(img[..., :3])
    gravity = _parse_gravity(args.gravity)
    seg_params = preset(args.preset)
    if args.crown_model is not None or args.gap_model is not None:
        import dataclasses
        seg_params = dataclasses.replace(
            seg_params,
            crown_model=seg_params.crown_model if args.crown_model is None else args.crown_model,
            gap_model=seg_params.gap_model if args.gap_model is None else args.gap_model)
    ext = None
    lut = None
    if args.labels:
        if not args.label_map:
            raise InputError("--labels needs --label-map (which tinyloc class each id means)")
        lut = load_label_map(args.label_map)
        ext = cv2.imread(args.labels, cv2.IMREAD_UNCHANGED)
        if ext is None or ext.ndim != 2 or ext.dtype != np.uint8:
            raise InputError(f"{args.labels}: expected a single-channel 8-bit label image")
        if ext.shape != img.shape[:2]:
            raise InputError(f"{args.labels}: size {ext.shape[1]}x{ext.shape[0]} differs from the image's "
                             f"{img.shape[1]}x{img.shape[0]}")
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    h, w = img.shape[:2]
    status = "segmented (no --camera: no projection)"
    grid = None
    if args.camera:
        cam = load_camera(args.camera)
        if (cam.width, cam.height) != (w, h):
            raise InputError(f"{path}: image is {w}x{h}, the calibration {args.camera} is for "
                             f"{cam.width}x{cam.height}")
        perc = Perception(cam, PerceptionParams(segment=seg_params))
        grid = perc.new_grid()
        status = perc.process(img, gravity, grid) if ext is None else perc.process_labels(ext, gravity, grid, lut)
        probs = perc.probs
    elif ext is not None:
        probs = None
    else:
        seg = Segmenter((w, h), seg_params)
        probs, _ = seg.run(img)
    if ext is not None:
        labels = lut[ext]
    else:
        labels = labels_at(probs, (w, h))
    pal = palette_bgr()
    full_pal = np.zeros((256, 3), np.uint8)
    full_pal[:] = UNKNOWN_COLOR_BGR
    full_pal[:NUM_CLASSES] = pal
    colour = full_pal[labels]
    overlay = cv2.addWeighted(img, 0.45, colour, 0.55, 0.0)
    if grid is not None:
        # horizon line, from the segmentation raster to the image
        hr = perc.horizon
        sw = len(hr)
        sh = perc.segmenter.size[1]
        pts = np.stack([(np.arange(sw) + 0.5) * w / sw - 0.5, (hr + 0.5) * h / sh - 0.5], 1)
        pts = pts[np.isfinite(pts[:, 1]) & (pts[:, 1] >= 0) & (pts[:, 1] < h)]
        if len(pts) > 1:
            cv2.polylines(overlay, [np.round(pts).astype(np.int32)], False, (0, 255, 255), 1, cv2.LINE_AA)
    shown = [k for k in range(NUM_CLASSES) if np.any(labels == k)]
    cv2.putText(overlay, status[:70], (6, 16), cv2.FONT_HERSHEY_SIMPLEX, 0.45, (255, 255, 255), 2, cv2.LINE_AA)
    cv2.putText(overlay, status[:70], (6, 16), cv2.FONT_HERSHEY_SIMPLEX, 0.45, (0, 0, 0), 1, cv2.LINE_AA)
    cv2.imwrite(str(out / "overlay.png"), _with_legend(overlay, shown, pal))
    cv2.imwrite(str(out / "labels.png"), labels)
    with open(out / "classes.json", "w", encoding="utf-8") as f:
        json.dump({"format": "tinyloc-classes", "version": 1, "unlabelled": 255,
                   "classes": {str(c.index): {"name": c.name, "color_bgr": list(c.color_bgr)} for c in CLASSES}},
                  f, indent=1)
    (out / "status.txt").write_text(status + "\n", encoding="utf-8")
    written = ["overlay.png", "labels.png", "classes.json", "status.txt"]
    if grid is not None:
        pic = bev_picture(grid, max(1, min(args.scale, 20)))
        present = [k for k in range(grid.evidence.shape[0]) if grid.evidence[k].max() > 0.05]
        cv2.imwrite(str(out / "bev.png"), _with_legend(pic, present, pal,
                                                      extra_rows=[("free ground", (215, 215, 215)),
                                                                  ("not seen", UNKNOWN_COLOR_BGR),
                                                                  ("robot", (0, 0, 255))]))
        written.append("bev.png")
    counts = {CLASSES[k].name: round(float(np.mean(labels == k)), 3) for k in shown}
    print(f"{path}: {status}")
    print("  pixel shares: " + ", ".join(f"{k} {v:.1%}" for k, v in counts.items()))
    if grid is not None:
        print(f"  bird's-eye: {int(np.count_nonzero(grid.visible))} cells seen, "
              f"{int(np.count_nonzero(grid.free > 0.5))} free")
    print(f"wrote {', '.join(written)} in {out}")
    return 0 if (grid is None or status == "ok") else 1

