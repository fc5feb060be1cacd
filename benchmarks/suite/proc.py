"""Whole-process measurements: wall time, CPU time and peak resident memory of a child.

``os.wait4`` returns the child's own resource usage, so CPU seconds and peak RSS are
those of that one process (with its threads), not of the benchmark driver.
"""

from __future__ import annotations

import os
import subprocess
import sys
import time
from dataclasses import dataclass

HERE = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))   # benchmarks/


@dataclass(frozen=True)
class Run:
    wall: float      # seconds, process start to exit
    cpu: float       # user + system seconds of the process
    rss_mb: float    # peak resident set size, MiB
    stdout: str


def run(cmd: list[str], timeout: float = 900.0, env: dict | None = None) -> Run:
    """Run ``cmd`` to completion; raise RuntimeError (with its stderr) when it fails."""
    e = dict(os.environ)
    e["PYTHONPATH"] = HERE + os.pathsep + e.get("PYTHONPATH", "")
    e.setdefault("PYTHONHASHSEED", "0")
    e.update(env or {})
    t0 = time.perf_counter()
    p = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=e)
    # read both pipes to the end, then reap with wait4 (communicate() would reap it
    # without its resource usage)
    out, err = _drain(p, timeout)
    _, status, usage = os.wait4(p.pid, 0)
    wall = time.perf_counter() - t0
    p.returncode = os.waitstatus_to_exitcode(status)
    if p.returncode != 0:
        raise RuntimeError(f"{' '.join(cmd[:4])}...: exit {p.returncode}\n{err[-3000:]}")
    return Run(wall=wall, cpu=usage.ru_utime + usage.ru_stime, rss_mb=usage.ru_maxrss / 1024.0,
               stdout=out)


def _drain(p: subprocess.Popen, timeout: float) -> tuple[str, str]:
    import threading

    bufs = {"out": b"", "err": b""}

    def pump(name, stream):
        bufs[name] = stream.read()

    ts = [threading.Thread(target=pump, args=("out", p.stdout)),
          threading.Thread(target=pump, args=("err", p.stderr))]
    for t in ts:
        t.start()
    for t in ts:
        t.join(timeout)
    return bufs["out"].decode(errors="replace"), bufs["err"].decode(errors="replace")


def best(runs: list[Run]) -> Run:
    """The fastest run (the least disturbed by other load on a shared machine)."""
    return min(runs, key=lambda r: r.wall)


def python(*args: str) -> list[str]:
    """A command running this interpreter."""
    return [sys.executable, *args]


def sketchmerge_cli(*args: str) -> list[str]:
    """The ``sketchmerge`` command, run by this interpreter."""
    return [sys.executable, "-m", "sketchmerge.cli", *args]
