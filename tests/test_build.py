"""End-to-end build tests: dataset URL -> published cut table -> load -> bin.

Edges are checked against exact weighted ranks computed with plain numpy over
all rows (the independent reference: ``numpy.sum`` of the weights below and
at-or-below each edge), and few-distinct features against ``numpy.unique``.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.feather as feather
import pyarrow.parquet as pq
import pytest

import sketchmerge
from sketchmerge.errors import InputError, NoInputError


def _rng(seed=0):
    return np.random.default_rng(seed)


def make_frame(n, seed=0):
    rng = _rng(seed)
    x = rng.standard_normal(n)
    x[rng.random(n) < 0.05] = np.nan
    return {
        "normal": x,
        "tail": rng.pareto(1.5, n),
        "f32": rng.gamma(2.0, 2.0, n).astype(np.float32),
        "ints": rng.integers(-1000, 1000, n),
        "few": rng.integers(0, 7, n).astype(np.int32),
        "flag": rng.random(n) < 0.2,
        "mass": np.where(rng.random(n) < 0.4, 3.0, rng.uniform(0, 10, n)),
        "w": rng.exponential(1.0, n),
        "p": rng.uniform(0.01, 0.99, n),
        "label": rng.random(n) < 0.5,
        "name": np.array(["a", "b"])[rng.integers(0, 2, n)],
    }


def write_hive(root, frames, fmt="parquet", rows_per_group=4000):
    paths = []
    for i, fr in enumerate(frames):
        d = os.path.join(root, f"day=2026-11-{i + 1:02d}")
        os.makedirs(d, exist_ok=True)
        t = pa.table(fr)
        if fmt == "parquet":
            p = os.path.join(d, "part-0.parquet")
            pq.write_table(t, p, row_group_size=rows_per_group)
        elif fmt == "csv":
            p = os.path.join(d, "part-0.csv")
            pacsv.write_csv(t, p)
        else:
            p = os.path.join(d, "part-0.arrow")
            feather.write_feather(t, p, chunksize=rows_per_group)
        paths.append(p)
    # files a build must ignore
    open(os.path.join(root, "_SUCCESS"), "w").close()
    return paths


def concat(frames, col):
    return np.concatenate([np.asarray(f[col], dtype=np.float64) for f in frames])


def check_edges(cuts, name, x, w=None):
    """Every edge's exact weighted rank interval is within the certified bound of its targets."""
    f = cuts.feature(name)
    w = np.ones_like(x) if w is None else w
    ok = ~np.isnan(x)
    x, w = x[ok], w[ok]
    W = w.sum()
    e = f.edges
    assert np.all(np.diff(e) > 0)
    assert e[-1] == x.max()
    if f.mode == "distinct":
        np.testing.assert_array_equal(e, np.unique(x))  # reference: numpy.unique
        return
    order = np.argsort(x)
    xs, cw = x[order], np.cumsum(w[order])
    lo_i = np.searchsorted(xs, e, side="left")
    hi_i = np.searchsorted(xs, e, side="right")
    lo = np.where(lo_i > 0, cw[np.maximum(lo_i - 1, 0)], 0.0) / W
    hi = cw[hi_i - 1] / W
    err = np.maximum(0, np.maximum(lo - f.first_target / f.bins, f.last_target / f.bins - hi))
    assert err.max() <= f.rank_error + 1e-9, (name, err.max(), f.rank_error)
    assert f.rank_error <= f.target_rank_error
    # and against numpy's weighted inverted-CDF quantiles: the edge for target q lies
    # within the rank bound of numpy's answer (reference: numpy.quantile with weights)
    q = f.last_target / f.bins
    ref = np.quantile(x, q, weights=w, method="inverted_cdf")
    ref_hi = np.searchsorted(xs, ref, side="right")
    ref_rank = cw[ref_hi - 1] / W
    assert np.all(np.abs(ref_rank - hi) <= 2 * f.rank_error + 2 * w.max() / W + 1e-9)


def test_parquet_hive_weighted(tmp_path, client):
    frames = [make_frame(30_000, s) for s in range(3)]
    write_hive(str(tmp_path / "data"), frames)
    rep = sketchmerge.build(str(tmp_path / "data"), str(tmp_path / "table"), weight_column="w",
                            label_column="label", client=client, bins=64, byte_budget=100_000)
    assert rep["changed"] and rep["version"] == 1
    assert rep["rows"] == 90_000
    assert rep["partitions_sketched"] == rep["partitions_total"] > 3
    names = {f["name"] for f in rep["features"]}
    assert names == {"normal", "tail", "f32", "ints", "few", "flag", "mass", "p"}
    assert {s["column"] for s in rep["skipped"]} >= {"name", "w", "label", "day"}
    cuts = sketchmerge.load(str(tmp_path / "table"))
    w = concat(frames, "w")
    for n in names:
        check_edges(cuts, n, concat(frames, n), w)
    assert cuts.feature("few").mode == "distinct" and cuts.edges("few").tolist() == list(range(7))
    assert cuts.edges("flag").tolist() == [0.0, 1.0]
    # point mass: one edge at 3.0, never duplicated
    assert np.count_nonzero(cuts.edges("mass") == 3.0) == 1
    nf = cuts.feature("normal")
    assert nf.missing_count == int(np.isnan(concat(frames, "normal")).sum())
    np.testing.assert_allclose(nf.missing_weight, w[np.isnan(concat(frames, "normal"))].sum())


@pytest.mark.parametrize("fmt", ["csv", "arrow"])
def test_csv_and_arrow(tmp_path, client, fmt):
    frames = [make_frame(8_000, s) for s in range(2)]
    paths = write_hive(str(tmp_path / "data"), frames, fmt=fmt, rows_per_group=3000)
    if fmt == "csv":  # decimal text round trip: the reference is what pyarrow's CSV reader reads back
        frames = [{k: v.to_numpy(zero_copy_only=False) for k, v in
                   zip(t.column_names, t.columns)} for t in map(pacsv.read_csv, paths)]
    rep = sketchmerge.build(str(tmp_path / "data"), str(tmp_path / "t"), client=client,
                            columns=["normal", "ints", "f32", "flag"], bins=32)
    assert rep["rows"] == 16_000
    cuts = sketchmerge.load(str(tmp_path / "t"))
    for n in ["normal", "ints", "f32", "flag"]:
        check_edges(cuts, n, concat(frames, n))


def test_schema_drift_and_all_missing(tmp_path, client):
    a = make_frame(5000, 1)
    b = make_frame(5000, 2)
    b.pop("tail")  # absent from the second file: missing there
    a["empty"] = np.full(5000, np.nan)
    write_hive(str(tmp_path / "d"), [a, b])
    rep = sketchmerge.build(str(tmp_path / "d"), str(tmp_path / "t"), client=client, bins=16)
    cuts = sketchmerge.load(str(tmp_path / "t"))
    tail = cuts.feature("tail")
    assert tail.missing_count == 5000 and tail.count == 5000
    check_edges(cuts, "tail", a["tail"])
    assert cuts.feature("empty").edges.size == 0 and cuts.feature("empty").mode == "empty"
    codes = cuts.bin({"empty": np.array([1.0, np.nan])}, features=["empty"])
    assert codes[:, 0].tolist() == [0, 0]
    assert rep["rows"] == 10_000


@pytest.mark.parametrize("loss,scale", [("squared", None), ("logistic", "probability"),
                                        ("logistic", "margin"), ("poisson", "mean"), ("poisson", "margin")])
def test_hessian_weights(tmp_path, client, loss, scale):
    fr = make_frame(20_000, 3)
    rng = _rng(9)
    fr["p"] = rng.uniform(0.02, 0.98, 20_000) if scale != "margin" else rng.normal(0, 1.5, 20_000)
    write_hive(str(tmp_path / "d"), [fr])
    rep = sketchmerge.build(str(tmp_path / "d"), str(tmp_path / "t"), client=client, bins=32,
                            columns=["normal", "tail"], weight_column="w", hessian=loss,
                            prediction_column="p", prediction_scale=scale)
    p = fr["p"]
    # hessians of the losses (common practice): squared 1; logistic p(1-p); poisson (log link) mu
    if loss == "squared":
        h = np.ones_like(p)
    elif loss == "logistic":
        prob = p if scale == "probability" else 1 / (1 + np.exp(-p))
        h = prob * (1 - prob)
    else:
        h = p if scale == "mean" else np.exp(p)
    w = fr["w"] * h
    cuts = sketchmerge.load(str(tmp_path / "t"))
    for n in ["normal", "tail"]:
        check_edges(cuts, n, fr[n], w)
        np.testing.assert_allclose(cuts.feature(n).total_weight, w[~np.isnan(fr[n])].sum(), rtol=1e-9)
    assert rep["features"][0]["rank_error"] <= 1 / (8 * 32)


def test_squared_hessian_equals_unweighted(tmp_path, client):
    # common practice: for squared error the hessian is 1, so the table equals the unweighted one
    fr = make_frame(10_000, 4)
    write_hive(str(tmp_path / "d"), [fr])
    sketchmerge.build(str(tmp_path / "d"), str(tmp_path / "a"), client=client, columns=["tail"])
    sketchmerge.build(str(tmp_path / "d"), str(tmp_path / "b"), client=client, columns=["tail"],
                      hessian="squared")
    a, b = sketchmerge.load(str(tmp_path / "a")), sketchmerge.load(str(tmp_path / "b"))
    np.testing.assert_array_equal(a.edges("tail"), b.edges("tail"))


def test_bad_weights_and_predictions(tmp_path, client):
    fr = make_frame(2000, 5)
    fr["w"][17] = -1.0
    write_hive(str(tmp_path / "d"), [fr])
    with pytest.raises(InputError, match=r"day=2026-11-01/part-0.parquet.*'w'.*position 17"):
        sketchmerge.build(str(tmp_path / "d"), str(tmp_path / "t"), client=client, weight_column="w")
    fr = make_frame(2000, 5)
    fr["p"][3] = 1.5
    write_hive(str(tmp_path / "e"), [fr])
    with pytest.raises(InputError, match=r"probabilities in \[0, 1\]"):
        sketchmerge.build(str(tmp_path / "e"), str(tmp_path / "t"), client=client, hessian="logistic",
                          prediction_column="p")
    assert not os.path.exists(tmp_path / "t" / "CURRENT")  # nothing published
    fr = make_frame(2000, 5)
    fr["w"][5] = np.nan
    write_hive(str(tmp_path / "f"), [fr])
    with pytest.raises(InputError, match="missing at row 5"):
        sketchmerge.build(str(tmp_path / "f"), str(tmp_path / "t"), client=client, weight_column="w")
    rep = sketchmerge.build(str(tmp_path / "f"), str(tmp_path / "t"), client=client, weight_column="w",
                            missing_weight="zero", columns=["normal"])
    assert rep["version"] == 1
    # finite weight x finite hessian can overflow: the product is checked once per unit
    fr = make_frame(2000, 5)
    fr["w"][:] = 1e300
    fr["p"] = np.full(2000, 0.5)
    fr["p"][11] = 700.0  # exp(700) ~ 1e304, finite; times 1e300 it is not
    write_hive(str(tmp_path / "g"), [fr])
    with pytest.raises(InputError, match=r"day=2026-11-01/part-0.parquet.*row weights.*inf.*position 11"):
        sketchmerge.build(str(tmp_path / "g"), str(tmp_path / "t2"), client=client, weight_column="w",
                          hessian="poisson", prediction_column="p", prediction_scale="margin")
    assert not os.path.exists(tmp_path / "t2" / "CURRENT")


def test_no_input(tmp_path, client):
    (tmp_path / "empty").mkdir()
    with pytest.raises(NoInputError):
        sketchmerge.build(str(tmp_path / "empty"), str(tmp_path / "t"), client=client)


def test_incremental_rerun_and_determinism(tmp_path, client):
    from distributed import Client, LocalCluster

    frames = [make_frame(12_000, s) for s in range(4)]
    write_hive(str(tmp_path / "d"), frames, rows_per_group=3000)
    kw = dict(bins=32, byte_budget=60_000)
    r1 = sketchmerge.build(str(tmp_path / "d"), str(tmp_path / "a"), client=client, **kw)
    assert r1["partitions_total"] > 8
    r2 = sketchmerge.build(str(tmp_path / "d"), str(tmp_path / "a"), client=client, **kw)
    assert r2["changed"] is False and r2["partitions_sketched"] == 0
    assert r2["partitions_reused"] == r1["partitions_total"] and r2["version"] == 1
    with LocalCluster(n_workers=1, threads_per_worker=1, processes=False,
                      dashboard_address="127.0.0.1:0", worker_dashboard_address="127.0.0.1:0") as lc, \
            Client(lc) as one:
        sketchmerge.build(str(tmp_path / "d"), str(tmp_path / "b"), client=one, fan_in=2, **kw)
        sketchmerge.build(str(tmp_path / "d"), str(tmp_path / "c"), client=one, **kw)
    a, c = sketchmerge.load(str(tmp_path / "a")), sketchmerge.load(str(tmp_path / "c"))
    # 2 threads vs 1 thread: byte-identical content
    assert a.content_sha256 == c.content_sha256
    # another fan-in changes the tree but the edges stay within the bound
    b = sketchmerge.load(str(tmp_path / "b"))
    for n in a.features:
        check_edges(b, n, concat(frames, n))


def test_shuffled_unit_order_is_byte_identical(tmp_path, client, monkeypatch):
    import sketchmerge.sources as src

    frames = [make_frame(6000, s) for s in range(3)]
    write_hive(str(tmp_path / "d"), frames, rows_per_group=2000)
    sketchmerge.build(str(tmp_path / "d"), str(tmp_path / "a"), client=client, bins=16)
    real = src.open_dataset

    def shuffled(*a, **k):
        import dataclasses

        ds = real(*a, **k)
        return dataclasses.replace(ds, units=tuple(reversed(ds.units)))

    monkeypatch.setattr(src, "open_dataset", shuffled)
    sketchmerge.build(str(tmp_path / "d"), str(tmp_path / "b"), client=client, bins=16, full=True)
    a, b = sketchmerge.load(str(tmp_path / "a")), sketchmerge.load(str(tmp_path / "b"))
    assert a.content_sha256 == b.content_sha256


def test_memory_filesystem(memfs, client):
    fr = make_frame(5000, 6)
    with memfs.open("/src/day=1/a.parquet", "wb") as f:
        pq.write_table(pa.table(fr), f)
    rep = sketchmerge.build("memory://src", "memory://tables/t", client=client, columns=["tail"])
    cuts = sketchmerge.load("memory://tables/t")
    check_edges(cuts, "tail", fr["tail"])
    assert rep["rows"] == 5000


def test_s3_round_trip(s3_options, s3_bucket, client):
    import s3fs

    fs = s3fs.S3FileSystem(**s3_options)
    frames = [make_frame(5000, s) for s in range(2)]
    for i, fr in enumerate(frames):
        with fs.open(f"{s3_bucket}/data/day={i}/part.parquet", "wb") as f:
            pq.write_table(pa.table(fr), f, row_group_size=2000)
    rep = sketchmerge.build(f"s3://{s3_bucket}/data", f"s3://{s3_bucket}/tables/t", client=client,
                            storage_options=s3_options, weight_column="w", bins=32)
    assert rep["rows"] == 10_000
    assert "testing-secret" not in json.dumps(rep)
    cuts = sketchmerge.load(f"s3://{s3_bucket}/tables/t", storage_options=s3_options)
    check_edges(cuts, "tail", concat(frames, "tail"), concat(frames, "w"))
    rep2 = sketchmerge.build(f"s3://{s3_bucket}/data", f"s3://{s3_bucket}/tables/t", client=client,
                             storage_options=s3_options, weight_column="w", bins=32)
    assert rep2["changed"] is False and rep2["partitions_sketched"] == 0


def test_bin_semantics(tmp_path, client):
    x = np.array([1.0, 2.0, 2.0, 3.0, 5.0, np.nan])
    write_hive(str(tmp_path / "d"), [{"x": x}])
    sketchmerge.build(str(tmp_path / "d"), str(tmp_path / "t"), client=client)
    cuts = sketchmerge.load(str(tmp_path / "t"))
    assert cuts.edges("x").tolist() == [1.0, 2.0, 3.0, 5.0]
    probe = np.array([-1.0, 1.0, 1.5, 2.0, 2.5, 5.0, 99.0, np.nan, -0.0])
    # bin i holds edges[i-1] < x <= edges[i]; above the max: last bin; NaN: len(edges)
    assert cuts.bin(probe[:, None]).ravel().tolist() == [0, 0, 1, 1, 2, 3, 3, 4, 0]
    import pandas as pd

    df = pd.DataFrame({"x": probe})
    np.testing.assert_array_equal(cuts.bin(df), cuts.bin(pa.table({"x": probe})))
    assert cuts.bin(df).dtype == np.uint8
    with pytest.raises(InputError, match="nope"):
        cuts.bin({"x": probe}, features=["x", "nope"])


def test_loading_does_not_import_dask(tmp_path, client):
    write_hive(str(tmp_path / "d"), [make_frame(1000, 1)])
    sketchmerge.build(str(tmp_path / "d"), str(tmp_path / "t"), client=client, columns=["tail"])
    code = ("import sys, numpy as np, sketchmerge; c = sketchmerge.load(sys.argv[1]); "
            "c.bin(np.zeros((3, 1))); "
            "bad = [m for m in sys.modules if m.split('.')[0] in ('dask', 'distributed')]; "
            "print(bad); sys.exit(1 if bad else 0)")
    r = subprocess.run([sys.executable, "-c", code, str(tmp_path / "t")], capture_output=True, text=True)
    assert r.returncode == 0, r.stdout + r.stderr


def test_cli_json_and_exit_codes(tmp_path):
    fr = make_frame(3000, 2)
    write_hive(str(tmp_path / "d"), [fr])
    env = dict(os.environ, SKETCHMERGE_PROGRESS_SECONDS="0")
    r = subprocess.run([sys.executable, "-m", "sketchmerge.cli", "build", str(tmp_path / "d"), "--out",
                        str(tmp_path / "t"), "--json", "--columns", "tail,few", "--workers", "1"],
                       capture_output=True, text=True, env=env)
    assert r.returncode == 0, r.stderr
    doc = json.loads(r.stdout)  # exactly one JSON document on stdout
    for k in ("version", "changed", "partitions_total", "partitions_sketched", "partitions_reused",
              "rows", "features", "seconds"):
        assert k in doc
    assert {f["name"] for f in doc["features"]} == {"tail", "few"}
    for f in doc["features"]:
        assert {"name", "edges_count", "rank_error", "missing_weight"} <= set(f)
    assert "units sketched" in r.stderr
    r = subprocess.run([sys.executable, "-m", "sketchmerge.cli", "show", str(tmp_path / "t"), "--json"],
                       capture_output=True, text=True)
    assert r.returncode == 0 and json.loads(r.stdout)["rows"] == 3000
    r = subprocess.run([sys.executable, "-m", "sketchmerge.cli", "verify", str(tmp_path / "t"),
                        str(tmp_path / "d"), "--json", "--workers", "1"], capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    assert json.loads(r.stdout)["ok"] is True
    (tmp_path / "none").mkdir()
    r = subprocess.run([sys.executable, "-m", "sketchmerge.cli", "build", str(tmp_path / "none"), "--out",
                        str(tmp_path / "t2")], capture_output=True, text=True)
    assert r.returncode == 4 and "Traceback" not in r.stderr
    r = subprocess.run([sys.executable, "-m", "sketchmerge.cli", "build", str(tmp_path / "d"), "--out",
                        str(tmp_path / "t2"), "--columns", "name"], capture_output=True, text=True)
    assert r.returncode == 3 and "name" in r.stderr and "Traceback" not in r.stderr
    r = subprocess.run([sys.executable, "-m", "sketchmerge.cli", "build", "--bogus"],
                       capture_output=True, text=True)
    assert r.returncode == 2


def test_embedded_default_is_dasks_threaded_scheduler(tmp_path, client):
    # without a client or scheduler the build runs on dask's in-process threaded scheduler:
    # distributed is never imported, and the table equals a distributed cluster's byte for byte
    frames = [make_frame(8000, s) for s in range(3)]
    write_hive(str(tmp_path / "d"), frames, rows_per_group=2000)
    code = ("import sys, json, logging, sketchmerge; logging.basicConfig(level=logging.INFO); "
            f"r = sketchmerge.build({str(tmp_path / 'd')!r}, {str(tmp_path / 'a')!r}, bins=32, "
            "weight_column='w', workers=2, byte_budget=60_000); "
            "print(json.dumps([r['partitions_sketched'], 'distributed' in sys.modules]))")
    env = {k: v for k, v in os.environ.items() if k != "DASK_SCHEDULER_ADDRESS"}
    p = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env, timeout=120)
    assert p.returncode == 0, p.stderr
    sketched, imported = json.loads(p.stdout.strip().splitlines()[-1])
    assert sketched > 4 and imported is False
    assert f"{sketched}/{sketched} units sketched" in p.stderr  # progress lines reach the log
    sketchmerge.build(str(tmp_path / "d"), str(tmp_path / "b"), bins=32, weight_column="w",
                      byte_budget=60_000, client=client)
    a, b = sketchmerge.load(str(tmp_path / "a")), sketchmerge.load(str(tmp_path / "b"))
    assert a.content_sha256 == b.content_sha256
    for n in a.features:
        check_edges(a, n, concat(frames, n), concat(frames, "w"))


def test_embedded_default_reports_bad_input_from_a_task(tmp_path):
    # an error raised inside a threaded task reaches the caller as itself, naming the column
    frames = [make_frame(4000, 0)]
    frames[0]["w"] = frames[0]["w"].copy()
    frames[0]["w"][123] = -1.0
    write_hive(str(tmp_path / "d"), frames)
    with pytest.raises(InputError, match="weight"):
        sketchmerge.build(str(tmp_path / "d"), str(tmp_path / "t"), weight_column="w")
    assert not (tmp_path / "t" / "CURRENT").exists()


@pytest.mark.parametrize("spare", [True, False])
def test_features_on_the_pool_or_inline_give_the_same_table(tmp_path, monkeypatch, spare):
    # a task alone hands its features to the shared pool; with every core busy it runs them
    # itself: the blobs and the table must not depend on which (reference: a build with the
    # other choice, and exact numpy ranks)
    import sketchmerge.job as job

    frames = [make_frame(30_000, s) for s in range(2)]
    write_hive(str(tmp_path / "d"), frames, rows_per_group=15_000)
    monkeypatch.setattr(job._Running, "spare", staticmethod(lambda: spare))
    sketchmerge.build(str(tmp_path / "d"), str(tmp_path / "a"), bins=64, weight_column="w", workers=2)
    monkeypatch.setattr(job._Running, "spare", staticmethod(lambda: not spare))
    sketchmerge.build(str(tmp_path / "d"), str(tmp_path / "b"), bins=64, weight_column="w", workers=2)
    a, b = sketchmerge.load(str(tmp_path / "a")), sketchmerge.load(str(tmp_path / "b"))
    assert a.content_sha256 == b.content_sha256
    for n in a.features:
        check_edges(a, n, concat(frames, n), concat(frames, "w"))


def test_a_bad_column_on_the_pool_names_it(tmp_path, monkeypatch):
    import sketchmerge.job as job

    fr = make_frame(5000, 1)
    fr["big"] = np.full(5000, 2**60, dtype=np.int64)  # beyond +-2**53: refused, naming the column
    write_hive(str(tmp_path / "d"), [fr])
    monkeypatch.setattr(job._Running, "spare", staticmethod(lambda: True))
    with pytest.raises(InputError, match="'big'"):
        sketchmerge.build(str(tmp_path / "d"), str(tmp_path / "t"), bins=16)


def test_a_blob_vanishing_during_the_build_fails_it_and_keeps_the_published_version(tmp_path, monkeypatch):
    # merges read their children back from the table: if one disappears (a gc run by
    # hand with no grace period, a bucket rule), the build stops with a FormatError
    # naming the blob, and the version already published stays current and loadable
    from sketchmerge.errors import FormatError
    from sketchmerge.store import TableStore

    frames = [make_frame(6000, s) for s in range(3)]
    write_hive(str(tmp_path / "d"), frames, rows_per_group=2000)
    sketchmerge.build(str(tmp_path / "d"), str(tmp_path / "t"), bins=16, workers=2)
    before = sketchmerge.load(str(tmp_path / "t"))
    write_hive(str(tmp_path / "d2"), frames + [make_frame(6000, 9)], rows_per_group=2000)
    real = TableStore.get_blobs
    monkeypatch.setattr(TableStore, "get_blobs", lambda self, keys: {k: v for k, v in real(self, keys).items()
                                                                      if k != sorted(keys)[0]})
    with pytest.raises(FormatError, match="vanished from the table store"):
        sketchmerge.build(str(tmp_path / "d2"), str(tmp_path / "t"), bins=16, workers=2)
    monkeypatch.undo()
    after = sketchmerge.load(str(tmp_path / "t"))
    assert after.version == before.version and after.content_sha256 == before.content_sha256


def test_a_lone_unit_sketched_in_two_halves_gives_the_same_blob(tmp_path, monkeypatch):
    # a task alone on its process reads and sketches every other feature on the pool,
    # with a reader of its own; the blob must be byte for byte the one-thread blob, with
    # an odd number of features, a column missing from the file and weights
    import sketchmerge.job as job
    from sketchmerge.sources import open_dataset

    fr = make_frame(20_000, 3)
    write_hive(str(tmp_path / "d"), [fr])
    ds = open_dataset(str(tmp_path / "d"))
    feats = [c for c in ds.columns if c != "w"][:4] + ["not_in_this_file"]
    assert len(feats) % 2 == 1
    spec = job.BuildSpec(features=tuple(feats), weight_column="w", hessian=None,
                         prediction_column=None, prediction_scale=None, missing_weight="error",
                         leaf_capacity=300, protocol="file",
                         dtypes=tuple((f, "float64") for f in feats))
    blobs = {}
    for spare in (False, True):
        monkeypatch.setattr(job._Running, "spare", staticmethod(lambda s=spare: s))
        blobs[spare] = job.sketch_unit(ds.units[0], spec, "k")
    assert blobs[True] == blobs[False]
    from sketchmerge.blob import decode_summary_set

    sets, meta = decode_summary_set(blobs[True])
    assert list(sets) == feats and meta["rows"] == 20_000
    assert sets["not_in_this_file"].missing_count == 20_000
