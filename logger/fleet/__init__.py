"""Fleet re-analysis: many rides analysed on worker processes or a cluster, stored by one writer.

- :mod:`~logger.fleet.rides` — which rides: recordings on disk, or the stored runs' own files
- :mod:`~logger.fleet.task` — what a worker runs (one ride -> a RunOutput, or a failure)
- :mod:`~logger.fleet.engine` — the backend interface; :mod:`~logger.fleet.local` (process pool),
  :mod:`~logger.fleet.dask_engine` (Dask distributed, the ``fleet`` extra)
- :mod:`~logger.fleet.batch` — the batch: skip what is done, priors, one writer
"""
