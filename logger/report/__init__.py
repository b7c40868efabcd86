"""Reports from the store alone: PNG figures and one self-contained HTML page per run.

``make_run_report(store, run_id, out_dir) -> RunReport`` (``run<ID>.html`` with the figures
embedded, ``run<ID>_*.png``, and an ``index.html`` linking every run page of the folder) and
``plot_trend(points, path, metric=...)`` (matplotlib, Agg backend; nothing is shown on screen).
"""

from logger.report.run import RunReport, make_run_report
from logger.report.trend import plot_trend

__all__ = ["RunReport", "make_run_report", "plot_trend"]
