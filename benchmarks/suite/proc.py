"""Whole-process measurements: wall time, CPU time and peak resident memory of a child.

CPU seconds and peak RSS are those of the one measured process (with its threads), taken
from ``getrusage(RUSAGE_CHILDREN)`` in a small launcher, not of the benchmark driver.
"""

from __future__ import annotations

import os
import subprocess
import sys
from dataclasses import dataclass

HERE = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))   # benchmarks/


@dataclass(frozen=True)
class Run:
    wall: float      # seconds, process start to exit
    cpu: float       # user + system seconds of the process
    rss_mb: float    # peak resident set size, MiB
    stdout: str


# Linux keeps a process's peak RSS across exec, and a fresh child starts from a copy of
# its parent's memory map: a child of a big benchmark driver would report the driver's
# peak as its own.  So every measured command runs under this small launcher, whose own
# children start from its small map; it reports their usage on its last stderr line.
_LAUNCHER = """\
import resource, subprocess, sys, time
t = time.perf_counter()
rc = subprocess.call(sys.argv[1:])
wall = time.perf_counter() - t
u = resource.getrusage(resource.RUSAGE_CHILDREN)
sys.stderr.write("\\n@@usage %r %r %r\\n" % (wall, u.ru_utime + u.ru_stime, u.ru_maxrss))
sys.exit(rc)
"""


def run(cmd: list[str], timeout: float = 900.0, env: dict | None = None) -> Run:
    """Run ``cmd`` to completion; raise RuntimeError (with its stderr) when it fails."""
    e = dict(os.environ)
    e["PYTHONPATH"] = HERE + os.pathsep + e.get("PYTHONPATH", "")
    e.setdefault("PYTHONHASHSEED", "0")
    e.update(env or {})
    p = subprocess.Popen([sys.executable, "-c", _LAUNCHER, *cmd], stdout=subprocess.PIPE,
                         stderr=subprocess.PIPE, env=e)
    out, err = _drain(p, timeout)
    p.wait(timeout)
    if p.returncode != 0:
        raise RuntimeError(f"{' '.join(cmd[:4])}...: exit {p.returncode}\n{err[-3000:]}")
    last = [ln for ln in err.splitlines() if ln.startswith("@@usage ")][-1].split()
    wall, cpu, rss_kb = float(last[1]), float(last[2]), float(last[3])
    return Run(wall=wall, cpu=cpu, rss_mb=rss_kb / 1024.0, stdout=out)


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
