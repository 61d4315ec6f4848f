"""regional: daily flows at ungauged basins by transferring calibrated storage-model parameters."""

from __future__ import annotations

__version__ = "0.1.0"
