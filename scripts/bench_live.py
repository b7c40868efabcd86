"""Bench helper: the analysing process of the live figure (run by bench/live.py).

Usage: python scripts/bench_live.py --can LOG --port NAME=URL --store FILE --base T
       [--rig larch] [--tail S]

python-can's virtual bus joins buses of one process only, so the frames of the recorded ride
are sent onto it from a feeder thread here, each at wall time ``t0 + (ts - base)``; the bus
stamps them with ``time.time()`` as a real interface would. The accelerometer bytes come from
the bench process through ``socket://``. Protocol on stdio: this prints ``READY`` when set up,
reads ``t0`` (epoch seconds) from stdin, streams, and prints one JSON line at the end. The
CPU figure covers t0 to the last frame sent, with the feeder thread's own CPU reported apart.

Per thread: the CPU of every thread of the process over the same span, from the kernel's
``/proc/self/task/<tid>/stat`` (user + system ticks), named by its Python thread name: the
feeder (the bench's stand-in for the bus, not part of the analysing program), the serial
``PortReader`` threads, and the main thread, which reads the bus and runs the analysis and the
store writes. Inside the main thread, the CPU of the analysis stages and of the store writes is
timed per call (``time.thread_time``) by wrapping their methods, so the figure shows what the
analysis itself costs beside reading and decoding.

The store's ``add_events`` is wrapped (the real method still does the work) to note when each
event was handed to the store: with the bench's view of when it became visible (committed),
that splits the latency into analysis and commit. ``RunAnalysis.push`` is wrapped likewise to
note the end (CAN time) of the chunk that released each event: end minus the event's TDC is
the analysis's hold-back by design (the crank data its verdict waits for) plus the wait for
that chunk to close, apart from the serial margin, the processing and the commit.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import sys
import threading
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
import crankbeat.logger.cli  # noqa: E402, F401 - the command's process settings (one BLAS thread)
from bench.procs import own_peak_mb  # noqa: E402


def _cpu_self() -> float:
    ru = resource.getrusage(resource.RUSAGE_SELF)
    return ru.ru_utime + ru.ru_stime


_TICK_S = 1.0 / os.sysconf("SC_CLK_TCK")


def thread_cpu() -> dict[int, float]:
    """CPU (user + system, s) of every live thread of this process, by kernel thread id."""
    out: dict[int, float] = {}
    for task in Path("/proc/self/task").iterdir():
        try:
            stat = (task / "stat").read_text()
        except OSError:  # the thread ended meanwhile
            continue
        # fields after the command name (which may hold spaces) start at field 3
        rest = stat[stat.rindex(")") + 2:].split()
        out[int(task.name)] = (int(rest[11]) + int(rest[12])) * _TICK_S
    return out


def thread_names() -> dict[int, str]:
    """Python thread name of each kernel thread id (main thread included)."""
    return {t.native_id: t.name for t in threading.enumerate() if t.native_id is not None}


class CallTimer:
    """Adds up the thread CPU of calls to wrapped methods, per label, until ``stop_at`` (wall)."""

    def __init__(self) -> None:
        self.cpu: dict[str, float] = {}
        self.calls: dict[str, int] = {}
        self.stop_at = float("inf")

    def wrap(self, owner, name: str, label: str) -> None:
        """Time ``owner.name`` (a class: every instance; an instance: that one only)."""
        inner = getattr(owner, name)
        self.cpu.setdefault(label, 0.0)
        self.calls.setdefault(label, 0)

        def timed(*args, **kwargs):
            if time.time() > self.stop_at:
                return inner(*args, **kwargs)
            c0 = time.thread_time()
            try:
                return inner(*args, **kwargs)
            finally:
                self.cpu[label] += time.thread_time() - c0
                self.calls[label] += 1

        setattr(owner, name, timed)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rig", default="larch")
    ap.add_argument("--can", required=True, type=Path)
    ap.add_argument("--port", action="append", default=[], metavar="NAME=URL")
    ap.add_argument("--store", required=True, type=Path)
    ap.add_argument("--base", required=True, type=float, help="ride time that maps onto t0")
    ap.add_argument("--tail", type=float, default=1.5, help="s after the last frame to stop")
    ap.add_argument("--settle", type=float, default=1.0,
                    help="events within this many s of the last frame are left out of latency")
    args = ap.parse_args(argv)

    import can

    from crankbeat.dsp.analysis import EventAnalyzer
    from crankbeat.dsp.vibration import VibrationAnalyzer
    from crankbeat.errors import CrankbeatError
    from crankbeat.logger.can.decode import FrameDecoder
    from crankbeat.logger.can.sources import BusSource
    from crankbeat.logger.pipeline import analyse_live
    from crankbeat.logger.rig import load_rig
    from crankbeat.logger.rig.model import CanBus
    from crankbeat.logger.run.analysis import RunAnalysis
    from crankbeat.logger.serial.decoder import SerialDecoder
    from crankbeat.logger.store import Store

    held: list[tuple[float, object]] = []  # (chunk end, event times) per analysis step
    push = RunAnalysis.push

    def noting_push(self, chunk):
        out = push(self, chunk)
        if len(out.events):
            held.append((chunk.end_time, out.events["t"].copy()))
        return out

    RunAnalysis.push = noting_push  # the analysis's own hold-back, in CAN time (see below)
    timer = CallTimer()
    # class methods: the unbound function is wrapped, so `self` comes through in *args
    timer.wrap(RunAnalysis, "push", "analysis, whole step (RunAnalysis.push)")
    timer.wrap(EventAnalyzer, "push", "  crank, work and verdicts (EventAnalyzer.push)")
    timer.wrap(VibrationAnalyzer, "push", "  vibration (VibrationAnalyzer.push)")
    timer.wrap(BusSource, "recv_batch", "bus reads (BusSource.recv_batch)")
    timer.wrap(FrameDecoder, "push", "CAN decoding (FrameDecoder.push)")
    timer.wrap(SerialDecoder, "push", "serial decoding (SerialDecoder.push)")
    rig = load_rig(args.rig)
    with can.LogReader(str(args.can)) as reader:
        msgs = list(reader)
    channel = f"crankbeat-bench-{os.getpid()}"
    feeder_bus = can.Bus(interface="virtual", channel=channel)
    ports = dict(spec.split("=", 1) for spec in args.port)
    for suffix in ("", "-wal", "-shm"):
        p = Path(str(args.store) + suffix)
        if p.exists():
            p.unlink()
    store = Store.open(args.store, create=True)
    handed: list[tuple[float, object]] = []  # (wall time, event times) per add_events call
    add_events = store.add_events

    def noting_add_events(run_id, events):
        handed.append((time.time(), events["t"].copy()))
        return add_events(run_id, events)

    store.add_events = noting_add_events  # type: ignore[method-assign]
    for name in ("add_events", "mask_events", "add_windows", "add_channels", "commit"):
        timer.wrap(store, name, "store writes and commits")
    stop = threading.Event()
    figures: dict[str, float] = {}

    print("READY", flush=True)
    t0 = float(sys.stdin.readline())

    def feed() -> None:
        cpu_start = _cpu_self()
        threads_start = thread_cpu()
        thread_start = time.thread_time()
        late = 0.0
        for msg in msgs:
            due = t0 + (msg.timestamp - args.base)
            wait = due - time.time()
            if wait > 0.0005:
                time.sleep(wait)
            else:
                late = max(late, -wait)
            feeder_bus.send(msg)
        # CPU is counted over the feed only: the idle tail would flatter the figure
        figures["feeder_cpu_s"] = time.thread_time() - thread_start
        figures["cpu_s"] = _cpu_self() - cpu_start
        figures["last_send_wall"] = timer.stop_at = time.time()
        threads_end, names = thread_cpu(), thread_names()
        names[threading.get_native_id()] = "bench CAN feeder (the bus's stand-in, left out)"
        names[threading.main_thread().native_id] = "main: bus read, decode, analysis, store"
        per_thread: dict[str, float] = {}
        for tid, cpu in threads_end.items():
            label = names.get(tid, f"thread {tid}")
            per_thread[label] = per_thread.get(label, 0.0) + cpu - threads_start.get(tid, 0.0)
        figures["thread_cpu_s"] = per_thread
        figures["stream_wall_s"] = figures["last_send_wall"] - t0
        figures["feeder_late_max_s"] = late
        time.sleep(args.tail)
        stop.set()

    feeder = threading.Thread(target=feed, name="bench-can-feeder", daemon=True)
    feeder.start()
    try:
        result = analyse_live(rig, CanBus(interface="virtual", channel=channel), ports, store,
                              stop_event=stop, label="bench-live")
    except CrankbeatError as exc:
        stop.set()
        print(f"error: {exc}", file=sys.stderr)
        return exc.exit_code
    finally:
        feeder.join(timeout=5.0)
        feeder_bus.shutdown()
        store.close()
    figures.update(frames_sent=len(msgs), run_id=result.run_id, vm_hwm_mb=own_peak_mb())
    figures["stage_cpu_s"] = dict(timer.cpu)
    if handed and "last_send_wall" in figures:
        import numpy as np

        wall = np.concatenate([np.full(len(t), w) for w, t in handed])
        t_ev = np.concatenate([t for _, t in handed])
        keep = np.isfinite(t_ev) & (t_ev < figures["last_send_wall"] - args.settle)
        lat = wall[keep] - t_ev[keep]
        if lat.size:
            figures.update(handed_p50_ms=float(np.percentile(lat, 50) * 1e3),
                           handed_p99_ms=float(np.percentile(lat, 99) * 1e3))
    if held and "last_send_wall" in figures:
        import numpy as np

        # CAN time from an event's TDC to the end of the chunk that released it: what the
        # analysis holds back by design and the chunk's closing, without the waits and the
        # processing
        end = np.concatenate([np.full(len(t), e) for e, t in held])
        t_ev = np.concatenate([t for _, t in held])
        keep = np.isfinite(t_ev) & np.isfinite(end) & (t_ev < figures["last_send_wall"]
                                                       - args.settle)
        if keep.any():
            hb = end[keep] - t_ev[keep]
            figures.update(held_p50_ms=float(np.percentile(hb, 50) * 1e3),
                           held_p99_ms=float(np.percentile(hb, 99) * 1e3))
    print(json.dumps(figures))
    return 0


if __name__ == "__main__":
    sys.exit(main())
