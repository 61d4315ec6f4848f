"""regional: daily flows at ungauged basins by transferring calibrated storage-model parameters."""

from __future__ import annotations

from regional import metrics
from regional.calibrate import calibrate
from regional.models import simulate

__version__ = "0.1.0"

__all__ = ["__version__", "calibrate", "metrics", "simulate"]
