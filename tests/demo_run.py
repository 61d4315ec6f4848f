"""One run of the demo region per test session, shared by the prediction and screening tests."""

from __future__ import annotations

import functools
import warnings
from pathlib import Path

from regional import pipeline
from regional.errors import InputWarning

DEMO = Path(__file__).resolve().parents[1] / "demo_region"


@functools.cache
def demo_result() -> pipeline.RunResult:
    """``pipeline.run`` of ``demo_region`` (about 5 s), computed once; treat it as read-only."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", InputWarning)
        return pipeline.run(DEMO)
