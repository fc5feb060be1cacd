"""Readers under load: many loader processes read one table while refreshes publish.

Each loader process (``sketchmerge.load`` only: no dask) loads the current
version again and again until told to stop, and records what it saw: the
version, the content checksum and a digest of every edge, and the codes it
gets binning a fixed probe column, checked in the loader against
``numpy.searchsorted`` on the same edges (the README's bin rule: bin ``i``
holds ``edges[i-1] < x <= edges[i]``).  Meanwhile the test publishes three
refreshes.  Every load must succeed, and every (version, checksum, digest) seen
must be exactly that version's as read afterwards by a pinned load: one
consistent version per load, never a mix.

Local disk: 6 loaders in CI, 32 with ``-m slow``; the S3-compatible server: 32
with ``-m slow``.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import time

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import sketchmerge

LOADER = r"""
import hashlib, json, os, sys, time
import numpy as np
import sketchmerge

table, so_json, stop, out = sys.argv[1:]
so = json.loads(so_json) or None
probe = np.linspace(-4, 4, 1001)
seen, errors, times = {}, [], []
with open(out + ".ready", "w"):
    pass
while not os.path.exists(stop):
    t0 = time.perf_counter()
    try:
        c = sketchmerge.load(table, storage_options=so)
        e = c.edges("x")
        codes = c.bin({"x": probe}, features=["x"])[:, 0]
        want = np.minimum(np.searchsorted(e, probe, side="left"), len(e) - 1)
        assert np.array_equal(codes, want), "codes disagree with the edges"
        digest = hashlib.sha256(b"".join(c.edges(n).tobytes() for n in c.features)).hexdigest()
        key = f"{c.version}|{c.content_sha256}|{digest}"
        seen[key] = seen.get(key, 0) + 1
    except Exception as ex:  # recorded, and the test fails on it
        errors.append(f"{type(ex).__name__}: {ex}")
    times.append(time.perf_counter() - t0)
json.dump({"seen": seen, "errors": errors[:20], "n_errors": len(errors), "times": times}, open(out, "w"))
"""


def _write_day(fs_root, day, fs=None):
    r = np.random.default_rng(day)
    t = pa.table({"x": r.normal(day * 0.1, 1, 20_000), "y": r.exponential(1, 20_000)})
    path = f"{fs_root}/day={day:02d}/p.parquet"
    if fs is None:
        os.makedirs(os.path.dirname(path), exist_ok=True)
        pq.write_table(t, path)
    else:
        with fs.open(path, "wb") as f:
            pq.write_table(t, f)


@pytest.fixture(scope="module")
def client():
    from distributed import Client, LocalCluster

    cluster = LocalCluster(n_workers=1, threads_per_worker=1, processes=False,
                           dashboard_address="127.0.0.1:0", worker_dashboard_address="127.0.0.1:0")
    c = Client(cluster)
    yield c
    c.close()
    cluster.close()


def _expected(table, so, versions):
    import hashlib

    out = {}
    for v in versions:
        c = sketchmerge.load(table, version=v, storage_options=so)
        digest = hashlib.sha256(b"".join(c.edges(n).tobytes() for n in c.features)).hexdigest()
        out[f"{v}|{c.content_sha256}|{digest}"] = v
    return out


def _run(tmp_path, client, n_loaders, s3=None, bucket=None):
    fs = None
    if s3:
        import s3fs

        fs = s3fs.S3FileSystem(**s3)
        src_root, src, table = f"{bucket}/src", f"s3://{bucket}/src", f"s3://{bucket}/table"
    else:
        src_root, src, table = str(tmp_path / "src"), str(tmp_path / "src"), str(tmp_path / "table")
    _write_day(src_root, 1, fs)
    kw = dict(storage_options=s3, client=client, bins=64)
    sketchmerge.build(src, table, **kw)
    stop = tmp_path / "stop"
    outs = [tmp_path / f"loader{i}.json" for i in range(n_loaders)]
    env = dict(os.environ, OMP_NUM_THREADS="1")
    procs = [subprocess.Popen([sys.executable, "-c", LOADER, table, json.dumps(s3 or {}), str(stop), str(o)],
                              env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
             for o in outs]
    try:
        t0 = time.time()
        while not all(os.path.exists(str(o) + ".ready") for o in outs):
            assert time.time() - t0 < 240, "loaders did not start"
            assert all(p.poll() is None for p in procs), [p.stderr.read() for p in procs if p.poll() is not None]
            time.sleep(0.1)
        time.sleep(0.5)
        published = [1]
        t_pub = time.perf_counter()
        for day in (2, 3, 4):                         # three refreshes while the loaders read
            _write_day(src_root, day, fs)
            published.append(sketchmerge.build(src, table, **kw)["version"])
            time.sleep(0.3)
        t_pub = time.perf_counter() - t_pub
    finally:
        stop.touch()
        errs = [p.communicate(timeout=300)[1] for p in procs]
    assert published == [1, 2, 3, 4]
    assert all(p.returncode == 0 for p in procs), errs
    expected = _expected(table, s3, published)
    total, per_version, times, errors = 0, {}, [], []
    for o in outs:
        r = json.loads(o.read_text())
        errors += r["errors"]
        times += r["times"]
        for key, n in r["seen"].items():
            assert key in expected, f"a load saw a state no version had: {key}"
            per_version[expected[key]] = per_version.get(expected[key], 0) + n
            total += n
    assert errors == [], errors[:5]
    assert len(per_version) >= 2                       # the loaders did read across publishes
    t = np.array(times)
    print(f"readers ({'s3' if s3 else 'local'}): {n_loaders} loader processes, {total} loads while 3 refreshes "
          f"published in {t_pub:.1f} s, all consistent; loads per version {dict(sorted(per_version.items()))}; "
          f"load ms median {np.median(t) * 1e3:.0f}, p99 {np.percentile(t, 99) * 1e3:.0f}, max {t.max() * 1e3:.0f}")


def test_loaders_during_refresh_local(tmp_path, client):
    _run(tmp_path, client, n_loaders=6)


@pytest.mark.slow
def test_32_loaders_during_refresh_local(tmp_path, client):
    _run(tmp_path, client, n_loaders=32)


@pytest.mark.slow
def test_32_loaders_during_refresh_s3(tmp_path, client, s3_options, s3_bucket):
    _run(tmp_path, client, n_loaders=32, s3=s3_options, bucket=s3_bucket)
