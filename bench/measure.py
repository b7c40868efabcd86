"""Every figure of ``make bench``, group by group, as rows of :mod:`bench.table`.

Each group first checks that the parts it measures are importable; a missing part gives
``NOT MEASURED`` rows naming it. Times judged against targets are CPU times (of the replay
process, of the bench process for the floors): on a shared machine they leave out the time
other programs held the core, which wall time does not; wall times are shown beside them.
The groups share the replays of one run (:class:`Bench` keeps them), so the 10-minute replay
behind the floor ratios is also the one behind the memory and scaling figures.
"""

from __future__ import annotations

import importlib
import math
import os
import subprocess
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

from bench.procs import ChildRun, run_child, script
from bench.table import Row, missing
from crankbeat.errors import CrankbeatError

#: Targets of issue 14 (battery laptop on the bike, fleet re-analysis): replay at 500x real
#: time, live at about a seventh of a core.
RTF_MIN = 500.0
REPLAY_OVER_PYCAN_MAX = 0.4
REPLAY_OVER_SPLIT_MAX = 15.0
DECODE_SPEEDUP_MIN = 10.0
P99_MAX_MS = 100.0
CPU_MAX_PCT = 15.0
#: Crank speeds of the live figure: a low cruise and the reference rig near its limit, rpm.
LIVE_RPMS = (3000.0, 10500.0)
RSS_MAX_MB = 300.0
RSS_GROWTH_MAX = 1.10
#: Linear cost: the time per ride-minute of a long ride may exceed a shorter one's by this much.
PER_MINUTE_GROWTH_MAX = 1.20

PARTS = {
    "sim": ("crankbeat.logger.sim", ("simulate", "write_ride")),
    "stream": ("crankbeat.logger.stream", ("replay",)),
    "pipeline": ("crankbeat.logger.pipeline", ("analyse_replay",)),
    "live": ("crankbeat.logger.pipeline", ("analyse_live",)),
    "store": ("crankbeat.logger.store", ("Store",)),
}


def part_missing(*names: str) -> str:
    """'' when every named part imports with its attributes, else 'crankbeat.logger.x missing'."""
    for name in names:
        module, attrs = PARTS[name]
        try:
            mod = importlib.import_module(module)
        except ImportError as exc:
            return f"{module} missing ({exc.name or exc})"
        for a in attrs:
            if not hasattr(mod, a):
                return f"{module}.{a} missing"
    return ""


@dataclass
class Bench:
    """Settings and shared results of one bench run."""

    out: Path
    say: Callable[[str], None] = lambda text: None
    repeat: int = 2
    minutes: tuple[int, ...] = (1, 10, 60)
    main_minutes: int = 10
    live_seconds: float = 25.0
    profile_minutes: int = 2
    rig: str = "larch"
    cpu: int | None = None
    rides: dict = field(default_factory=dict)  # key -> RideFiles
    replays: dict[int, list[ChildRun]] = field(default_factory=dict)
    pycan_s: float | None = None
    raw: dict = field(default_factory=dict)  # every number behind the rows, for results.json

    def __post_init__(self) -> None:
        if self.cpu is None:
            self.cpu = max(os.sched_getaffinity(0))

    @property
    def ride_root(self) -> Path:
        return self.out / "rides"

    # -- rides ---------------------------------------------------------------------------
    def ride(self, key: str):
        """The cached ride for ``key`` ("lap-10", "live-10500"), generated on first use."""
        if key in self.rides:
            return self.rides[key]
        from bench.rides import ensure_ride, lap_scenario, live_scenario

        if key.startswith("live-"):
            sc = live_scenario(self.live_seconds, rpm=float(key.split("-")[1]))
        else:
            sc = lap_scenario(int(key.split("-")[1]))
        self.say(f"ride {sc.name}: looking in the cache")
        files = ensure_ride(sc, self.ride_root, rig=self.rig)
        if files.generated_s:
            self.say(f"ride {sc.name}: generated in {files.generated_s:.0f} s, peak "
                     f"{files.generated_peak_mb:.0f} MB (not part of any figure)")
        self.rides[key] = files
        return files

    # -- replays -------------------------------------------------------------------------
    def replay(self, minutes: int, *, runs: int = 1) -> list[ChildRun]:
        """``runs`` replays of the ``minutes`` ride, each in a fresh process and store."""
        have = self.replays.setdefault(minutes, [])
        ride = self.ride(f"lap-{minutes}")
        while len(have) < runs:
            store = self.out / f"replay-{minutes}min.db"
            argv = [script("bench_replay.py"), "--rig", self.rig, "--can", str(ride.can),
                    "--store", str(store), "--cpu", str(self.cpu)]
            for name, p in ride.captures.items():
                argv += ["--accel", f"{name}={p}"]
            self.say(f"replay {minutes} min ride ({len(have) + 1}/{runs}), fresh process "
                     f"pinned to cpu {self.cpu}")
            run = run_child(argv)
            if not run.ok:
                raise CrankbeatError(f"replay of the {minutes} min ride failed: {run.error}")
            self.say(f"  {run.result['cpu_s']:.2f} s CPU ({run.result['seconds']:.2f} s wall), "
                     f"{run.result['events']} events, peak {run.peak_rss_mb:.0f} MB")
            have.append(run)
            _remove_store(store)
        return have

    def best_replay_s(self, minutes: int) -> float:
        """Least CPU time of the replays of the ``minutes`` ride, s."""
        return min(r.result["cpu_s"] for r in self.replays[minutes])

    def best_replay_wall_s(self, minutes: int) -> float:
        return min(r.result["seconds"] for r in self.replays[minutes])


def _remove_store(path: Path) -> None:
    for suffix in ("", "-wal", "-shm"):
        p = Path(str(path) + suffix)
        if p.exists():
            p.unlink()


def _guard(rows_fn: Callable[[], list[Row]], figures: list[tuple[str, str | None, float | None,
                                                                    str]], reason: str
           ) -> list[Row]:
    """Rows of ``rows_fn``, or NOT MEASURED rows for ``figures`` when ``reason`` is given or the
    measurement fails (the failure's one line becomes the reason)."""
    if not reason:
        try:
            return rows_fn()
        except (CrankbeatError, OSError, subprocess.SubprocessError) as exc:
            reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        except Exception as exc:  # noqa: BLE001 - a part that breaks must not stop the bench
            first = str(exc).splitlines()[0] if str(exc) else ""
            reason = f"{type(exc).__name__}: {first}".rstrip(": ")
    return [missing(f, reason, op=op, limit=lim, unit=u) for f, op, lim, u in figures]


# ---------------------------------------------------------------------------- groups
def replay_rows(b: Bench) -> list[Row]:
    """Floors, the whole replay against them, and the decode-only pass."""
    m = b.main_minutes
    figures = [
        (f"replay {m} min: real-time factor, 1 core", ">=", RTF_MIN, "x"),
        (f"replay {m} min ÷ python-can bare iteration", "<=", REPLAY_OVER_PYCAN_MAX, ""),
        (f"replay {m} min ÷ read-and-split floor", "<=", REPLAY_OVER_SPLIT_MAX, ""),
    ]
    return _guard(lambda: _replay_rows(b), figures, part_missing("sim", "pipeline", "store"))


def _floors(b: Bench) -> tuple[float, float, object]:
    """(python-can iteration CPU s, read-and-split CPU s, the main ride), timed once per run."""
    from bench.floors import pycan_iteration, read_split, warm_cache

    ride = b.ride(f"lap-{b.main_minutes}")
    caps = list(ride.captures.values())
    warm_cache([ride.can, *caps])
    if b.pycan_s is None:
        b.say(f"floor: python-can LogReader iteration of the {b.main_minutes} min log "
              f"(best of {b.repeat})")
        pc = pycan_iteration(ride.can, repeat=b.repeat)
        b.say(f"  {pc.cpu_s:.2f} s CPU ({pc.seconds:.2f} s wall) for {pc.count} frames")
        b.say(f"floor: read and split the log lines + read the capture (best of {b.repeat})")
        sp = read_split(ride.can, caps, repeat=b.repeat)
        b.say(f"  {sp.cpu_s:.3f} s CPU ({sp.seconds:.3f} s wall) for {sp.count} lines")
        b.pycan_s = pc.cpu_s
        b.raw["floors"] = {"pycan_s": pc.cpu_s, "pycan_wall_s": pc.seconds,
                           "pycan_frames": pc.count, "split_s": sp.cpu_s,
                           "split_wall_s": sp.seconds, "split_lines": sp.count,
                           "can_bytes": os.path.getsize(ride.can),
                           "capture_bytes": sum(os.path.getsize(p) for p in caps)}
    f = b.raw["floors"]
    return f["pycan_s"], f["split_s"], ride


def _replay_rows(b: Bench) -> list[Row]:
    m = b.main_minutes
    pycan_s, split_s, ride = _floors(b)
    f = b.raw["floors"]
    runs = b.replay(m, runs=b.repeat)
    rep, wall = b.best_replay_s(m), b.best_replay_wall_s(m)
    outer = min(runs, key=lambda r: r.result["cpu_s"])
    b.raw[f"replay_{m}min"] = {"cpu_s": [r.result["cpu_s"] for r in runs],
                               "wall_s": [r.result["seconds"] for r in runs],
                               "events": outer.result["events"], "process_wall_s": outer.wall_s,
                               "process_cpu_s": outer.cpu_s, "duration_s": ride.duration_s}
    return [
        Row("python-can bare iteration (floor)",
            f"{pycan_s:.2f} s CPU ({f['pycan_wall_s']:.2f} s wall), {f['pycan_frames']:,} "
            f"frames, {f['pycan_frames'] / pycan_s / 1e3:.0f} k frames/s", value=pycan_s),
        Row("read-and-split floor (log lines + capture)",
            f"{split_s:.3f} s CPU, {f['split_lines']:,} lines, "
            f"{(f['can_bytes'] + f['capture_bytes']) / 2**20:.0f} MiB", value=split_s),
        Row(f"replay {m} min: real-time factor, 1 core",
            f"{ride.duration_s:.0f} s of ride in {rep:.2f} s CPU ({wall:.2f} s wall) = "
            f"{ride.duration_s / rep:.0f}x",
            value=ride.duration_s / rep, op=">=", limit=RTF_MIN, unit="x"),
        Row(f"replay {m} min ÷ python-can bare iteration",
            f"{rep:.2f} s / {pycan_s:.2f} s CPU = {rep / pycan_s:.2f}",
            value=rep / pycan_s, op="<=", limit=REPLAY_OVER_PYCAN_MAX),
        Row(f"replay {m} min ÷ read-and-split floor",
            f"{rep:.2f} s / {split_s:.3f} s CPU = {rep / split_s:.1f}",
            value=rep / split_s, op="<=", limit=REPLAY_OVER_SPLIT_MAX),
        Row(f"replay {m} min process, seen from outside",
            f"wall {outer.wall_s:.1f} s, CPU {outer.cpu_s:.1f} s (imports included), "
            f"{outer.result['events']:,} events", value=outer.wall_s),
    ]


def decode_rows(b: Bench) -> list[Row]:
    fig = [("decode CAN log + capture: speed-up over python-can iteration", ">=",
            DECODE_SPEEDUP_MIN, "x")]
    return _guard(lambda: _decode_rows(b), fig, part_missing("sim", "stream"))


def _decode_rows(b: Bench) -> list[Row]:
    from bench.decode import decode
    from crankbeat.logger.pipeline import LIVE_CHUNK_S, REPLAY_CHUNK_S
    from crankbeat.logger.rig import load_rig

    pycan_s, _split_s, ride = _floors(b)
    b.say(f"decode only: stream.replay of the {b.main_minutes} min ride in the replay's "
          f"{REPLAY_CHUNK_S:g} s chunks, no analysis (best of {b.repeat})")
    wall, cpu, count = decode(load_rig(b.rig), ride.can, ride.captures, repeat=b.repeat,
                              chunk_s=REPLAY_CHUNK_S)
    b.say(f"  {cpu:.2f} s CPU ({wall:.2f} s wall): {count.can_frames:,} CAN frames, "
          f"{count.samples:,} samples")
    b.raw["decode"] = {"cpu_s": cpu, "wall_s": wall, "chunk_s": REPLAY_CHUNK_S,
                       **count.__dict__}
    # the same pass in live-sized chunks shows how much of the cost is per chunk, not per frame
    _w, cpu_short, count_short = decode(load_rig(b.rig), ride.can, ride.captures, repeat=1,
                                        chunk_s=LIVE_CHUNK_S)
    b.raw["decode_live_chunks"] = {"chunk_s": LIVE_CHUNK_S, "cpu_s": cpu_short,
                                   "chunks": count_short.chunks}
    return [Row(f"decode CAN log + capture ({REPLAY_CHUNK_S:g} s replay chunks): speed-up over "
                "python-can iteration",
                f"{pycan_s:.2f} s / {cpu:.2f} s CPU = {pycan_s / cpu:.2f}x "
                f"({count.can_frames:,} frames, {count.samples:,} samples, "
                f"{count.chunks:,} chunks)", value=pycan_s / cpu,
                op=">=", limit=DECODE_SPEEDUP_MIN, unit="x"),
            Row(f"decode in {LIVE_CHUNK_S:g} s live chunks: speed-up over python-can iteration",
                f"{pycan_s:.2f} s / {cpu_short:.2f} s CPU = {pycan_s / cpu_short:.2f}x "
                f"({count_short.chunks:,} chunks)",
                value=pycan_s / cpu_short)]


def memory_rows(b: Bench) -> list[Row]:
    short, long_ = b.main_minutes, max(b.minutes)
    lengths = sorted({short, long_})
    figs = [(f"peak RSS, {m} min replay", "<", RSS_MAX_MB, " MB") for m in lengths]
    if len(lengths) == 2:
        figs.append((f"peak RSS {long_} min ÷ {short} min", "<=", RSS_GROWTH_MAX, ""))
    return _guard(lambda: _memory_rows(b, lengths), figs,
                  part_missing("sim", "pipeline", "store"))


def _memory_rows(b: Bench, lengths: list[int]) -> list[Row]:
    rss = {m: max(r.peak_rss_mb for r in b.replay(m, runs=1)) for m in lengths}
    b.raw["peak_rss_mb"] = {str(k): v for k, v in rss.items()}
    rows = [Row(f"peak RSS, {m} min replay", f"{rss[m]:.0f} MB (VmHWM of a fresh process)",
                value=rss[m], op="<", limit=RSS_MAX_MB, unit=" MB") for m in lengths]
    if len(lengths) == 2:
        short, long_ = lengths
        rows.append(Row(f"peak RSS {long_} min ÷ {short} min",
                        f"{rss[long_]:.0f} MB / {rss[short]:.0f} MB = "
                        f"{rss[long_] / rss[short]:.2f}",
                        value=rss[long_] / rss[short], op="<=", limit=RSS_GROWTH_MAX))
    return rows


def scaling_rows(b: Bench) -> list[Row]:
    lo, hi = min(b.minutes), max(b.minutes)
    figs = [(f"replay {hi} min: real-time factor, 1 core", ">=", RTF_MIN, "x")]
    figs += [(f"time per ride-minute, {hi} min ÷ {m} min", "<=", PER_MINUTE_GROWTH_MAX, "")
             for m in b.minutes if m != hi]
    return _guard(lambda: _scaling_rows(b), figs if lo != hi else figs[:1],
                  part_missing("sim", "pipeline", "store"))


def _scaling_rows(b: Bench) -> list[Row]:
    per_min = {}
    for m in sorted(b.minutes):
        b.replay(m, runs=b.repeat if m < max(b.minutes) else 1)
        per_min[m] = b.best_replay_s(m) / m
    b.raw["seconds_per_ride_minute"] = {str(k): v for k, v in per_min.items()}
    hi = max(b.minutes)
    rows = [Row(f"replay CPU time per ride-minute, {m} min ride",
                f"{per_min[m]:.3f} s/min ({b.best_replay_s(m):.2f} s CPU, "
                f"{b.best_replay_wall_s(m):.2f} s wall)", value=per_min[m])
            for m in sorted(b.minutes)]
    if hi != b.main_minutes:  # the main ride's factor is in the replay group
        rows.append(Row(f"replay {hi} min: real-time factor, 1 core",
                        f"{hi * 60} s of ride in {b.best_replay_s(hi):.2f} s CPU = "
                        f"{hi * 60 / b.best_replay_s(hi):.0f}x",
                        value=hi * 60 / b.best_replay_s(hi), op=">=", limit=RTF_MIN, unit="x"))
    rows += [Row(f"time per ride-minute, {hi} min ÷ {m} min",
                 f"{per_min[hi]:.3f} / {per_min[m]:.3f} s/min = {per_min[hi] / per_min[m]:.2f}",
                 value=per_min[hi] / per_min[m],
                 op="<=", limit=PER_MINUTE_GROWTH_MAX)
             for m in sorted(b.minutes) if m != hi]
    return rows


def _rpm_label(rpm: float) -> str:
    return f"{rpm:,.0f}".replace(",", " ") + " rpm"


def live_rows(b: Bench) -> list[Row]:
    rows: list[Row] = []
    for rpm in LIVE_RPMS:
        lab = _rpm_label(rpm)
        figs = [(f"live {lab}: p99 latency, frame to committed verdict", "<=", P99_MAX_MS,
                 " ms"),
                (f"live {lab}: CPU of the analysing process", "<=", CPU_MAX_PCT, " %")]
        rows += _guard(lambda rpm=rpm: _live_rows(b, rpm), figs,
                       part_missing("sim", "live", "store"))
    return rows


def _live_rows(b: Bench, rpm: float) -> list[Row]:
    from bench.live import detail_rows, run_live
    from bench.rides import START_TIME
    from crankbeat.logger.rig import load_rig

    lab = _rpm_label(rpm)
    ride = b.ride(f"live-{rpm:.0f}")
    store = b.out / "live.db"
    b.say(f"live: {ride.duration_s:.0f} s at {lab} in real time (virtual CAN bus + "
          "socket:// serial)")
    figs = run_live(ride.can, ride.captures, store, base=START_TIME, rig=b.rig)
    _remove_store(store)
    if not figs.child.ok:
        raise CrankbeatError(f"live run at {lab} failed: {figs.child.error}")
    for note in figs.notes:
        b.say(f"  note: {note}")
    n_cyl = load_rig(b.rig).engine.n_cylinders
    expected = ride.duration_s * rpm / 120.0 * n_cyl  # 4-stroke: one firing per 2 revs
    p50, p99, cpu = figs.percentile_ms(50), figs.percentile_ms(99), figs.cpu_pct
    b.say(f"  {figs.events} events, p50 {p50:.0f} ms, p99 {p99:.0f} ms, CPU {cpu:.1f} %")
    r = figs.child.result
    b.raw[f"live_{rpm:.0f}rpm"] = {
        "events": figs.events, "expected_events": expected, "p50_ms": p50, "p99_ms": p99,
        "max_ms": float(figs.latency_s.max() * 1e3) if figs.latency_s.size else math.nan,
        "cpu_pct": cpu, "notes": figs.notes, **r}
    return [
        Row(f"live {lab}: events in the store", f"{figs.events:,} of ~{expected:,.0f} "
            "firing events", value=float(figs.events)),
        Row(f"live {lab}: p50 latency, frame to committed verdict",
            f"{p50:.0f} ms over {figs.latency_s.size:,} events", value=p50),
        Row(f"live {lab}: p99 latency, frame to committed verdict",
            f"{p99:.0f} ms (committed, seen by a reader)", value=p99, op="<=",
            limit=P99_MAX_MS, unit=" ms"),
        Row(f"live {lab}: latency, frame to add_events (before commit)",
            f"p50 {r.get('handed_p50_ms', math.nan):.0f} ms, "
            f"p99 {r.get('handed_p99_ms', math.nan):.0f} ms", value=r.get("handed_p99_ms")),
        Row(f"live {lab}: CPU of the analysing process",
            f"{cpu:.1f} % of a core ({r['cpu_s'] - r['feeder_cpu_s']:.1f} s CPU in "
            f"{r['stream_wall_s']:.1f} s; CAN feeder thread's {r['feeder_cpu_s']:.1f} s left out)",
            value=cpu, op="<=", limit=CPU_MAX_PCT, unit=" %"),
        *detail_rows(figs, lab, rpm),
    ]


def profile_text(b: Bench) -> str:
    """The cProfile table of a replay of the ``profile_minutes`` ride ('' when not possible)."""
    reason = part_missing("sim", "pipeline", "store")
    if reason:
        return f"profile not made: {reason}"
    from bench import profiling

    try:
        ride = b.ride(f"lap-{b.profile_minutes}")
    except CrankbeatError as exc:
        return f"profile not made: {exc}"
    stats = b.out / "profile.pstats"
    store = b.out / "profile.db"
    argv = [script("bench_replay.py"), "--rig", b.rig, "--can", str(ride.can), "--store",
            str(store), "--cpu", str(b.cpu), "--profile", str(stats)]
    for name, p in ride.captures.items():
        argv += ["--accel", f"{name}={p}"]
    b.say(f"profile: cProfile of the {b.profile_minutes} min replay")
    try:
        run = run_child(argv)
    except (OSError, subprocess.SubprocessError) as exc:
        return f"profile not made: {exc}"
    _remove_store(store)
    if not run.ok:
        return f"profile not made: {run.error}"
    return (f"Profile of the replay of a {b.profile_minutes}-minute ride "
            f"({stats.name}; `python -m pstats` opens it)\n" + profiling.render(stats))
