"""Nightly refresh: simulated days, concurrent builders and killed builders, with real processes."""

from __future__ import annotations

import json
import os
import random
import signal
import subprocess
import sys
import time

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import sketchmerge
from sketchmerge.store import TableStore


def write_day(root, day, n=6000, seed=None, shift=0.0):
    rng = np.random.default_rng(day if seed is None else seed)
    d = os.path.join(root, f"day=2026-11-{day:02d}")
    os.makedirs(d, exist_ok=True)
    for part in range(2):
        t = pa.table({"x": rng.normal(shift, 1, n), "y": rng.exponential(1, n),
                      "k": rng.integers(0, 4, n), "w": rng.uniform(0.1, 1, n)})
        pq.write_table(t, os.path.join(d, f"part-{part}.parquet"), row_group_size=3000)


def test_simulated_days(tmp_path, client):
    src, table = str(tmp_path / "src"), str(tmp_path / "table")
    kw = dict(client=client, weight_column="w", bins=32, byte_budget=40_000)
    for day in (1, 2, 3):
        write_day(src, day)
    r = sketchmerge.build(src, table, **kw)
    assert r["version"] == 1 and r["partitions_sketched"] == r["partitions_total"] == 12
    steps = [
        ("append day 4", lambda: write_day(src, 4), 4),
        ("rewrite one file", lambda: pq.write_table(pa.table({
            "x": np.arange(6000.0), "y": np.ones(6000), "k": np.zeros(6000, np.int64),
            "w": np.ones(6000)}), os.path.join(src, "day=2026-11-02", "part-1.parquet"),
            row_group_size=3000), 2),
        ("delete one file", lambda: os.remove(os.path.join(src, "day=2026-11-01", "part-0.parquet")), 0),
    ]
    version = 1
    for i, (what, change, sketched) in enumerate(steps):
        time.sleep(0.01)  # distinct mtimes
        change()
        r = sketchmerge.build(src, table, **kw)
        version += 1
        assert r["changed"] and r["version"] == version, what
        assert r["partitions_sketched"] == sketched, what
        assert r["partitions_reused"] == r["partitions_total"] - sketched, what
        assert "drift" in r and r["drift"]["features"], what
        # the refreshed table equals a full rebuild's
        full = sketchmerge.build(src, str(tmp_path / f"full{i}"), full=True, **kw)
        a = sketchmerge.load(table)
        b = sketchmerge.load(str(tmp_path / f"full{i}"))
        assert a.content_sha256 == b.content_sha256, what
        assert full["partitions_sketched"] == full["partitions_total"]
    hist = TableStore(table).versions()
    assert hist == [1, 2, 3, 4]
    rec = sketchmerge.load(table).record
    assert rec["changes"] == {"units_added": 0, "units_removed": 2, "units_changed": 0}
    # nothing changed: nothing published
    r = sketchmerge.build(src, table, **kw)
    assert r["changed"] is False and r["partitions_sketched"] == 0 and r["version"] == 4
    # an older version stays loadable by pin
    assert sketchmerge.load(table, version=1).version == 1


def _cli(args, **kw):
    return subprocess.Popen([sys.executable, "-m", "sketchmerge.cli"] + args, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, **kw)


def _concurrent(src, table, extra, n=3):
    procs = [_cli(["build", src, "--out", table, "--bins", str(8 * (i + 1)), "--workers", "1", "--json"]
                  + extra) for i in range(n)]
    outs = [p.communicate(timeout=300) for p in procs]
    return [(p.returncode, o, e) for p, (o, e) in zip(procs, outs)]


def _check_history(table, storage_options=None, n=3):
    st = TableStore(table, storage_options=storage_options)
    vs = st.versions()
    assert vs == list(range(1, len(vs) + 1))
    assert st.current() == vs[-1]
    bins = []
    for v in vs:
        c = sketchmerge.load(table, version=v, storage_options=storage_options)  # checksums verified
        assert c.version == v
        bins.append(c.options["bins"])
    return vs, bins


def test_concurrent_builders_local(tmp_path):
    src, table = str(tmp_path / "src"), str(tmp_path / "table")
    write_day(src, 1, n=3000)
    res = _concurrent(src, table, [])
    codes = [r[0] for r in res]
    assert set(codes) <= {0, 8}, [r[2] for r in res]
    vs, bins = _check_history(table)
    won = [json.loads(o)["version"] for c, o, _ in res if c == 0]
    assert sorted(won) == vs  # every successful builder's version exists; none lost
    assert len(set(bins)) == len(bins)


def test_concurrent_builders_s3(s3_options, s3_bucket, tmp_path):
    import s3fs

    fs = s3fs.S3FileSystem(**s3_options)
    rng = np.random.default_rng(0)
    with fs.open(f"{s3_bucket}/src/day=1/a.parquet", "wb") as f:
        pq.write_table(pa.table({"x": rng.normal(0, 1, 3000)}), f)
    so = ["--storage-option", f"key={s3_options['key']}", "--storage-option",
          f"secret={s3_options['secret']}", "--storage-option",
          f"client_kwargs.endpoint_url={s3_options['client_kwargs']['endpoint_url']}",
          "--storage-option", "client_kwargs.region_name=us-east-1"]
    table = f"s3://{s3_bucket}/tables/t"
    res = _concurrent(f"s3://{s3_bucket}/src", table, so)
    assert set(r[0] for r in res) <= {0, 8}, [r[2] for r in res]
    for _, out, err in res:
        assert s3_options["secret"] not in out + err
    vs, _ = _check_history(table, storage_options=s3_options)
    assert len(vs) == sum(1 for r in res if r[0] == 0)


@pytest.mark.parametrize("trial", range(4))
def test_killed_builder_leaves_previous_version(tmp_path, client, trial):
    src, table = str(tmp_path / "src"), str(tmp_path / "table")
    for day in (1, 2):
        write_day(src, day, n=20_000)
    sketchmerge.build(src, table, client=client, bins=16)
    before = sketchmerge.load(table)
    write_day(src, 3, n=20_000)
    p = _cli(["build", src, "--out", table, "--bins", "16", "--workers", "1"], start_new_session=True)
    time.sleep(random.Random(trial).uniform(0.3, 2.5))
    os.killpg(p.pid, signal.SIGKILL)
    p.communicate()
    now = sketchmerge.load(table)  # old or new, always complete and checksummed
    assert now.version in (1, 2)
    if now.version == 1:
        assert now.content_sha256 == before.content_sha256
    r = sketchmerge.build(src, table, client=client, bins=16)  # the next run completes
    assert r["version"] in (2, 3)
    assert sketchmerge.load(table).rows == 3 * 2 * 20_000


@pytest.mark.parametrize("damage", ["torn", "zero length", "lost"])
def test_a_damaged_cache_blob_is_sketched_again(tmp_path, damage, caplog):
    # unit blobs are cache entries written without fsync: after a crash they can be torn,
    # empty or gone.  A refresh (and an unchanged rerun, whose root blob is damaged) finds
    # them by their checks, sketches what they covered again and publishes what a full
    # build does.
    src, table = str(tmp_path / "src"), str(tmp_path / "table")
    kw = dict(weight_column="w", bins=32, byte_budget=40_000, workers=2)
    for day in (1, 2, 3):
        write_day(src, day)
    sketchmerge.build(src, table, **kw)
    blobs = os.path.join(table, "blobs")

    def hurt(key):
        path = os.path.join(blobs, key)
        if damage == "lost":
            os.remove(path)
            return
        with open(path, "rb") as f:
            data = f.read()
        with open(path, "wb") as f:
            f.write(b"" if damage == "zero length" else data[: len(data) // 2])

    # a crash tears what was written last, often many blobs: here every one of them
    for key in TableStore(table).existing_blobs():
        hurt(key)
    time.sleep(0.01)
    write_day(src, 4)
    with caplog.at_level("WARNING", logger="sketchmerge"):
        r = sketchmerge.build(src, table, **kw)
    assert r["changed"] and r["version"] == 2
    full = str(tmp_path / "full")
    sketchmerge.build(src, full, full=True, **kw)
    assert sketchmerge.load(table).content_sha256 == sketchmerge.load(full).content_sha256
    if damage != "lost":  # a lost blob is simply not in the cache; a damaged one is named
        assert any("is unreadable" in m for m in caplog.messages), caplog.messages
    # an unchanged rerun whose cached root is damaged rebuilds it and publishes nothing new
    hurt(sketchmerge.load(table).content["root"])
    r = sketchmerge.build(src, table, **kw)
    assert r["changed"] is False and r["version"] == 2
    assert sketchmerge.load(table).content_sha256 == sketchmerge.load(full).content_sha256
    assert sketchmerge.build(src, table, **kw)["changed"] is False  # the root blob is whole again


def test_blobs_skip_fsync_and_published_state_keeps_it(tmp_path, monkeypatch):
    # common practice for crash-safe files: fsync the content and the folder before a
    # rename makes the name durable.  Published state (version, manifest, pointer) is
    # fsynced; cache blobs, rebuilt when damaged (above), are not.
    if not os.path.isdir("/proc/self/fd"):
        pytest.skip("needs /proc to name the fsynced files")
    src, table = str(tmp_path / "src"), str(tmp_path / "table")
    write_day(src, 1)
    synced = []
    real = os.fsync

    def spy(fd):
        synced.append(os.readlink(f"/proc/self/fd/{fd}"))
        return real(fd)

    monkeypatch.setattr(os, "fsync", spy)
    sketchmerge.build(src, table, bins=16, byte_budget=40_000, workers=1)
    keys = TableStore(table).existing_blobs()
    assert len(keys) >= 3
    assert not [p for p in synced if p.endswith(os.sep + "blobs") or any(k in p for k in keys)]
    names = [p.rsplit(os.sep, 1)[-1] for p in synced]
    for published in ("v00000001.cuts.tmp", "v00000001.keys.tmp", "CURRENT.tmp"):
        assert any(n.endswith("-" + published) for n in names), (published, names)
    assert any(p.endswith(os.sep + "versions") for p in synced)  # and their folder
