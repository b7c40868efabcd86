"""The crankbeat store: one SQLite file per test programme.

Open it with :meth:`Store.open` (creates or migrates the file, WAL mode, a context manager).
What the pipeline calls, in order::

    store = Store.open("crankbeat.db")
    hashes = [sha256_file(p) for p in paths]
    run_id = store.find_run_by_sources(hashes)            # replay-once check (None = new)
    run_id = store.begin_run(rig, label=..., notes=..., odometer_km=...,
                             sources=[(path, sha, kind), ...], started_at=...)  # "incomplete"
    store.add_events(run_id, events)                      # EVENT_DTYPE arrays, any number of times
    store.mask_events(run_id, [(t0, t1), ...])            # rough-road spans closed later
    store.commit()                                        # at least once a second when live
    store.add_window_rates(run_id, "rev200", *dsp.analysis.window_rates(ev, revolutions=200, ...))
    store.add_windows(run_id, rows, kind="rpm-band")      # any other windows, as rows
    store.add_intervals(run_id, dsp.intervals.interval_check(...))   # IntervalResult list as is
    store.add_vibration(run_id, rows)
    store.add_order_map(run_id, sensor=..., rpm_lo=..., rpm_hi=..., orders=..., amplitude=...)
    store.save_tooth_errors(rig.name, wheel_key, errors, run_id=run_id, n_revs=...)
    store.finish_run(run_id, summary)                     # status "complete", commits

Rows for ``add_windows`` / ``add_intervals`` / ``add_vibration`` may be a numpy structured
array, a dict of columns or a list of dicts/dataclasses; each method's docstring lists the fields.
Units: times in s on the CAN time base, angles in crank degrees, rates in %, vibration in m/s².
A run killed before ``finish_run`` stays "incomplete" with every event up to the last commit.

Afterwards :meth:`Store.update_run` changes started_at / label / notes / odometer_km.

Queries: :meth:`Store.runs`, :meth:`Store.run`, :meth:`Store.resolve_run` (id, label or
"last"), :meth:`Store.events`, :meth:`Store.windows`, :meth:`Store.intervals`,
:meth:`Store.vibration`, :meth:`Store.order_map`, :meth:`Store.cylinder_stats`, and
:func:`trend` across runs.
"""

from crankbeat.logger.store.schema import MIGRATIONS, SCHEMA_VERSION, migrate
from crankbeat.logger.store.store import Store, jsonable, sha256_file, utc_iso, verdict_code
from crankbeat.logger.store.trend import METRICS, TrendPoint, parse_rpm_band, trend

__all__ = [
    "MIGRATIONS",
    "METRICS",
    "SCHEMA_VERSION",
    "Store",
    "TrendPoint",
    "jsonable",
    "migrate",
    "parse_rpm_band",
    "sha256_file",
    "trend",
    "utc_iso",
    "verdict_code",
]
