"""Run a bench helper in a fresh process and collect what it and the kernel say it used.

``os.wait4`` returns the resource usage of exactly that child (user and system CPU), unlike
``RUSAGE_CHILDREN``, which mixes every child the bench has waited for. Its ``ru_maxrss`` is no
good for peak memory, though: Linux carries the parent's resident set at ``fork`` into the
child's high-water mark across ``exec``, so a child of a 300 MB bench reports 300 MB even if it
never used more than 10. The helper therefore reads its own ``VmHWM`` (peak resident set of its
own address space, reset at exec) from ``/proc/self/status`` when its work is done and reports
it with its results: one JSON object on the last line of its stdout.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent

#: One thread per numeric library: the figures are for one core.
SINGLE_THREAD_ENV = {"OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}


@dataclass
class ChildRun:
    """What a helper process reported and used."""

    returncode: int
    result: dict = field(default_factory=dict)  # its last stdout line, parsed
    peak_rss_mb: float = 0.0  # the child's own VmHWM, MiB (ru_maxrss when it gave none)
    ru_maxrss_mb: float = 0.0  # kernel's figure, at least the parent's RSS at fork
    cpu_s: float = 0.0  # user + system
    wall_s: float = 0.0  # process start to exit, seen from outside
    error: str = ""  # last stderr lines when it failed

    @property
    def ok(self) -> bool:
        return self.returncode == 0 and not self.error


def own_peak_mb() -> float:
    """This process's peak resident set so far (VmHWM), MiB; NaN where /proc has none."""
    try:
        with open("/proc/self/status", encoding="ascii") as f:
            for line in f:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024.0  # kB
    except OSError:
        pass
    return float("nan")


def script(name: str) -> str:
    return str(ROOT / "scripts" / name)


def spawn(argv: Sequence[str], **kwargs) -> subprocess.Popen:
    """Start ``python argv...`` with single-threaded numeric libraries."""
    env = dict(os.environ, **SINGLE_THREAD_ENV)
    return subprocess.Popen([sys.executable, *argv], env=env, **kwargs)


def reap(proc: subprocess.Popen) -> tuple[int, os.struct_rusage | None]:
    """Wait for ``proc`` with ``os.wait4``; (exit code, its rusage)."""
    try:
        _, status, usage = os.wait4(proc.pid, 0)
    except ChildProcessError:  # already reaped elsewhere
        return proc.wait(), None
    code = os.waitstatus_to_exitcode(status)
    proc.returncode = code
    return code, usage


def run_child(argv: Sequence[str], *, timeout_s: float = 1800.0) -> ChildRun:
    """Run a helper to completion; stdout and stderr go through temporary files."""
    with tempfile.TemporaryFile() as out, tempfile.TemporaryFile() as err:
        t0 = time.perf_counter()
        proc = spawn(argv, stdout=out, stderr=err, stdin=subprocess.DEVNULL)
        deadline = t0 + timeout_s
        while True:  # not proc.poll(): it would reap the child before wait4 reads its usage
            if _exited(proc.pid):
                break
            if time.perf_counter() > deadline:
                proc.kill()
                break
            time.sleep(0.02)
        code, usage = reap(proc)
        wall = time.perf_counter() - t0
        out.seek(0)
        err.seek(0)
        stdout = out.read().decode("utf-8", "replace")
        stderr = err.read().decode("utf-8", "replace")
    return finish(code, usage, wall, stdout, stderr)


def _exited(pid: int) -> bool:
    """True once the child has exited, without reaping it (waitid with WNOWAIT)."""
    info = os.waitid(os.P_PID, pid, os.WEXITED | os.WNOHANG | os.WNOWAIT)
    return info is not None


def finish(code: int, usage, wall: float, stdout: str, stderr: str) -> ChildRun:
    run = ChildRun(returncode=code, wall_s=wall)
    if usage is not None:
        run.ru_maxrss_mb = usage.ru_maxrss / 1024.0  # Linux: KiB
        run.cpu_s = usage.ru_utime + usage.ru_stime
    lines = [ln for ln in stdout.strip().splitlines() if ln.strip()]
    if lines:
        try:
            run.result = json.loads(lines[-1])
        except json.JSONDecodeError:
            run.result = {}
    own = run.result.get("vm_hwm_mb")
    run.peak_rss_mb = float(own) if isinstance(own, int | float) else run.ru_maxrss_mb
    if code != 0 or not run.result:
        tail = [ln for ln in stderr.strip().splitlines() if ln.strip()][-3:]
        run.error = " | ".join(tail) or f"exit code {code}, no result line"
    return run
