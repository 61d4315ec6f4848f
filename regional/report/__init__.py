"""The run's figures (:mod:`regional.report.figures`) and its self-contained HTML report
(:mod:`regional.report.html`). Nothing here writes files: :mod:`regional.io` does."""

from __future__ import annotations

from regional.report.figures import figure_drawers, figure_jobs, make_figures
from regional.report.html import render_report

__all__ = ["figure_drawers", "figure_jobs", "make_figures", "render_report"]
