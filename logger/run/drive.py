"""Driving a :class:`RunAnalysis` over a stream of chunks, and the analysis of recorded files.

:func:`analyse_files` is the run layer's one entry for recordings: a function of the rig, the
input files and explicit :class:`Priors` that returns a :class:`RunOutput`. It reads the files
(through :func:`logger.stream.replay`) but touches no store: replay, the fleet's workers and
library callers all use it.
"""

from __future__ import annotations

import warnings
from collections.abc import Callable, Iterable
from pathlib import Path

import numpy as np
from threadpoolctl import threadpool_limits

from crankbeat.errors import CrankbeatWarning
from crankbeat.logger import stream
from crankbeat.logger.chunks import Chunk
from crankbeat.logger.rig.model import Rig
from crankbeat.logger.run.analysis import RunAnalysis, StepOutput
from crankbeat.logger.run.channels import concat_channels
from crankbeat.logger.run.output import Priors, RunOutput, Source, join_events
from crankbeat.logger.run.teeth import wheel_key
from crankbeat.logger.run.version import analyser_version
from crankbeat.logger.run_gate import log_census
from crankbeat.logger.store.store import sha256_file

#: Chunk length of a replay on the CAN clock, s. Every stage gives the same numbers whatever the
#: chunking (tests hold them equal); longer chunks than live spare per-call overheads.
REPLAY_CHUNK_S = 2.0

StepCallback = Callable[[StepOutput, Chunk], None]


def drive(analysis: RunAnalysis, chunks: Iterable[Chunk], on_step: StepCallback,
          on_finish: Callable[[StepOutput], None]) -> None:
    """Push every chunk through ``analysis``; hand each step to ``on_step``, the last to
    ``on_finish``."""
    for chunk in chunks:
        on_step(analysis.push(chunk), chunk)
    on_finish(analysis.finish())


class OutputCollector:
    """Collects the steps of a run into one :class:`RunOutput`."""

    def __init__(self) -> None:
        self.events: list[np.ndarray] = []
        self.windows: dict[str, list[dict]] = {}
        self.channels: list[dict] = []

    def add(self, step: StepOutput, chunk: Chunk | None = None) -> None:
        if len(step.events):
            self.events.append(step.events)
        for kind, rows in step.windows.items():
            self.windows.setdefault(kind, []).extend(rows)
        if step.channels:
            self.channels.append(step.channels)

    def output(self, analysis: RunAnalysis, sources: list[Source]) -> RunOutput:
        tail = analysis.conclude()
        events = join_events(self.events, tail.rough_spans)
        self.events = []  # the parts are in ``events`` now: do not hold them twice
        return RunOutput(
            rig_name=analysis.rig.name, wheel_key=wheel_key(analysis.rig),
            analyser=analyser_version(), sources=sources,
            events=events, windows=self.windows,
            channels=concat_channels(self.channels), tail=tail)


def file_sources(can_path, accel_paths: dict[str, Path]) -> list[Source]:
    """The run's input files with their hashes (the store's replay-once key)."""
    return [Source(str(can_path), sha256_file(can_path), "can")] + [
        Source(str(p), sha256_file(p), f"accel:{n}") for n, p in accel_paths.items()]


def analyse_files(
    rig: Rig, can_path, accel_paths: dict[str, Path] | None = None, *,
    priors: Priors | None = None, pace: float | None = None,
    chunk_s: float = REPLAY_CHUNK_S, progress: Callable[[float], None] | None = None,
    on_step: StepCallback | None = None, sources: list[Source] | None = None,
) -> RunOutput:
    """Analyse recorded files; return the whole run as a :class:`RunOutput` (no store).

    ``priors`` are what earlier runs taught (tooth errors); ``pace`` feeds the files at that
    multiple of real time; ``progress(fraction)`` is called after each chunk; ``on_step`` sees
    every step as it comes (a writer storing increments).

    The BLAS/OpenMP pools are held to one thread while the files are analysed, whatever the
    caller's environment: the analysis streams small blocks, and pool threads only spin on them
    (a fleet worker started without the command's thread settings spent 4.7 s CPU per 1-min
    ride instead of 2.7 s). The caller's settings are restored on return.
    """
    accel_paths = {n: Path(p) for n, p in (accel_paths or {}).items()}
    sources = sources if sources is not None else file_sources(can_path, accel_paths)
    priors = priors or Priors()
    analysis = RunAnalysis(rig, tooth_correction_deg=priors.tooth_errors_deg)
    collector = OutputCollector()
    with threadpool_limits(limits=1), warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", CrankbeatWarning)
        with stream.replay(rig, can_path, accel_paths, pace=pace, chunk_s=chunk_s) as chunks:
            def step(out: StepOutput, chunk: Chunk) -> None:
                collector.add(out)
                if on_step is not None:
                    on_step(out, chunk)
                if progress is not None:
                    done, total = chunks.progress
                    if total:
                        progress(done / total)

            def last(out: StepOutput) -> None:
                collector.add(out)
                if on_step is not None:
                    on_step(out, None)

            drive(analysis, chunks, step, last)
        # a log with no crank frame for this rig gives no run: one line of what it held
        analysis.watch.require_analysable(can_path, census=lambda: log_census(can_path))
    analysis.notes += [str(w.message) for w in caught]
    out = collector.output(analysis, sources)
    if progress is not None:
        progress(1.0)
    return out
