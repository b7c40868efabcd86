"""Reports from the store alone: PNG figures and one self-contained HTML page per run.

``make_run_report(store, run_id, out_dir) -> RunReport`` and
``plot_trend(points, path, metric=...)`` (matplotlib, Agg backend; nothing is shown on screen).
"""

from logger.report.run import RunReport, make_run_report
from logger.report.trend import plot_trend

__all__ = ["RunReport", "make_run_report", "plot_trend"]
