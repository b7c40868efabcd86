"""Reports from the store alone: PNG figures and one self-contained HTML page per run.

``make_run_report(store, run_id, out_dir) -> RunReport`` (``run<ID>.html`` with the figures
embedded, ``run<ID>_*.png``, and an ``index.html`` linking every run page of the folder) and
``plot_trend(points, path, metric=...)`` (matplotlib, Agg backend; nothing is shown on screen).
:mod:`logger.report.text` renders a run summary as text lines (no matplotlib).

The figure functions load on first use, so that commands that only print text start quickly.
"""

from __future__ import annotations

from typing import Any

__all__ = ["RunReport", "make_run_report", "plot_trend"]


def __getattr__(name: str) -> Any:
    if name in ("RunReport", "make_run_report"):
        from crankbeat.logger.report import run

        return getattr(run, name)
    if name == "plot_trend":
        from crankbeat.logger.report.trend import plot_trend

        return plot_trend
    raise AttributeError(f"module 'crankbeat.logger.report' has no attribute {name!r}")
