"""The build on a real multi-process Dask cluster: a ``dask scheduler`` and
``dask worker`` processes on 127.0.0.1, started by a fixture, with the CLI
pointed at them through ``--scheduler-file``."""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import time

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import sketchmerge

pytestmark = pytest.mark.cluster


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
    """A scheduler and two single-threaded worker processes on 127.0.0.1; yields the scheduler file."""
    d = tmp_path_factory.mktemp("cluster")
    sf = str(d / "scheduler.json")
    exe = shutil.which("dask", path=os.path.dirname(sys.executable)) or shutil.which("dask")
    if not exe:
        pytest.skip("the dask command is not installed")
    log = open(d / "cluster.log", "w")
    sched = subprocess.Popen([exe, "scheduler", "--host", "127.0.0.1", "--port", "0",
                              "--dashboard-address", "127.0.0.1:0", "--scheduler-file", sf],
                             stdout=log, stderr=subprocess.STDOUT, start_new_session=True)
    procs = [sched]
    try:
        _wait_file(sf, procs)
        worker = subprocess.Popen([exe, "worker", "--scheduler-file", sf, "--nworkers", "2",
                                   "--nthreads", "1", "--host", "127.0.0.1",
                                   "--dashboard-address", "127.0.0.1:0", "--memory-limit", "2GiB"],
                                  stdout=log, stderr=subprocess.STDOUT, start_new_session=True)
        procs.append(worker)
        from distributed import Client

        with Client(scheduler_file=sf, timeout="30s") as c:
            c.wait_for_workers(2, timeout=60)
        yield sf
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


def _data(root, n_files=4, n=20_000):
    rng = np.random.default_rng(11)
    xs, ws = [], []
    for i in range(n_files):
        x = rng.lognormal(0, 1, n)
        w = rng.uniform(0.5, 2.0, n)
        d = os.path.join(root, f"day=2026-11-{i + 1:02d}")
        os.makedirs(d, exist_ok=True)
        pq.write_table(pa.table({"x": x, "k": rng.integers(0, 5, n), "w": w}),
                       os.path.join(d, "p.parquet"), row_group_size=5000)
        xs.append(x)
        ws.append(w)
    return np.concatenate(xs), np.concatenate(ws)


def test_cli_on_multiprocess_cluster(cluster, tmp_path):
    x, w = _data(str(tmp_path / "d"))
    cmd = [sys.executable, "-m", "sketchmerge.cli", "build", str(tmp_path / "d"), "--out",
           str(tmp_path / "t"), "--scheduler-file", cluster, "--weight-column", "w", "--json", "--bins", "64"]
    r = subprocess.run(cmd, capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    rep = json.loads(r.stdout)
    assert rep["rows"] == 80_000 and rep["partitions_sketched"] == rep["partitions_total"]
    cuts = sketchmerge.load(str(tmp_path / "t"))
    assert cuts.edges("k").tolist() == [0, 1, 2, 3, 4]
    # exact weighted ranks of every edge (reference: numpy sums over all rows)
    f = cuts.feature("x")
    W = w.sum()
    lo = np.array([w[x < e].sum() for e in f.edges]) / W
    hi = np.array([w[x <= e].sum() for e in f.edges]) / W
    err = np.maximum(0, np.maximum(lo - f.first_target / 64, f.last_target / 64 - hi))
    assert err.max() <= f.rank_error <= 1 / (8 * 64)
    # the same build on the embedded single-process cluster publishes identical content
    sketchmerge.build(str(tmp_path / "d"), str(tmp_path / "t2"), weight_column="w", bins=64, workers=1)
    assert sketchmerge.load(str(tmp_path / "t2")).content_sha256 == cuts.content_sha256
    # rerun: nothing to sketch, nothing published
    r = subprocess.run(cmd, capture_output=True, text=True, timeout=300)
    rep2 = json.loads(r.stdout)
    assert r.returncode == 0 and rep2["changed"] is False and rep2["partitions_sketched"] == 0


def test_unreachable_scheduler_exit_code(tmp_path):
    _data(str(tmp_path / "d"), n_files=1, n=100)
    sf = tmp_path / "sf.json"
    sf.write_text(json.dumps({"type": "Scheduler", "address": "tcp://127.0.0.1:9", "id": "x"}))
    r = subprocess.run([sys.executable, "-m", "sketchmerge.cli", "build", str(tmp_path / "d"), "--out",
                        str(tmp_path / "t"), "--scheduler", "tcp://127.0.0.1:9"],
                       capture_output=True, text=True, timeout=120,
                       env=dict(os.environ, DASK_DISTRIBUTED__COMM__TIMEOUTS__CONNECT="2s"))
    assert r.returncode == 7, r.stderr
    assert "scheduler" in r.stderr and "Traceback" not in r.stderr
