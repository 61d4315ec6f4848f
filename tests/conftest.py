"""Shared fixtures: a tiny seeded region (see tiny_region.py) in a temporary folder."""

from __future__ import annotations

import warnings
from pathlib import Path

import matplotlib
import pytest
from tiny_region import RegionParts, make_parts, write_region

matplotlib.use("Agg")


@pytest.fixture
def region_parts() -> RegionParts:
    """Fresh, valid region pieces to modify."""
    return make_parts()


@pytest.fixture
def region_folder(tmp_path: Path, region_parts: RegionParts) -> Path:
    """A valid region folder in a temporary directory."""
    return write_region(tmp_path / "region", region_parts)


DEMO_REGION = Path(__file__).resolve().parents[1] / "demo_region"


@pytest.fixture(scope="session")
def demo_result():
    """One run of the whole chain on the demo region (a few seconds), shared by all tests."""
    from regional.errors import InputWarning
    from regional.pipeline import run

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", InputWarning)
        return run(DEMO_REGION)
