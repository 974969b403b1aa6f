"""``tinyloc look --crown-model / --gap-model``: the shipped crown models are selectable from the command line."""

import dataclasses
from pathlib import Path

import cv2
import numpy as np

from tinyloc.cli.main import main
from tinyloc.perception.segment import Segmenter, labels_at, preset

# A rendered frame of the bundled demo drive (trees, facades and sky), where the crown models disagree.
FRAME = Path(__file__).resolve().parents[1] / "tinyloc" / "data" / "demo" / "run" / "frames" / "000000.jpg"


def _labels(img, **change):
    h, w = img.shape[:2]
    probs, _ = Segmenter((w, h), dataclasses.replace(preset("street"), **change)).run(img)
    return labels_at(probs, (w, h))


def test_look_crown_model_is_the_segmenter_with_that_model(tmp_path):
    img = cv2.imread(str(FRAME))
    first, context = _labels(img, crown_model="default"), _labels(img, crown_model="context")
    assert np.count_nonzero(first != context) > 1000  # the frame tells the two models apart
    for name, want in (("context", context), ("default", first)):
        out = tmp_path / name
        assert main(["look", str(FRAME), "--crown-model", name, "-o", str(out)]) == 0
        assert np.array_equal(cv2.imread(str(out / "labels.png"), cv2.IMREAD_UNCHANGED), want)
    out = tmp_path / "off"
    assert main(["look", str(FRAME), "--crown-model", "off", "--gap-model", "off", "-o", str(out)]) == 0
    assert np.array_equal(cv2.imread(str(out / "labels.png"), cv2.IMREAD_UNCHANGED),
                          _labels(img, crown_model="off", gap_model="off"))


def test_look_crown_model_bad_file_one_line(tmp_path, capsys):
    bad = tmp_path / "model.json"
    bad.write_text('{"x": 1}')
    assert main(["look", str(FRAME), "--crown-model", str(bad), "-o", str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "model.json" in err
    assert main(["look", str(FRAME), "--crown-model", str(tmp_path / "missing.json"), "-o", str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "missing.json" in err
