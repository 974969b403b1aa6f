"""Shared test fixtures. Stage-specific helpers live beside their tests (tests/_<stage>_helpers.py)."""

import os
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[1]
SHARED = ROOT.parent / "shared"
STREET_SEG = SHARED / "data" / "street-seg"


@pytest.fixture
def rng():
    """A seeded generator: every random test input is reproducible."""
    return np.random.default_rng(12345)


def require_street_seg():
    """Skip (with the reason) unless the labelled street-image set is beside the project."""
    if not (STREET_SEG / "manifest.csv").is_file():
        pytest.skip(f"labelled street-image set not found at {STREET_SEG} (it lives in ../shared, outside the project)")
    return STREET_SEG
