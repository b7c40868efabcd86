"""The run layer: the analysis of one run as a value, apart from any store.

- :mod:`~logger.run.analysis` — :class:`RunAnalysis`, the streaming chain of dsp stages
- :mod:`~logger.run.teeth` — the tooth-correction policy (learning on overrun, priors)
- :mod:`~logger.run.masking` — rough-road masking of events
- :mod:`~logger.run.channels` — status channels decimated to 10 Hz
- :mod:`~logger.run.output` — :class:`RunOutput`, :class:`RunTail`, :class:`Priors`
- :mod:`~logger.run.notes` — the wording of the run's notes
- :mod:`~logger.run.drive` — :func:`analyse_files` (recordings -> RunOutput)
- :mod:`~logger.run.writer` — the store side: priors in, outputs and increments out
- :mod:`~logger.run.version` — the analyser version stored with each run
"""
