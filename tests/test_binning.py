"""Binning: every code equals the plain binary search of the contract, for every input kind.

The oracle is ``numpy.searchsorted(edges, x, side="left")``, which numpy
documents as returning ``i`` with ``a[i-1] < v <= a[i]`` (numpy reference,
``numpy.searchsorted``), clipped to the last bin, with NaN mapped to
``len(edges)`` (the cut-table contract).  ``reference_codes`` below is written
out again here rather than imported, so the library's own helper is checked too.

Inputs are random, adversarial (values exactly at edges and one float step to
either side, +-0.0, +-inf, NaN, subnormals, values beyond float32 range,
edges closer than one float32 step) and in every accepted layout.  The data
are made up here: readings of an invented fleet of delivery drones.
"""

from __future__ import annotations

import tracemalloc

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from sketchmerge import Summary
from sketchmerge.binning import EdgeIndex, bin_columns, reference_codes
from sketchmerge.cuts import CutTable, feature_cuts
from sketchmerge.errors import InputError


def oracle(x, edges):
    """numpy.searchsorted(side="left") clipped to the last bin; NaN -> len(edges); no edges -> 0."""
    e = np.asarray(edges, np.float64)
    xf = np.asarray(x).astype(np.float64)  # float32 -> float64 is exact (IEEE 754 widening)
    if e.size == 0:
        return np.zeros(xf.shape, np.int64)
    c = np.minimum(np.searchsorted(e, xf, side="left"), e.size - 1)
    c[np.isnan(xf)] = e.size
    return c


def probes(edges, extra=()):
    """Values at, just below and just above every edge, plus specials (float64)."""
    e = np.asarray(edges, np.float64)
    e = e[np.isfinite(e)]
    special = [np.nan, -np.nan, 0.0, -0.0, np.inf, -np.inf, 5e-324, -5e-324, 2.2250738585072014e-308,
               1e-310, -1e-310, 1e300, -1e300, 3.4028234663852886e38, 3.5e38, -3.5e38, 1.0, -1.0]
    with np.errstate(over="ignore"):  # the step above the largest float is inf
        return np.concatenate([e, np.nextafter(e, np.inf), np.nextafter(e, -np.inf),
                               np.asarray(special), np.asarray(extra, np.float64)])


def f32_probes(edges):
    """float32 values at, below and above each edge's float32 neighbours, plus specials."""
    with np.errstate(over="ignore"):
        e32 = np.asarray(edges, np.float64).astype(np.float32)
    e32 = e32[np.isfinite(e32)]
    special = np.array([np.nan, 0.0, -0.0, np.inf, -np.inf, 1e-45, -1e-45, 1.1754944e-38,
                        3.4028235e38, -3.4028235e38, 1.0, -1.0], np.float32)
    with np.errstate(over="ignore"):
        return np.concatenate([e32, np.nextafter(e32, np.float32(np.inf)),
                               np.nextafter(e32, np.float32(-np.inf)), special]).astype(np.float32)


def codes(edges, x):
    out = np.empty(np.asarray(x).shape[0], np.int64)
    return EdgeIndex(edges).bin(x, out)


# --------------------------------------------------------------------------- the contract
def test_contract_by_hand():
    # bin i holds edges[i-1] < x <= edges[i]; above the max: last bin; NaN: len(edges); -0.0 == 0.0
    e = [-1.0, 0.0, 2.0, 5.0]
    x = np.array([-7.0, -1.0, -0.5, -0.0, 0.0, 1e-300, 2.0, 4.9, 5.0, 6.0, np.inf, -np.inf, np.nan])
    assert codes(e, x).tolist() == [0, 0, 1, 1, 1, 2, 2, 3, 3, 3, 3, 0, 4]
    assert codes([], x).tolist() == [0] * x.size          # an all-missing feature: every code 0
    assert codes([3.0], x).tolist() == [0] * 12 + [1]     # one edge: one bin plus missing


def test_negative_zero_edge_is_zero():
    # an edge stored as -0.0 must behave as 0.0 (IEEE 754: -0.0 == 0.0)
    x = np.array([-0.0, 0.0, -1e-320, 1e-320])
    assert codes([-1.0, -0.0, 1.0], x).tolist() == oracle(x, [-1.0, 0.0, 1.0]).tolist() == [1, 1, 1, 2]


def test_reference_helper_matches_oracle():
    rng = np.random.default_rng(0)
    e = np.sort(rng.standard_normal(40))
    x = probes(e, rng.standard_normal(500))
    np.testing.assert_array_equal(reference_codes(x, e), oracle(x, e))


# --------------------------------------------------------------------------- grids and adversarial edges
def _edge_sets():
    rng = np.random.default_rng(7)
    q = np.linspace(0, 1, 256)[1:]
    yield "normal", np.unique(np.quantile(rng.standard_normal(50_000), q))
    yield "uniform wide", np.unique(np.quantile(rng.uniform(-1e3, 1e3, 50_000), q))
    yield "lognormal", np.unique(np.quantile(rng.lognormal(2, 2.5, 50_000), q))
    yield "zero inflated", np.unique(np.quantile(np.where(rng.random(50_000) < .6, 0, rng.exponential(9, 50_000)), q))
    yield "tight cluster", np.unique(np.concatenate([1000 + 1e-9 * np.arange(200), np.linspace(0, 1e6, 55)]))
    yield "infinite ends", np.concatenate([[-np.inf], np.linspace(-3, 3, 50), [np.inf]])
    yield "subnormal", np.array([-1e-310, -5e-324, 0.0, 5e-324, 1e-320, 1e-310, 1e-300])
    yield "huge", np.array([-1.7e308, -1e300, -3.5e38, 0.0, 3.5e38, 1e300, 1.7e308])
    yield "integers", np.arange(0.0, 12.0)
    yield "two", np.array([0.5, 0.75])
    # several float64 edges inside one float32 step: the float32 path must upcast
    yield "within one float32 step", 1.0 + np.arange(6) * 2.0**-40
    yield "float32 exact", np.array([0.1, 0.2, 0.3], np.float32).astype(np.float64)
    yield "65535 edges", np.arange(65535.0) * 0.37 - 9000.0


@pytest.mark.parametrize("name,edges", list(_edge_sets()), ids=[n for n, _ in _edge_sets()])
def test_adversarial_edges_float64_and_float32(name, edges):
    rng = np.random.default_rng(1)
    fin = edges[np.isfinite(edges)]
    # random points inside every gap between consecutive finite edges (no overflow)
    i = rng.integers(0, max(fin.size - 1, 1), 3000)
    u = rng.random(3000)
    spread = fin[i] * (1 - u) + fin[np.minimum(i + 1, fin.size - 1)] * u
    x = probes(edges, spread)
    np.testing.assert_array_equal(codes(edges, x), oracle(x, edges), err_msg=name)
    with np.errstate(over="ignore"):  # beyond float32 range rounds to +-inf (IEEE 754)
        x32 = np.concatenate([f32_probes(edges), spread.astype(np.float32)])
    np.testing.assert_array_equal(codes(edges, x32), oracle(x32, edges), err_msg=name + " float32")
    # a non-native byte order and float16 take the converting path
    np.testing.assert_array_equal(codes(edges, x.astype(">f8")), oracle(x, edges))
    with np.errstate(over="ignore"):  # beyond float16 range: inf, as IEEE 754 rounding says
        h = x32.astype(np.float16)
    np.testing.assert_array_equal(codes(edges, h), oracle(h, edges))


def test_each_grid_kind_is_used():
    sets = dict(_edge_sets())
    kinds = {n: EdgeIndex(e).describe() for n, e in sets.items()}
    assert kinds["normal"]["float64"]["kind"] == "value"
    assert kinds["lognormal"]["float64"]["kind"] == "key"
    assert kinds["infinite ends"]["float64"]["kind"] == "key"
    assert kinds["tight cluster"]["float64"]["steps"] > 1      # several search steps exercised
    assert "float32" not in kinds["within one float32 step"]  # float32 upcast path exercised
    assert kinds["normal"]["float64"]["steps"] == 1


finite = st.floats(allow_nan=False, allow_infinity=True, width=64)


@settings(max_examples=200)
@given(edges=st.lists(finite, min_size=0, max_size=40, unique=True),
       values=st.lists(st.floats(allow_nan=True, allow_infinity=True, width=64), max_size=60),
       seed=st.integers(0, 2**31 - 1))
def test_property_random_edges_and_values(edges, values, seed):
    e = np.unique(np.asarray(edges, np.float64) + 0.0)  # strictly increasing, one zero
    rng = np.random.default_rng(seed)
    x = probes(e, values)
    if e.size and np.isfinite(e).any():
        f = e[np.isfinite(e)]
        x = np.concatenate([x, rng.uniform(f.min(), f.max(), 50) if f.max() - f.min() < 1e308 else f])
    rng.shuffle(x)
    np.testing.assert_array_equal(codes(e, x), oracle(x, e))
    with np.errstate(over="ignore"):
        x32 = np.concatenate([x.astype(np.float32), f32_probes(e)])
    np.testing.assert_array_equal(codes(e, x32), oracle(x32, e))


@settings(max_examples=100)
@given(edges=st.lists(st.floats(width=32, allow_nan=False), min_size=1, max_size=30, unique=True),
       values=st.lists(st.floats(width=32), max_size=60))
def test_property_float32_edges_and_values(edges, values):
    e = np.unique(np.asarray(edges, np.float64) + 0.0)
    x = np.concatenate([np.asarray(values, np.float32), f32_probes(e)])
    np.testing.assert_array_equal(codes(e, x), oracle(x, e))


def test_integer_and_boolean_values():
    e = np.array([-3.5, 0.0, 1.0, 7.0, 2.0**40])
    for x in (np.arange(-10, 12, dtype=np.int64), np.arange(0, 200, dtype=np.uint8),
              np.array([True, False, True]), np.arange(-5, 5, dtype=np.int16)):
        np.testing.assert_array_equal(codes(e, x), oracle(x, e))


# --------------------------------------------------------------------------- layouts
FEATURES = ["altitude", "battery", "payload", "gusts", "rotor_rpm"]


def drone_rows(n=40_000, seed=3):
    """An invented fleet log: one column per feature, some NaN, some ties."""
    rng = np.random.default_rng(seed)
    cols = {
        "altitude": rng.gamma(2.0, 40.0, n),
        "battery": np.round(rng.uniform(0, 100, n), 1),
        "payload": np.where(rng.random(n) < 0.3, 0.0, rng.lognormal(0.5, 1.0, n)),
        "gusts": rng.standard_t(3, n),
        "rotor_rpm": rng.normal(5200, 300, n),
    }
    for v in cols.values():
        v[rng.random(n) < 0.05] = np.nan
    return cols


def drone_table(cols, bins=(256, 64, 32, 128, 300)):
    feats = []
    for (name, x), b in zip(cols.items(), bins):
        feats.append(feature_cuts(name, Summary.from_values(x).prune(4096), b, 1 / (8 * b)))
    return CutTable(feats)


def expected(cuts, cols, names):
    return np.stack([oracle(np.asarray(cols[n], np.float64), cuts.edges(n)) for n in names], axis=1)


@pytest.fixture(scope="module")
def fleet():
    cols = drone_rows()
    return cols, drone_table(cols)


def test_numpy_layouts(fleet):
    cols, cuts = fleet
    names = ["gusts", "altitude", "rotor_rpm"]  # the job's own order
    c = np.stack([cols[n] for n in names], axis=1)
    for data in (c, np.asfortranarray(c), c.astype(np.float32), np.asfortranarray(c.astype(np.float32)),
                 c[::2], c.astype(">f8"), np.round(np.nan_to_num(c)).astype(np.int32)):
        ref = expected(cuts, {n: data[:, j] for j, n in enumerate(names)}, names)
        np.testing.assert_array_equal(cuts.bin(data, features=names), ref, err_msg=str(data.dtype))
        np.testing.assert_array_equal(cuts.bin(data, features=names, threads=1), ref)


def test_uint16_codes_when_more_than_255_edges(fleet):
    cols, cuts = fleet
    assert cuts.edges("rotor_rpm").size > 255
    got = cuts.bin(cols)
    assert got.dtype == np.uint16
    np.testing.assert_array_equal(got, expected(cuts, cols, FEATURES))
    assert cuts.bin(cols, features=["battery", "payload"]).dtype == np.uint8


def test_dict_pandas_arrow_layouts(fleet):
    pa = pytest.importorskip("pyarrow")
    pd = pytest.importorskip("pandas")
    cols, cuts = fleet
    names = ["payload", "battery", "altitude", "gusts"]
    want = expected(cuts, cols, names)
    n = cols["payload"].size
    extra = {"unused": np.zeros(n), **cols}
    inputs = {
        "dict": extra,
        "dict of lists": {k: v.tolist() for k, v in cols.items() if k in names},
        "pandas": pd.DataFrame(extra),
        "arrow table": pa.table(extra),
        "arrow batch": pa.RecordBatch.from_pydict(extra),
        "arrow chunked": pa.Table.from_batches(pa.table(extra).to_batches(max_chunksize=7777)),
        "pandas arrow dtype": pd.DataFrame(extra).convert_dtypes(dtype_backend="pyarrow"),
    }
    for label, data in inputs.items():
        np.testing.assert_array_equal(cuts.bin(data, features=names), want, err_msg=label)


def test_arrow_nulls_offsets_and_types(fleet):
    pa = pytest.importorskip("pyarrow")
    cols, cuts = fleet
    x = cols["battery"]
    e = cuts.edges("battery")
    mask = np.isnan(x)
    # nulls (not NaN) with garbage under them; a sliced array (non-zero offset); many chunks
    arr = pa.array(np.where(mask, 12345.0, x), mask=mask)
    sliced = pa.chunked_array([arr.slice(3, 10_000), arr.slice(10_003, 7), arr.slice(10_010)])
    want = oracle(x[3:], e)
    got = cuts.bin(pa.table({"battery": sliced}), features=["battery"]).ravel()
    np.testing.assert_array_equal(got, want)
    ints = np.arange(-50, 150)
    valid = ints % 7 != 0
    kinds = {
        "int32": pa.array(ints.astype(np.int32), mask=~valid),
        "uint16": pa.array((ints + 50).astype(np.uint16), mask=~valid),
        "float32": pa.array(ints.astype(np.float32), mask=~valid),
        "float16": pa.array(ints.astype(np.float16), mask=~valid),
        "bool": pa.array(ints % 3 == 0, mask=~valid),
        "decimal": pa.array([None if not v else __import__("decimal").Decimal(int(i)) for i, v in zip(ints, valid)],
                            pa.decimal128(10, 0)),
        "dictionary": pa.array(ints.astype(np.float64), mask=~valid).dictionary_encode(),
    }
    for label, a in kinds.items():
        raw = {"int32": ints, "uint16": ints + 50, "float32": ints, "float16": ints, "bool": ints % 3 == 0,
               "decimal": ints, "dictionary": ints}[label].astype(np.float64)
        raw = np.where(valid, raw, np.nan)
        for off in (0, 5):  # bit offsets of sliced validity and boolean bitmaps
            got = cuts.bin(pa.table({"battery": a.slice(off)}), features=["battery"]).ravel()
            np.testing.assert_array_equal(got, oracle(raw[off:], e), err_msg=f"{label} offset {off}")
    allnull = pa.table({"battery": pa.nulls(9)})
    assert cuts.bin(allnull, features=["battery"]).ravel().tolist() == [e.size] * 9


def test_pandas_nullable_dtypes(fleet):
    pd = pytest.importorskip("pandas")
    cols, cuts = fleet
    e = cuts.edges("battery")
    vals = [1.0, None, 55.5, 100.0, -3.0]
    for dt in ("Float64", "Int64", "boolean"):
        s = pd.Series([None if v is None else (v > 50 if dt == "boolean" else (int(v) if dt == "Int64" else v))
                       for v in vals], dtype=dt)
        raw = np.array([np.nan if v is None else float(v > 50) if dt == "boolean" else float(int(v))
                        if dt == "Int64" else v for v in vals])
        got = cuts.bin(pd.DataFrame({"battery": s}), features=["battery"]).ravel()
        np.testing.assert_array_equal(got, oracle(raw, e), err_msg=dt)


# --------------------------------------------------------------------------- out=, threads, copies
def test_out_buffer_is_filled_in_place(fleet):
    cols, cuts = fleet
    names = ["payload", "battery"]
    n = cols["payload"].size
    big = np.full((n, 5), 77, np.uint8)
    view = big[:, 1:3]  # a non-contiguous view into a larger buffer
    got = cuts.bin(cols, features=names, out=view)
    assert got is view
    np.testing.assert_array_equal(big[:, 1:3], expected(cuts, cols, names))
    assert (big[:, [0, 3, 4]] == 77).all()
    wide = np.zeros((n, 2), np.uint16)  # wider codes are accepted
    np.testing.assert_array_equal(cuts.bin(cols, features=names, out=wide), expected(cuts, cols, names))
    with pytest.raises(InputError, match="out: expected"):
        cuts.bin(cols, features=names, out=np.zeros((n, 3), np.uint8))
    with pytest.raises(InputError, match="out: expected"):
        cuts.bin(cols, out=np.zeros((n, 5), np.uint8))  # rotor_rpm needs uint16
    ro = np.zeros((n, 2), np.uint8)
    ro.setflags(write=False)
    with pytest.raises(InputError, match="writable"):
        cuts.bin(cols, features=names, out=ro)


def test_threads_give_identical_codes():
    rng = np.random.default_rng(11)
    n = 600_000  # above the threading threshold with 5 columns
    cols = {k: rng.standard_normal(n) * (i + 1) for i, k in enumerate(FEATURES)}
    cuts = drone_table(cols)
    one = cuts.bin(cols, threads=1)
    np.testing.assert_array_equal(cuts.bin(cols, threads=3), one)
    np.testing.assert_array_equal(one, expected(cuts, cols, FEATURES))
    with pytest.raises(InputError, match="threads"):
        cuts.bin(cols, threads=0)


@pytest.mark.parametrize("kind", ["float32 dict", "float64 arrow with nulls", "float64 pandas"])
def test_no_converted_copy_of_the_input(kind):
    """Peak memory while binning stays far below one float64 copy of the column: inputs are
    read in place and converted, when at all, one cache-sized chunk at a time (tracemalloc
    counts numpy's allocations)."""
    pa = pytest.importorskip("pyarrow")
    pd = pytest.importorskip("pandas")
    n = 2_000_000
    rng = np.random.default_rng(5)
    x = rng.standard_normal(n)
    cuts = CutTable([feature_cuts("gusts", Summary.from_values(x[:50_000]), 255, 1 / 2040)])
    if kind == "float32 dict":
        data = {"gusts": x.astype(np.float32)}
    elif kind == "float64 arrow with nulls":
        data = pa.table({"gusts": pa.array(x, mask=rng.random(n) < 0.1)})
    else:
        data = pd.DataFrame({"gusts": x})
    out = np.empty((n, 1), np.uint8)
    cuts.bin(data, out=out, threads=1)  # warm the per-thread scratch buffers
    tracemalloc.start()
    try:
        cuts.bin(data, out=out, threads=1)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak < n * 8 // 8, f"peak {peak} bytes: a converted copy would be {n * 8}"


# --------------------------------------------------------------------------- errors
def test_errors_name_the_column(fleet):
    cols, cuts = fleet
    with pytest.raises(InputError, match=r"data lacks 2 of the requested columns: 'battery', 'payload'"):
        cuts.bin({"altitude": cols["altitude"]}, features=["battery", "altitude", "payload"])
    with pytest.raises(InputError, match=r"'nope', 'nada'"):
        cuts.bin(cols, features=["nope", "battery", "nada"])
    with pytest.raises(InputError, match="'battery'.*numeric"):
        cuts.bin({"battery": np.array(["a", "b"])}, features=["battery"])
    with pytest.raises(InputError, match="one length"):
        cuts.bin({"battery": np.zeros(3), "payload": np.zeros(4)}, features=["battery", "payload"])
    with pytest.raises(InputError, match="2-D array with 2 columns"):
        cuts.bin(np.zeros((4, 3)), features=["battery", "payload"])
    with pytest.raises(InputError, match="expected a 2-D numpy array"):
        cuts.bin([[1.0, 2.0]], features=["battery", "payload"])
    with pytest.raises(InputError, match="strictly increasing"):
        EdgeIndex([1.0, 1.0])
    with pytest.raises(InputError, match="expected one edge index per name"):
        bin_columns({"a": np.zeros(2)}, ["a"], [], np.uint8)


def test_empty_inputs(fleet):
    _, cuts = fleet
    assert cuts.bin(np.empty((0, 2)), features=["battery", "payload"]).shape == (0, 2)
    assert cuts.bin({"battery": np.empty(0)}, features=["battery"]).shape == (0, 1)
