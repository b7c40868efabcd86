"""The live figure: a recorded ride streamed in real time, latency seen from outside.

The bench process runs a local TCP server that plays each capture record at its wall time
(pyserial's ``socket://`` on the analysing side), starts ``scripts/bench_live.py`` (which
feeds the CAN frames onto python-can's virtual bus in its own process and runs
``logger.pipeline.analyse_live``), and polls the store file read-only every few milliseconds.
An event's latency is the wall time it was first seen in the store minus its own time ``t``
(firing TDC, on the bus's ``time.time()`` clock): the frame that completes an event arrives
after its TDC, so this is an upper bound of arrival-to-store, and it includes the polling
step (at most ``poll_s``).
"""

from __future__ import annotations

import socket
import sqlite3
import subprocess
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from bench.procs import ChildRun, finish, reap, script, spawn
from bench.table import Row


class SerialServer:
    """One-client TCP server sending ``(ride_time, bytes)`` records at ``t0 + ride_time - base``."""

    def __init__(self, records: list[tuple[float, bytes]], base: float) -> None:
        self.records = records
        self.base = base
        self._sock = socket.create_server(("127.0.0.1", 0))
        self._sock.settimeout(0.2)
        self.port = self._sock.getsockname()[1]
        self._t0: float | None = None
        self._go = threading.Event()
        self._halt = threading.Event()
        self.sent_bytes = 0
        self.error = ""
        self._thread = threading.Thread(target=self._run, name="bench-serial-server", daemon=True)
        self._thread.start()

    @property
    def url(self) -> str:
        return f"socket://127.0.0.1:{self.port}"

    def start(self, t0: float) -> None:
        self._t0 = t0
        self._go.set()

    def _run(self) -> None:
        conn = None
        try:
            while conn is None and not self._halt.is_set():
                try:
                    conn, _ = self._sock.accept()
                except TimeoutError:
                    continue
            if conn is None:
                return
            while not self._go.wait(0.1):
                if self._halt.is_set():
                    return
            assert self._t0 is not None
            for ts, data in self.records:
                if self._halt.is_set():
                    return
                wait = self._t0 + (ts - self.base) - time.time()
                if wait > 0.0005:
                    time.sleep(wait)
                if data:
                    conn.sendall(data)
                    self.sent_bytes += len(data)
            # keep the link up until told to stop: a closed socket is a pulled adapter
            self._halt.wait()
        except OSError as exc:
            self.error = f"serial server: {exc}"
        finally:
            if conn is not None:
                conn.close()

    def close(self) -> None:
        self._halt.set()
        self._thread.join(timeout=5.0)
        self._sock.close()


_NEW_EVENTS = ("SELECT seq, t FROM events WHERE run = (SELECT MAX(id) FROM runs) AND seq > ? "
               "ORDER BY seq")


class StorePoller:
    """Polls a store's ``events`` table; remembers when each event row was first seen."""

    def __init__(self, path: Path, *, poll_s: float = 0.005) -> None:
        self.path = path
        self.poll_s = poll_s
        self.t: list[float] = []
        self.seen: list[float] = []
        self.untimed = 0
        self._halt = threading.Event()
        self.error = ""
        self._thread = threading.Thread(target=self._run, name="bench-store-poller", daemon=True)
        self._thread.start()

    def _run(self) -> None:
        db = None
        last = -1
        try:
            while not self._halt.is_set():
                if db is None:
                    if not self.path.exists():
                        time.sleep(self.poll_s)
                        continue
                    db = sqlite3.connect(f"file:{self.path}?mode=ro", uri=True, timeout=1.0)
                try:
                    rows = db.execute(_NEW_EVENTS, (last,)).fetchall()
                except sqlite3.OperationalError:  # tables not made yet, or a busy moment
                    rows = []
                now = time.time()
                for seq, t in rows:
                    last = max(last, int(seq))
                    if t is None:  # an event without a time cannot have a latency
                        self.untimed += 1
                        continue
                    self.t.append(float(t))
                    self.seen.append(now)
                time.sleep(self.poll_s)
        except sqlite3.Error as exc:
            self.error = f"store poller: {exc}"
        finally:
            if db is not None:
                db.close()

    def close(self) -> None:
        self._halt.set()
        self._thread.join(timeout=5.0)

    def latencies(self) -> np.ndarray:
        """Seen time minus event time of every event polled, s."""
        return np.asarray(self.seen) - np.asarray(self.t)


@dataclass
class LiveFigures:
    """Outcome of one live run."""

    child: ChildRun
    latency_s: np.ndarray = field(default_factory=lambda: np.zeros(0))
    events: int = 0
    serial_bytes: dict[str, int] = field(default_factory=dict)  # sent by each server
    notes: list[str] = field(default_factory=list)

    def percentile_ms(self, q: float) -> float:
        return float(np.percentile(self.latency_s, q) * 1e3) if self.latency_s.size else np.nan

    def thread_pct(self) -> dict[str, float]:
        """CPU of each thread of the analysing process over the stream, % of a core."""
        return self._pct_of_stream("thread_cpu_s")

    def stage_pct(self) -> dict[str, float]:
        """CPU of the timed stages inside the main thread (analysis, store), % of a core."""
        return self._pct_of_stream("stage_cpu_s")

    def _pct_of_stream(self, key: str) -> dict[str, float]:
        r = self.child.result
        wall = r.get("stream_wall_s")
        if not wall:
            return {}
        return {name: 100.0 * s / wall for name, s in r.get(key, {}).items()}

    @property
    def cpu_pct(self) -> float:
        """CPU of the analysing process (feeder thread excluded) over the stream, % of a core."""
        r = self.child.result
        if not {"cpu_s", "feeder_cpu_s", "stream_wall_s"} <= set(r):
            return np.nan
        return 100.0 * (r["cpu_s"] - r["feeder_cpu_s"]) / r["stream_wall_s"]


def detail_rows(figs: LiveFigures, lab: str, rpm: float) -> list[Row]:
    """Informative rows: the analysis's hold-back by design (ms and crank revolutions at
    ``rpm``), the CPU of each thread, and inside the main thread of the analysis and the rest."""
    rows = []
    r = figs.child.result
    if "held_p50_ms" in r:
        rev_ms = 60e3 / rpm
        rows.append(Row(
            f"live {lab}: TDC to the end of the chunk that released it (CAN time)",
            f"p50 {r['held_p50_ms']:.0f} ms = {r['held_p50_ms'] / rev_ms:.1f} rev, p99 "
            f"{r['held_p99_ms']:.0f} ms = {r['held_p99_ms'] / rev_ms:.1f} rev: the analysis's "
            "hold-back and the wait for its chunk to close (the rest: serial margin, "
            "processing, commit)",
            value=r["held_p99_ms"]))
    threads = sorted(figs.thread_pct().items(), key=lambda kv: -kv[1])
    if threads:
        text = "; ".join(f"{name} {pct:.1f} %" for name, pct in threads)
        rows.append(Row(f"live {lab}: CPU per thread (% of a core)", text,
                        value=sum(p for _, p in threads)))
    stages = figs.stage_pct()
    if stages:
        text = "; ".join(f"{name.strip()} {pct:.1f} %" for name, pct in stages.items())
        rows.append(Row(f"live {lab}: CPU inside the main thread (% of a core)", text,
                        value=max(stages.values())))
    return rows


def run_live(can_log: Path, captures: dict[str, Path], store: Path, *, base: float,
             rig: str = "larch", start_margin_s: float = 0.5, end_settle_s: float = 1.0,
             tail_s: float = 1.5, timeout_s: float = 600.0) -> LiveFigures:
    """Stream a recorded ride in real time into a fresh store and measure latency and CPU.

    Events whose TDC lies within ``end_settle_s`` of the last frame sent are left out of the
    latency figures: nothing after them arrives to complete them until the stream stops.
    """
    from crankbeat.logger.serial.capture import CaptureReader

    servers: dict[str, SerialServer] = {}
    for name, path in captures.items():
        with CaptureReader(path) as reader:
            servers[name] = SerialServer(reader.read(), base)
    argv = [script("bench_live.py"), "--rig", rig, "--can", str(can_log), "--store", str(store),
            "--base", repr(base), "--tail", repr(tail_s), "--settle", repr(end_settle_s)]
    for name, srv in servers.items():
        argv += ["--port", f"{name}={srv.url}"]
    poller: StorePoller | None = None
    out_lines: list[str] = []
    t_start = time.perf_counter()
    proc = spawn(argv, stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                 text=True)
    err_lines: list[str] = []
    err_reader = threading.Thread(target=lambda: err_lines.extend(proc.stderr), daemon=True)
    err_reader.start()
    watchdog = threading.Timer(timeout_s, proc.kill)  # a hung child must not hang the bench
    watchdog.daemon = True
    watchdog.start()
    try:
        ready = proc.stdout.readline().strip()
        if ready != "READY":
            out_lines.append(ready)
        else:
            poller = StorePoller(store)
            t0 = time.time() + start_margin_s
            for srv in servers.values():
                srv.start(t0)
            proc.stdin.write(f"{t0!r}\n")
            proc.stdin.flush()
        out_lines.extend(proc.stdout)
    finally:
        code, usage = reap(proc)
        watchdog.cancel()
        err_reader.join(timeout=5.0)
        if poller is not None:
            time.sleep(0.05)
            poller.close()
        for srv in servers.values():
            srv.close()
        for f in (proc.stdin, proc.stdout, proc.stderr):
            if f is not None:
                f.close()
    child = finish(code, usage, time.perf_counter() - t_start, "\n".join(out_lines),
                   "".join(err_lines))
    figs = LiveFigures(child, serial_bytes={n: s.sent_bytes for n, s in servers.items()})
    if poller is not None:
        lat = poller.latencies()
        t_ev = np.asarray(poller.t)
        last_send = child.result.get("last_send_wall")
        if last_send is not None:
            # the events of the last moments complete only when the stream stops
            lat = lat[t_ev < last_send - end_settle_s]
        figs.latency_s = lat
        figs.events = len(poller.t) + poller.untimed
        figs.notes += [e for e in (poller.error,) if e]
        if poller.untimed:
            figs.notes.append(f"{poller.untimed} events had no time (NULL t) in the store")
    figs.notes += [s.error for s in servers.values() if s.error]
    late = child.result.get("feeder_late_max_s")
    if late is not None and late > 0.05:
        figs.notes.append(f"the CAN feeder fell {late * 1e3:.0f} ms behind the wall clock "
                          "at worst (a loaded machine)")
    return figs
