"""Worker loss: SIGKILL a ``dask worker`` process in the middle of a build.

A real cluster on 127.0.0.1 (a ``dask scheduler`` and two single-threaded
worker processes under their nannies, as in tests/test_cluster.py) runs the
``sketchmerge build`` command, reading its source through ``faulty://`` with
30 ms of latency per read (slow storage, so the task phase lasts a few seconds
on any machine).  Once the scheduler holds the build's tasks, the
test kills a worker that is processing some of them.  The scheduler recomputes
what was lost, the nanny starts a new worker, and the build must complete with
a table byte-identical to an undisturbed build's (creation time pinned with
SOURCE_DATE_EPOCH, the reproducible-builds convention).
"""

from __future__ import annotations

import json
import os
import random
import shutil
import signal
import subprocess
import sys
import time

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from sketchmerge.store import TableStore

pytestmark = [pytest.mark.cluster,
              pytest.mark.skipif(sys.platform == "win32", reason="SIGKILL is POSIX")]

EPOCH = "1764547200"


def _wait_file(path, procs, timeout=60):
    t0 = time.time()
    while time.time() - t0 < timeout:
        if os.path.exists(path) and os.path.getsize(path) > 0:
            return
        for p in procs:
            if p.poll() is not None:
                raise RuntimeError(f"dask process exited early with {p.returncode}")
        time.sleep(0.2)
    raise TimeoutError(f"scheduler file {path} not written")


@pytest.fixture(scope="module")
def cluster(tmp_path_factory):
    """A scheduler and two single-threaded worker processes (with nannies) on 127.0.0.1."""
    exe = shutil.which("dask", path=os.path.dirname(sys.executable)) or shutil.which("dask")
    if not exe:
        pytest.skip("the dask command is not installed")
    d = tmp_path_factory.mktemp("cluster")
    sf = str(d / "scheduler.json")
    log = open(d / "cluster.log", "w")
    procs = [subprocess.Popen([exe, "scheduler", "--host", "127.0.0.1", "--port", "0",
                               "--dashboard-address", "127.0.0.1:0", "--scheduler-file", sf],
                              stdout=log, stderr=subprocess.STDOUT, start_new_session=True)]
    try:
        _wait_file(sf, procs)
        procs.append(subprocess.Popen([exe, "worker", "--scheduler-file", sf, "--nworkers", "2",
                                       "--nthreads", "1", "--host", "127.0.0.1",
                                       "--dashboard-address", "127.0.0.1:0", "--memory-limit", "2GiB",
                                       "--preload", "sketchmerge.testing.faults"],
                                      stdout=log, stderr=subprocess.STDOUT, start_new_session=True))
        from distributed import Client

        with Client(scheduler_file=sf, timeout="30s") as c:
            c.wait_for_workers(2, timeout=60)
            yield sf, c
    finally:
        for p in reversed(procs):
            try:
                os.killpg(p.pid, signal.SIGTERM)
            except ProcessLookupError:
                pass
        for p in procs:
            try:
                p.wait(timeout=20)
            except subprocess.TimeoutExpired:
                os.killpg(p.pid, signal.SIGKILL)
        log.close()


@pytest.fixture(scope="module")
def dataset(tmp_path_factory):
    """36 units of 40,000 rows."""
    root = tmp_path_factory.mktemp("workers") / "src"
    r = np.random.default_rng(17)
    for day in range(6):
        d = root / f"day=2026-11-{day + 1:02d}"
        d.mkdir(parents=True)
        n = 240_000
        pq.write_table(pa.table({"x": r.lognormal(0, 1, n), "y": r.normal(size=n), "k": r.integers(0, 40, n),
                                 "w": r.uniform(0.2, 2.0, n)}), str(d / "p.parquet"), row_group_size=40_000)
    return str(root)


# the build command in a process that knows faulty:// (importing sketchmerge.testing registers it)
CLI = "import sys, sketchmerge.testing; from sketchmerge.cli import main; sys.exit(main(sys.argv[1:]))"


def _build_cmd(src, table, sf):
    # the source is read through faulty:// with 30 ms per read (the workers preload it): slow
    # storage gives the build a task phase of a few seconds whatever the machine's speed
    return [sys.executable, "-c", CLI, "build", f"faulty://{src}", "--out", table,
            "--scheduler-file", sf, "--weight-column", "w", "--bins", "64", "--json",
            "--storage-option", "target_protocol=file", "--storage-option", "latency_seconds=0.03"]


def _env():
    # one unit per row group (the byte budget is a defaults-table setting, config.py)
    return dict(os.environ, SOURCE_DATE_EPOCH=EPOCH, SKETCHMERGE_BYTE_BUDGET="1")


def _doc(table):
    return TableStore(table).read_version()[1]


def _wait_workers(client, n, timeout=60):
    t0 = time.time()
    while len(client.scheduler_info(n_workers=-1)["workers"]) < n:
        if time.time() - t0 > timeout:
            raise TimeoutError("the nanny did not restart the worker")
        time.sleep(0.2)


def _kill_trial(cluster, dataset, table, rng) -> dict:
    sf, client = cluster
    _wait_workers(client, 2)
    pids = client.run(os.getpid)                       # worker address -> process id
    t0 = time.perf_counter()
    p = subprocess.Popen(_build_cmd(dataset, table, sf), stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                         text=True, env=_env())
    killed = None
    # wait until the build's tasks are on the workers, then a random moment into them
    while p.poll() is None and killed is None:
        busy = {w: ks for w, ks in client.processing().items() if any(str(k).startswith("sm-") for k in ks)}
        if busy:
            time.sleep(rng.uniform(0.0, 1.0))
            busy = {w: ks for w, ks in client.processing().items() if ks}
            if busy:
                victim = rng.choice(sorted(busy))
                os.kill(pids[victim], signal.SIGKILL)
                killed = (victim, len(busy[victim]), round(time.perf_counter() - t0, 2))
        time.sleep(0.05)
    out, err = p.communicate(timeout=600)
    return {"code": p.returncode, "out": out, "err": err, "killed": killed,
            "seconds": round(time.perf_counter() - t0, 2)}


def _run(cluster, dataset, tmp_path, trials, seed):
    sf, client = cluster
    ref = str(tmp_path / "ref")
    t0 = time.perf_counter()
    r = subprocess.run(_build_cmd(dataset, ref, sf), capture_output=True, text=True, timeout=600, env=_env())
    assert r.returncode == 0, r.stderr[-3000:]
    want = _doc(ref)
    ref_seconds = round(time.perf_counter() - t0, 2)
    rng = random.Random(seed)
    results = []
    i = 0
    # a trial whose build finished before the kill came does not count towards ``trials``
    while sum(bool(x["killed"]) for x in results) < trials and i < 2 * trials:
        i += 1
        res = _kill_trial(cluster, dataset, str(tmp_path / f"t{i}"), rng)
        assert res["code"] == 0, res["err"][-3000:]
        rep = json.loads(res["out"])
        assert rep["partitions_sketched"] == rep["partitions_total"] == 36
        assert _doc(str(tmp_path / f"t{i}")) == want, i          # byte-identical to the undisturbed build
        results.append(res)
    hits = [x for x in results if x["killed"]]
    print(f"worker SIGKILL: {len(results)} builds completed byte-identical, {len(hits)} with a worker killed "
          f"mid-build (tasks on the victim: {[x['killed'][1] for x in hits]}, at s: "
          f"{[x['killed'][2] for x in hits]}); build seconds {[x['seconds'] for x in results]} "
          f"(undisturbed {ref_seconds})")
    return results


def test_worker_killed_mid_build(cluster, dataset, tmp_path):
    res = _run(cluster, dataset, tmp_path, trials=1, seed=1)
    assert sum(bool(x["killed"]) for x in res) == 1


@pytest.mark.slow
def test_worker_killed_mid_build_ten_trials(cluster, dataset, tmp_path):
    res = _run(cluster, dataset, tmp_path, trials=10, seed=2)
    assert sum(bool(x["killed"]) for x in res) == 10
