"""The HTML report of a run and the figures it shows.

``render_series_figures`` draws one series' PNGs while its volume is in memory;
``write_report`` writes the single-file ``report.html`` from the results.json document.
Matplotlib is used through its Agg canvas only; nothing here imports Qt.
"""
from __future__ import annotations

from .figures import choose_slice, draw_trend_chart, render_series_figures
from .html import render_report, write_report

__all__ = ["render_series_figures", "write_report", "render_report", "choose_slice", "draw_trend_chart"]
