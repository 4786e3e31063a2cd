"""Shared fixtures: the open data beside the project, seeded generators."""
from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[1]
SHARED_DATA = Path(os.environ.get("SWATHMILL_SHARED_DATA", ROOT.parent / "shared" / "data"))


@pytest.fixture
def shared_data() -> Path:
    """The open data folder ../shared/data; tests that need it skip where it is absent."""
    if not SHARED_DATA.is_dir():
        pytest.skip(f"open data folder {SHARED_DATA} is absent (it lies beside the project root in CI)")
    return SHARED_DATA


@pytest.fixture
def rng() -> np.random.Generator:
    return np.random.default_rng(20261201)
