"""The HTML report of a run and the figures it shows.

``render_series_figures`` draws one series' PNGs while its volume is in memory;
``write_report`` writes the single-file ``report.html`` from the results.json document.
Matplotlib is used through its Agg canvas only; nothing here imports Qt. The figures
module (and with it matplotlib, about a third of a second to import) is imported only
when a figure is asked for, so a run with figures off writes its report without it.
"""
from __future__ import annotations

import importlib
from typing import Any

from .html import render_report, write_report

_FROM_FIGURES = ("render_series_figures", "choose_slice", "draw_trend_chart")

__all__ = ["render_series_figures", "write_report", "render_report", "choose_slice", "draw_trend_chart"]


def __getattr__(name: str) -> Any:
    if name in _FROM_FIGURES:
        return getattr(importlib.import_module(".figures", __name__), name)
    if name == "figures":
        return importlib.import_module(".figures", __name__)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
