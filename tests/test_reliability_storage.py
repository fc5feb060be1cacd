"""Storage faults: the fault-injecting filesystem itself, and builds through it.

``faulty://`` (sketchmerge.testing.faults) wraps the local disk, ``memory://``
or the S3-compatible test server and injects transient errors, hangs, short
reads and responses cut short.  Transient faults must be retried with backoff
and the build must publish exactly the bytes of an undisturbed build (creation
time pinned with SOURCE_DATE_EPOCH, the reproducible-builds convention);
permanent faults must fail with StorageError and publish nothing.
"""

from __future__ import annotations

import errno
import logging
import os
import time

import fsspec
import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest

import sketchmerge
from sketchmerge.errors import StorageError
from sketchmerge.sources import filesystem, open_dataset, read_unit
from sketchmerge.store import TableStore
from sketchmerge.testing import FaultyFileSystem

EPOCH = "1764547200"   # 2025-12-01T00:00:00Z: pins the table's creation time


# ----------------------------------------------------------------------------- the wrapper itself

def _fresh(**kw) -> FaultyFileSystem:
    fs = fsspec.filesystem("faulty", **kw)
    fs.reset()   # instances with equal settings share counters: start them again
    return fs


@pytest.fixture
def blob(memfs):
    data = bytes(np.random.default_rng(1).integers(0, 256, 50_000, dtype=np.uint8))
    memfs.pipe_file("/w/obj.bin", data)
    return data


def _calls(fs, n=40):
    """A fixed sequence of calls; returns which ones failed and how."""
    out = []
    for i in range(n):
        try:
            fs.cat_file("/w/obj.bin") if i % 2 else fs.info("/w/obj.bin")
            out.append(None)
        except OSError as e:
            out.append((type(e).__name__, e.errno))
    return out


def test_faults_are_deterministic_per_seed(blob):
    a = _calls(_fresh(target_protocol="memory", rate=0.3, seed=5))
    b = _calls(_fresh(target_protocol="memory", rate=0.3, seed=5))
    c = _calls(_fresh(target_protocol="memory", rate=0.3, seed=6))
    assert a == b and a != c
    assert 0 < sum(x is not None for x in a) < len(a)


def test_error_kinds_are_the_builtin_classes(blob):
    # PEP 3151: OSError(ECONNRESET) is ConnectionResetError, OSError(ETIMEDOUT) is TimeoutError
    want = {"connection": (ConnectionError, None), "timeout": (TimeoutError, None),
            "reset": (ConnectionResetError, errno.ECONNRESET), "etimedout": (TimeoutError, errno.ETIMEDOUT),
            "hang": (TimeoutError, None)}
    for kind, (cls, code) in want.items():
        fs = _fresh(target_protocol="memory", fail_calls=[2], error_kinds=[kind], timeout_seconds=0.01)
        assert fs.cat_file("/w/obj.bin") == blob        # call 1 passes
        with pytest.raises(cls) as ei:
            fs.cat_file("/w/obj.bin")                   # call 2 fails
        assert ei.value.errno == code and getattr(ei.value, "injected", False)
        assert fs.cat_file("/w/obj.bin") == blob        # call 3 passes
        assert fs.stats["faults"] == 1 and fs.log[0][0] == 2


def test_short_reads_return_a_prefix_and_the_stream_continues(blob):
    fs = _fresh(target_protocol="memory", short_read_rate=0.7, seed=3)
    got, sizes = [], []
    with fs.open("/w/obj.bin", "rb") as f:
        while True:
            c = f.read(4096)
            if not c:
                break
            got.append(c)
            sizes.append(len(c))
    assert b"".join(got) == blob                        # reference: the target's own bytes
    assert fs.stats["short_reads"] > 0 and min(sizes[:-1]) < 4096


def test_truncated_objects_end_early_with_the_full_size_listed(blob):
    fs = _fresh(target_protocol="memory", truncated=["/w/*"])
    with fs.open("/w/obj.bin", "rb") as f:
        data = f.read()
    assert len(data) < len(blob) and blob.startswith(data)
    assert fs.info("/w/obj.bin")["size"] == len(blob)
    assert blob.startswith(fs.cat_file("/w/obj.bin")) and len(fs.cat_file("/w/obj.bin")) < len(blob)


def test_permanent_paths_and_fault_budget(blob, memfs):
    memfs.pipe_file("/w/other.bin", b"fine")
    fs = _fresh(target_protocol="memory", permanent="/w/obj*", rate=1.0, max_faults=2, ops=["read"])
    for _ in range(3):
        with pytest.raises(PermissionError):
            fs.cat_file("/w/obj.bin")
    with pytest.raises(OSError):
        fs.cat_file("/w/other.bin")
    with pytest.raises(OSError):
        fs.cat_file("/w/other.bin")
    assert fs.cat_file("/w/other.bin") == b"fine"       # the budget of 2 is spent
    assert fs.info("/w/other.bin")["size"] == 4         # "info" is not in ops
    assert fs.stats["permanent"] == 3 and fs.stats["faults"] == 2


def test_settings_are_validated():
    for bad in ({"rate": 1.5}, {"error_kinds": ["gremlins"]}, {"ops": ["teleport"]},
                {"target_protocol": "faulty"}, {"permanent_error": "meteor"}):
        with pytest.raises(ValueError):
            _fresh(**{"target_protocol": "memory", **bad})


# ----------------------------------------------------------------------------- the read path

def _parquet(path, n=60_000, seed=0):
    r = np.random.default_rng(seed)
    t = pa.table({"x": r.normal(size=n), "k": r.integers(0, 50, n)})
    os.makedirs(os.path.dirname(path), exist_ok=True)
    pq.write_table(t, path, row_group_size=n // 4)
    return t


def test_short_reads_do_not_corrupt_parquet_units(tmp_path):
    t = _parquet(str(tmp_path / "d" / "a.parquet"))
    so = {"target_protocol": "file", "short_read_rate": 0.5, "seed": 11}
    ds = open_dataset(f"faulty://{tmp_path}/d", storage_options=so, byte_budget=1)
    got = np.concatenate([read_unit(u, ["x"], protocol=ds.protocol, storage_options=so)[0]["x"]
                          for u in ds.units])
    np.testing.assert_array_equal(got, t.column("x").to_numpy())   # reference: pyarrow's own reader
    assert filesystem("faulty", so).stats["short_reads"] > 0


def test_csv_cut_short_is_a_storage_error_not_fewer_rows(tmp_path):
    """Regression: a CSV whose response ended early was read as fewer rows, silently."""
    d = tmp_path / "c"
    d.mkdir()
    pacsv.write_csv(pa.table({"x": np.arange(200_000.0)}), str(d / "a.csv"))
    ds = open_dataset(f"faulty://{d}", storage_options={"target_protocol": "file"})
    so = {"target_protocol": "file", "truncated": ["*/a.csv"], "seed": 1}   # cut short when read
    with pytest.raises(StorageError, match="ended early"):
        read_unit(ds.units[0], ["x"], protocol=ds.protocol, storage_options=so)


def test_csv_reads_agree_on_slow_storage(tmp_path):
    """Regression: the CSV header reader read ahead on the same file object as the
    column reader; with slow reads the two raced (wrong header or rows)."""
    d = tmp_path / "c"
    d.mkdir()
    ref = pa.table({"x": np.random.default_rng(2).normal(size=300_000)})
    pacsv.write_csv(ref, str(d / "a.csv"))
    so = {"target_protocol": "file", "latency_seconds": 0.01}
    ds = open_dataset(f"faulty://{d}", storage_options=so)
    expect = pacsv.read_csv(str(d / "a.csv")).column("x").to_numpy()   # reference: pyarrow.csv
    for _ in range(4):
        arrays, _, rows = read_unit(ds.units[0], ["x"], protocol=ds.protocol, storage_options=so)
        assert rows == len(expect)
        np.testing.assert_array_equal(arrays["x"], expect)


# ----------------------------------------------------------------------------- builds

@pytest.fixture(scope="module")
def dataset(tmp_path_factory):
    root = tmp_path_factory.mktemp("faults") / "src"
    r = np.random.default_rng(7)
    for day in range(3):
        d = root / f"day=2026-11-{day + 1:02d}"
        d.mkdir(parents=True)
        n = 8000
        pq.write_table(pa.table({"x": r.lognormal(0, 1, n), "k": r.integers(0, 6, n),
                                 "w": r.uniform(0.2, 2, n)}), str(d / "p.parquet"), row_group_size=2000)
        pacsv.write_csv(pa.table({"x": r.normal(size=3000), "k": r.integers(0, 6, 3000),
                                  "w": r.uniform(0.2, 2, 3000)}), str(d / "extra.csv"))
    return str(root)


class _Count(logging.Handler):
    def __init__(self):
        super().__init__(logging.WARNING)
        self.retries = 0

    def emit(self, record):
        if "retry" in record.getMessage():
            self.retries += 1


def _build(client, source, table, so, tso=None):
    h = _Count()
    log = logging.getLogger("sketchmerge")
    log.addHandler(h)
    try:
        t0 = time.perf_counter()
        rep = sketchmerge.build(source, table, client=client, weight_column="w", bins=32, byte_budget=1,
                                storage_options=so, table_storage_options=tso or {})
        return rep, h.retries, time.perf_counter() - t0
    finally:
        log.removeHandler(h)


def _doc(table, v=None, options=None):
    return TableStore(table, storage_options=options).read_version(v)[1]


@pytest.fixture
def pinned(monkeypatch):
    monkeypatch.setenv("SOURCE_DATE_EPOCH", EPOCH)
    monkeypatch.setenv("SKETCHMERGE_RETRIES", "3")


def _reference(client, dataset, tmp_path):
    so = {"target_protocol": "file", "seed": -1}
    _build(client, f"faulty://{dataset}", str(tmp_path / "ref"), so)
    return _doc(str(tmp_path / "ref"))


FAULT_MIXES = {
    "errors": dict(rate=0.08, max_faults=3),
    "hangs": dict(rate=0.08, max_faults=3, error_kinds=["hang"], timeout_seconds=0.05),
    "short-reads": dict(short_read_rate=0.3, max_faults=3),
    "cut-short": dict(truncate_rate=0.15, max_faults=3),
    "everything": dict(rate=0.05, short_read_rate=0.1, truncate_rate=0.05, max_faults=3),
}


def _trials(client, dataset, tmp_path, seeds, mixes=FAULT_MIXES):
    ref = _reference(client, dataset, tmp_path)
    rows = []
    for mix, kw in mixes.items():
        for seed in seeds:
            so = {"target_protocol": "file", "seed": seed, **kw}
            table = str(tmp_path / f"t-{mix}-{seed}")
            rep, retries, secs = _build(client, f"faulty://{dataset}", table, so)
            assert rep["version"] == 1
            assert _doc(table) == ref, (mix, seed)            # byte-identical to the undisturbed build
            rows.append((mix, seed, filesystem("faulty", so).stats["faults"], retries, secs))
    for mix in mixes:
        r = [x for x in rows if x[0] == mix]
        print(f"faults {mix}: {len(r)} builds completed, byte-identical; faults injected "
              f"{sum(x[2] for x in r)}, retries logged {sum(x[3] for x in r)}, "
              f"seconds per build {min(x[4] for x in r):.2f}-{max(x[4] for x in r):.2f}")
    return rows


def test_transient_faults_are_retried_and_the_table_is_identical(client, dataset, tmp_path, pinned):
    rows = _trials(client, dataset, tmp_path, seeds=range(1))
    assert sum(r[2] for r in rows) >= 5         # the faults really happened


@pytest.mark.slow
def test_transient_faults_many_trials(client, dataset, tmp_path, pinned):
    _trials(client, dataset, tmp_path, seeds=range(100, 120))


def test_faults_on_the_table_store_are_retried(client, dataset, tmp_path, pinned, memfs):
    """The table itself on a faulty store (fallback protocol): writes, reads, listings fail."""
    ref = _reference(client, dataset, tmp_path)
    for seed in range(3):
        tso = {"target_protocol": "memory", "seed": seed, "rate": 0.05, "max_faults": 3,
               "error_kinds": ["connection", "reset", "etimedout"]}
        rep, _, _ = _build(client, f"faulty://{dataset}", f"faulty://tables{seed}/t",
                           {"target_protocol": "file", "seed": -1}, tso)
        assert rep["version"] == 1
        assert filesystem("faulty", tso).stats["calls"] > 0
        assert _doc(f"memory://tables{seed}/t") == ref    # read back through the plain memory store


def _day(src, day: str, seed: int, n=8000):
    r = np.random.default_rng(seed)
    d = os.path.join(src, f"day={day}")
    os.makedirs(d, exist_ok=True)
    pq.write_table(pa.table({"x": r.lognormal(0, 1, n), "k": r.integers(0, 6, n), "w": r.uniform(0.2, 2, n)}),
                   os.path.join(d, "p.parquet"), row_group_size=2000)


def test_refresh_under_faults_equals_undisturbed_refresh(client, dataset, tmp_path, pinned):
    import shutil

    src = tmp_path / "src"
    shutil.copytree(dataset, src)
    plain = {"target_protocol": "file", "seed": -1}
    _build(client, f"faulty://{src}", str(tmp_path / "a"), plain)
    _build(client, f"faulty://{src}", str(tmp_path / "b"), plain)
    _day(str(src), "2026-11-04", seed=4)                      # tonight's new day
    rep_a, _, _ = _build(client, f"faulty://{src}", str(tmp_path / "a"), plain)
    faulty = {"target_protocol": "file", "seed": 77, "rate": 0.08, "short_read_rate": 0.1, "max_faults": 3}
    rep_b, _, _ = _build(client, f"faulty://{src}", str(tmp_path / "b"), faulty)
    assert rep_a["version"] == rep_b["version"] == 2
    assert rep_b["partitions_sketched"] == rep_a["partitions_sketched"] == 4 < rep_a["partitions_total"]
    assert _doc(str(tmp_path / "a")) == _doc(str(tmp_path / "b"))


@pytest.mark.parametrize("fault", ["permanent", "truncated"])
def test_permanent_faults_fail_clearly_and_publish_nothing(client, dataset, tmp_path, pinned, monkeypatch,
                                                           fault):
    monkeypatch.setenv("SKETCHMERGE_RETRIES", "2")
    import shutil

    src = tmp_path / "src"
    shutil.copytree(dataset, src)
    table = str(tmp_path / "t")
    _build(client, f"faulty://{src}", table, {"target_protocol": "file", "seed": -1})
    before = _doc(table)
    _day(str(src), "2026-11-09", seed=9)   # a new day whose file is unreadable / always cut short
    so = {"target_protocol": "file", fault: ["*/day=2026-11-09/*"]}
    with pytest.raises(StorageError) as ei:
        _build(client, f"faulty://{src}", table, so)
    msg = str(ei.value)
    assert "day=2026-11-09/p.parquet" in msg and ("attempts" in msg)
    assert ("PermissionError" in msg) if fault == "permanent" else ("ended early" in msg)
    st = TableStore(table)
    assert st.current() == 1 and st.versions() == [1]
    assert _doc(table) == before


# ----------------------------------------------------------------------------- S3-compatible server

def test_s3_source_with_faults_equals_undisturbed(client, s3_options, s3_bucket, tmp_path, pinned):
    import s3fs

    fs = s3fs.S3FileSystem(**s3_options)
    r = np.random.default_rng(5)
    for day in range(3):
        with fs.open(f"{s3_bucket}/src/day={day}/p.parquet", "wb") as f:
            pq.write_table(pa.table({"x": r.normal(size=5000), "w": r.uniform(0.5, 1.5, 5000)}), f,
                           row_group_size=1250)
    src = f"faulty://{s3_bucket}/src"
    plain = {"target_protocol": "s3", "target_options": s3_options, "seed": -1}
    faulty = {"target_protocol": "s3", "target_options": s3_options, "seed": 3, "rate": 0.08,
              "short_read_rate": 0.2, "max_faults": 3}
    tables = {k: f"s3://{s3_bucket}/tables/{k}" for k in ("plain", "faulty")}
    for k, so in (("plain", plain), ("faulty", faulty)):
        rep, _, _ = _build(client, src, tables[k], so, tso=s3_options)
        assert rep["version"] == 1 and rep["rows"] == 15_000
    assert filesystem("faulty", faulty).stats["faults"] > 0
    assert _doc(tables["plain"], options=s3_options) == _doc(tables["faulty"], options=s3_options)
