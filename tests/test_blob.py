"""Summary blobs (sketchmerge.blob, docs/FORMAT.md): round trips, layouts and their
sizes, float32 and grid rounding in the safe direction, golden files of format
versions 1 and 2, an independent reader written from the document, and the errors
the decoder raises."""

from __future__ import annotations

import json
import math
import pathlib
import struct
import zlib

import msgpack
import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from sketchmerge import FormatError, Summary
from sketchmerge import blob as B

DATA = pathlib.Path(__file__).parent / "data"
EXPECTED = json.loads((DATA / "summary-v1-expected.json").read_text())
EXPECTED_V2 = json.loads((DATA / "summary-v2-expected.json").read_text())
GOLDEN = sorted(k for k in EXPECTED if k.startswith("summary-v1-")) + \
    sorted(k for k in EXPECTED_V2 if k.startswith("summary-v2-"))


@pytest.fixture(autouse=True, params=["kernels", "numpy"])
def codec_route(request, monkeypatch):
    """Every test here runs twice: with the compiled codec kernels (when built) and on the
    numpy route alone; both must read and write the same bytes."""
    import sketchmerge.summary as core

    if request.param == "numpy":
        monkeypatch.setattr(core, "_K", None)
    elif core._K is None:
        pytest.skip("compiled kernels not built")
    return request.param


def rng(seed):
    return np.random.default_rng(seed)


def payload_of(blob: bytes) -> dict:
    env = msgpack.unpackb(blob, raw=False)
    return msgpack.unpackb(env["payload"], raw=False)


def rewrap(payload: dict, kind=B.KIND_SUMMARY) -> bytes:
    return B.encode_envelope(kind, msgpack.packb(payload, use_bin_type=True))


# --------------------------------------------------------------------------- golden files
def from_hex(a):
    return np.array([float.fromhex(v) for v in a], dtype=np.float64)


def recorded(name):
    return (EXPECTED if name.startswith("summary-v1-") else EXPECTED_V2)[name]


@pytest.mark.parametrize("name", GOLDEN)
def test_golden_files_decode_to_recorded_values(name):
    blob = (DATA / name).read_bytes()
    e = recorded(name)
    version = 1 if name.startswith("summary-v1-") else 2
    assert msgpack.unpackb(blob, raw=False)["format"] == version
    s = Summary.from_bytes(blob)
    assert B.summary_to_payload(s, version)["layout"] == e["layout"]
    assert (s.dtype, s.count, s.missing_count, s.is_exact) == (e["dtype"], e["count"], e["missing_count"], e["exact"])
    assert s.missing_weight == float.fromhex(e["missing_weight"])
    assert s.total_weight == float.fromhex(e["total_weight"])
    assert s.bound == float.fromhex(e["bound"]) and s.epsilon == float.fromhex(e["epsilon"])
    for field, arr in (("values", s.values), ("rmin", s.rmin), ("rmax", s.rmax), ("weights", s.weights)):
        np.testing.assert_array_equal(arr, from_hex(e[field]), err_msg=field)
    assert s.epsilon <= s.bound
    # the encoding is canonical: the decoded summary encodes to the very same bytes in its version
    assert B.encode_summary(s, version) == blob


def test_golden_v1_exact_blobs_equal_a_fresh_encoding():
    import sys

    sys.path.insert(0, str(DATA))
    try:
        import make_golden_v1 as gen
    finally:
        sys.path.pop(0)
    temp, humid, vent, *_ = gen.inputs()
    assert B.encode_summary(Summary.from_values(temp), 1) == (DATA / "summary-v1-exact.bin").read_bytes()
    assert B.encode_summary(Summary.from_values(humid, vent), 1) == \
        (DATA / "summary-v1-exact-f4.bin").read_bytes()


def test_golden_v2_blobs_equal_a_fresh_encoding():
    import sys

    sys.path.insert(0, str(DATA))
    try:
        import make_golden_v2 as gen
    finally:
        sys.path.pop(0)
    # exact summaries only: they depend on the data alone, pruned ones also on the construction
    exact = [name for name, s in gen.summaries().items() if s.is_exact]
    assert {"packed-exact", "packed-exact-int-weights", "packed-single", "xw", "empty"} <= set(exact)
    for name, s in gen.summaries().items():
        if s.is_exact:
            assert s.to_bytes() == (DATA / f"summary-v2-{name}.bin").read_bytes(), name


@pytest.mark.parametrize("version", [1, 2])
def test_golden_summary_sets(version):
    name = f"summary-set-v{version}.bin"
    blob = (DATA / name).read_bytes()
    e = (EXPECTED if version == 1 else EXPECTED_V2)[name]
    sums, meta = B.decode_summary_set(blob)
    assert list(sums) == e["names"] and meta == e["meta"]
    for feature, member in zip(e["names"], e["members"]):
        assert sums[feature] == Summary.from_bytes((DATA / member).read_bytes())
    assert B.encode_summary_set(sums, meta, version) == blob


# --------------------------------------------------------------------------- the document's reader
# The reader of docs/FORMAT.md ("Reading a blob with any msgpack library"), copied from
# there: msgpack, zlib, struct and numpy only, Python integers for the packed layout.
def read_bits(b: bytes, m: int) -> list:
    """The m unsigned integers of a bit-packed stream."""
    nb = -(-m // 32)                          # one width byte per block of 32 values
    widths, data = b[:nb], b[nb:] + bytes(9)
    out, pos = [], 0
    for i in range(m):
        w = widths[i // 32]
        window = int.from_bytes(data[pos // 8:pos // 8 + 9], "little")
        out.append((window >> (pos % 8)) & ((1 << w) - 1))
        pos += w
    return out


def signed(z: int) -> int:                    # zigzag: 0, 1, 2, 3, 4 ... -> 0, -1, 1, -2, 2 ...
    return (z >> 1) ^ -(z & 1)


def integrate(start: int, shift: int, codes: list) -> list:
    """Undo the second-order prediction (all sums modulo 2**64)."""
    out, e, a = [start], 0, start
    for c in codes:
        e = (e + signed(c)) % 2**64
        a = (a + (e << shift)) % 2**64
        out.append(a)
    return out


def key_to_float(k: int) -> float:            # the order-preserving key back to a float64
    t = k ^ (1 << 63)
    bits = t if t < 1 << 63 else ((1 << 64) - t) | (1 << 63)
    return struct.unpack("<d", bits.to_bytes(8, "little"))[0]


def read_summary(blob: bytes) -> dict:
    env = msgpack.unpackb(blob, raw=False, strict_map_key=True, max_bin_len=len(blob))
    assert env["kind"] == "sketchmerge.summary" and env["format"] in (1, 2)
    assert zlib.crc32(env["payload"]) == env["crc32"]
    p = msgpack.unpackb(env["payload"], raw=False, strict_map_key=True)
    n = p["n"]
    f64 = lambda key, t: np.frombuffer(p[key], dtype=t).astype(np.float64)
    if p["layout"] == "packed":
        keys = integrate(p["x_start"], p["x_shift"], read_bits(p["x_bits"], n - 1))
        x = np.array([key_to_float(k) for k in keys])
        q = p["quantum"]
        w_q = read_bits(p["w_bits"], n)
        w = np.array(w_q, dtype=np.float64) * q
        if p["exact"]:
            rmax = np.cumsum(w)                          # sequential float64 sum
            rmin = np.concatenate(([0.0], rmax))[:-1]
        else:
            rmin_q = integrate(p["rmin_start"], p["rmin_shift"], read_bits(p["rmin_bits"], n - 1))
            u, u_q = 0, []
            for c in read_bits(p["u_bits"], n):            # first-order prediction
                u = (u + signed(c)) % 2**64
                u_q.append(u)
            rmin = np.array(rmin_q, dtype=np.float64) * q
            rmax = np.array([a + b + c for a, b, c in zip(rmin_q, w_q, u_q)], dtype=np.float64) * q
    elif p["layout"] == "xw":
        x, w = f64("x", p["x_type"]), f64("w", p["w_type"])
        rmax = np.cumsum(w)                              # sequential float64 sum
        rmin = np.concatenate(([0.0], rmax))[:-1]
    elif p["layout"] == "ranked":
        x, rmin, w = f64("x", p["x_type"]), f64("rmin", p["rank_type"]), f64("w", p["rank_type"])
        rmax = rmin + w
    else:  # "bounds"
        x = f64("x", p["x_type"])
        rmin, rmax, w = (f64(k, p["rank_type"]) for k in ("rmin", "rmax", "w"))
    return {"x": x, "rmin": rmin, "rmax": rmax, "w": w, "W": p["total_weight"],
            "bound": p["bound"], "count": p["count"], "missing_count": p["missing_count"]}


def test_the_reader_is_the_one_in_the_document():
    doc = (pathlib.Path(__file__).parent.parent / "docs" / "FORMAT.md").read_text()
    import inspect

    for f in (read_bits, signed, integrate, key_to_float, read_summary):
        assert inspect.getsource(f).strip() in doc, f.__name__


def assert_reader_agrees(blob: bytes, s: Summary):
    r = read_summary(blob)
    assert r["bound"] == s.bound and r["W"] == s.total_weight and r["count"] == s.count
    assert r["x"].size == len(s)
    np.testing.assert_array_equal(r["x"].view(np.int64), s.values.view(np.int64))
    for a, b in ((r["rmin"], s.rmin), (r["rmax"], s.rmax), (r["w"], s.weights)):
        np.testing.assert_array_equal(a, b)


@pytest.mark.parametrize("name", GOLDEN)
def test_format_doc_reader_agrees_with_decoder(name):
    blob = (DATA / name).read_bytes()
    assert_reader_agrees(blob, Summary.from_bytes(blob))


# --------------------------------------------------------------------------- layouts and sizes
def entry_bytes(s: Summary, version: int = 2) -> float:
    p = B.summary_to_payload(s, version)
    arrays = sum(len(p[k]) for k in ("x", "w", "rmin", "rmax", "x_bits", "rmin_bits", "w_bits", "u_bits")
                 if k in p)
    return arrays / len(s)


def test_version_1_layouts_and_bytes_per_entry():
    r = rng(1)
    x64 = r.normal(size=50_000)
    x32 = x64.astype(np.float32)
    wf = r.random(50_000)
    cases = [
        # (summary, layout, bytes of arrays per entry)
        (Summary.from_values(x64), "xw", 12),                 # f8 values + counts as f4
        (Summary.from_values(x64, wf), "xw", 16),             # f8 values + f8 weights
        (Summary.from_values(x32), "xw", 8),                  # f4 values + counts as f4
        (Summary.from_values(x64, capacity=1000), "ranked", 16),
        (Summary.from_values(x32, capacity=1000), "ranked", 12),
        (Summary.from_values(x64, wf, capacity=1000), "bounds", 20),   # ranks rounded to f4
        (Summary.from_values(x32, wf, capacity=1000), "bounds", 16),
        (Summary.from_values(x64, np.full(50_000, 1e36), capacity=1000), "bounds", 32),  # beyond f4
    ]
    for s, layout, per_entry in cases:
        assert B.summary_to_payload(s, 1)["layout"] == layout
        assert entry_bytes(s, 1) == per_entry
        blob = B.encode_summary(s, 1)
        # the envelope and header add a fixed ~250 bytes
        assert len(blob) <= per_entry * len(s) + 300
        t = Summary.from_bytes(blob)
        assert t.epsilon <= t.bound
        np.testing.assert_array_equal(t.values, s.values)


def test_version_2_layouts_and_bytes_per_entry():
    # upper bounds with a margin over the figures measured for docs/FORMAT.md; the
    # version-1 size of the same summary for comparison
    r = rng(1)
    x64 = r.normal(size=50_000)
    x32 = x64.astype(np.float32)
    wf = r.random(50_000)
    cases = [
        # (summary, layout, at most this many bytes of streams per entry, version-1 bytes)
        (Summary.from_values(x64), "packed", 7.5, 12),                         # exact, counts
        (Summary.from_values(x64, wf), "xw", 16, 16),                          # exact, float weights
        (Summary.from_values(x32), "packed", 4.0, 8),
        (Summary.from_values(x64, capacity=1000), "packed", 7.5, 16),          # grid 1: lossless
        (Summary.from_values(x32, capacity=1000), "packed", 4.5, 12),
        (Summary.from_values(x64, wf, capacity=1000), "packed", 9.5, 20),      # grid 2**-23 W
        (Summary.from_values(x32, wf, capacity=1000), "packed", 6.0, 16),
        (Summary.from_values(x64, np.full(50_000, 1e36), capacity=1000), "packed", 8.0, 32),
    ]
    for s, layout, most, v1 in cases:
        assert B.summary_to_payload(s)["layout"] == layout
        assert entry_bytes(s) <= most and entry_bytes(s, 1) == v1
        blob = s.to_bytes()
        assert len(blob) <= most * len(s) + 400
        t = Summary.from_bytes(blob)
        assert t.epsilon <= t.bound
        np.testing.assert_array_equal(t.values.view(np.int64), s.values.view(np.int64))


def test_packed_is_over_twice_smaller_than_bounds_on_a_weighted_leaf():
    # a weighted 250k-row direct summary with 2049 entries: 20 B per entry in version 1's
    # `bounds`; `packed` measured 8.3-8.5 (docs/FORMAT.md); the assertion keeps a margin
    r = rng(7)
    s = Summary.from_values(r.normal(size=250_000), r.lognormal(0.0, 0.75, 250_000), capacity=2048)
    assert len(s) == 2049
    v1, v2 = B.encode_summary(s, 1), B.encode_summary(s)
    assert B.summary_to_payload(s, 1)["layout"] == "bounds" and len(v1) / len(s) > 20.0
    assert B.summary_to_payload(s)["layout"] == "packed"
    assert len(v2) / len(s) < 9.5 and 2 * len(v2) < len(v1)


# --------------------------------------------------------------------------- round trips
@pytest.mark.parametrize("make", [
    lambda r: Summary.from_values(r.normal(size=3000)),
    lambda r: Summary.from_values(r.normal(size=3000), r.random(3000)),
    lambda r: Summary.from_values(r.integers(0, 9, 3000), capacity=4),
    lambda r: Summary.from_values(r.normal(size=3000), capacity=100),
    lambda r: Summary.from_values(r.normal(size=3000), r.integers(0, 5, 3000), capacity=100)
    .merge(Summary.from_values(r.normal(size=300), capacity=10)).prune(64),
    lambda r: Summary.from_values(np.array([-np.inf, 1.0, np.inf, np.nan]), [1.0, 2.0, 3.0, 4.0]),
    lambda r: Summary.from_values(np.array([-np.inf, -0.0, 5e-324, np.inf, np.nan])),
    lambda r: Summary.from_values(np.array([1.5, 2.5]), capacity=1),
    lambda r: Summary.empty("int32"),
])
@pytest.mark.parametrize("version", [1, 2])
def test_lossless_round_trip_is_exact(make, version):
    s = make(rng(2))
    t = Summary.from_bytes(B.encode_summary(s, version))
    assert t == s
    for a in (t.values, t.rmin, t.rmax, t.weights):
        assert a.dtype == np.float64 and not a.flags.writeable


def grid_of(s: Summary) -> float:
    """The rank grid docs/FORMAT.md specifies for a packed summary, computed here from the
    binary exponent of W (frexp: W = m * 2**e, 0.5 <= m < 1, so floor(log2 W) = e - 1)."""
    fields = (s.rmin, s.rmax, s.weights)
    if s.total_weight < 2.0**53 and all(np.array_equal(np.round(a), a) for a in fields):
        return 1.0
    return 2.0 ** (math.frexp(s.total_weight)[1] - 1 - 23)


def check_round_trip(s: Summary):
    """Decode the version-2 blob of s and check it against s: values bit for bit, rank fields
    equal on the grid of 1 and else rounded outward by less than one grid step."""
    blob = s.to_bytes()
    t = Summary.from_bytes(blob)
    p = B.summary_to_payload(s)
    np.testing.assert_array_equal(t.values.view(np.int64), s.values.view(np.int64))
    assert (t.count, t.missing_count, t.total_weight, t.missing_weight, t.dtype, t.is_exact) == \
        (s.count, s.missing_count, s.total_weight, s.missing_weight, s.dtype, s.is_exact)
    assert t.epsilon <= t.bound
    if p["layout"] != "packed":
        assert t == s   # xw, or a fallback: lossless or float32 ranks, tested elsewhere
        return t
    q = grid_of(s)
    assert p["quantum"] == q and q <= 2.0**-23 * s.total_weight or q == 1.0
    if q == 1.0:
        assert t == s
        return t
    assert np.all(t.rmin <= s.rmin) and np.all(s.rmin - t.rmin < q)
    assert np.all(t.weights <= s.weights) and np.all(s.weights - t.weights < q)
    assert np.all(t.rmax >= s.rmax) and np.all(t.rmax - s.rmax < q)
    for a in (t.rmin, t.rmax, t.weights):
        assert np.array_equal(np.floor(a / q), a / q)   # on the grid
    moved = not (np.array_equal(t.rmin, s.rmin) and np.array_equal(t.rmax, s.rmax)
                 and np.array_equal(t.weights, s.weights))
    assert t.bound == s.bound + (B.F4_ROUNDING_SLACK if moved else 0.0)
    assert t.epsilon - s.epsilon < B.F4_ROUNDING_SLACK
    # a second trip changes nothing: the fields are on the grid already
    assert t.to_bytes() == blob and Summary.from_bytes(blob) == t
    return t


VALUES = {
    "normal": lambda r, n: r.normal(size=n),
    "crossing zero": lambda r, n: r.normal(0.0, 1e-3, n),
    "lognormal": lambda r, n: r.lognormal(0.0, 2.0, n),
    "float32": lambda r, n: r.normal(10.0, 3.0, n).astype(np.float32),
    "integers": lambda r, n: r.integers(-40, 40, n),
    "subnormal": lambda r, n: r.normal(size=n) * 1e-310,
    "infinities": lambda r, n: np.where(r.random(n) < 0.05, np.inf * np.sign(r.normal(size=n)),
                                        r.normal(size=n)),
    "extremes": lambda r, n: r.choice([-1.7e308, -1.0, -5e-324, 0.0, 5e-324, 2.0**-1022, 1.0, 1.7e308,
                                       np.inf, -np.inf], n),
    "missing": lambda r, n: np.where(r.random(n) < 0.2, np.nan, r.gamma(2.0, 1.5, n)),
}
WEIGHTS = {
    "none": lambda r, n: None,
    "integers": lambda r, n: r.integers(0, 7, n),
    "lognormal": lambda r, n: r.lognormal(0.0, 0.75, n),
    "gamma": lambda r, n: r.gamma(0.5, 1.0, n),
    "huge": lambda r, n: r.random(n) * 1e300,
    "tiny": lambda r, n: r.random(n) * 1e-300,
}


@st.composite
def summaries(draw):
    r = rng(draw(st.integers(0, 2**32 - 1)))
    n = draw(st.sampled_from([1, 2, 3, 40, 700, 5000]))
    x = VALUES[draw(st.sampled_from(sorted(VALUES)))](r, n)
    w = WEIGHTS[draw(st.sampled_from(sorted(WEIGHTS)))](r, n)
    build = draw(st.sampled_from(["exact", "direct", "merged", "merged from blobs"]))
    cap = draw(st.sampled_from([1, 2, 9, 64, 300]))
    if build == "exact":
        return Summary.from_values(x, w)
    if build == "direct":
        return Summary.from_values(x, w, capacity=cap)
    cut = sorted(r.integers(0, n + 1, 2))
    parts = [Summary.from_values(x[a:b], None if w is None else w[a:b], capacity=cap)
             for a, b in ((0, cut[0]), (cut[0], cut[1]), (cut[1], n))]
    if build == "merged from blobs":   # what a merge node sees: its children decoded
        parts = [Summary.from_bytes(p.to_bytes()) for p in parts]
    m = parts[0].merge(*parts[1:])
    return m.prune(2 * cap) if draw(st.booleans()) else m


@given(summaries())
def test_packed_round_trips(s):
    check_round_trip(s)


def test_packed_round_trips_of_each_kind():
    # every value and weight family at least once, the document's reader included
    r = rng(11)
    for vname, values in VALUES.items():
        for wname, weights in WEIGHTS.items():
            x, w = values(r, 3000), weights(r, 3000)
            for s in (Summary.from_values(x, w), Summary.from_values(x, w, capacity=50),
                      Summary.from_values(x[:1], None if w is None else w[:1]),
                      Summary.from_values(x[:2000], None if w is None else w[:2000], capacity=20).merge(
                          Summary.from_values(x[2000:], None if w is None else w[2000:], capacity=30)).prune(40)):
                t = check_round_trip(s)
                assert_reader_agrees(s.to_bytes(), t)


def test_grid_rounding_goes_the_safe_way():
    r = rng(3)
    parts = [Summary.from_values(r.normal(size=4000), r.gamma(0.5, 1.0, 4000), capacity=64) for _ in range(4)]
    s = parts[0].merge(*parts[1:])
    p = B.summary_to_payload(s)
    assert p["layout"] == "packed" and p["quantum"] == 2.0 ** (math.floor(math.log2(s.total_weight)) - 23)
    t = check_round_trip(s)
    assert t.bound == s.bound + B.F4_ROUNDING_SLACK
    # merging decoded children, pruning (+1/64) and encoding again rounds once more, by one slack
    u = Summary.from_bytes(t.merge(t).prune(64).to_bytes())
    assert u.epsilon <= u.bound <= t.bound + 1 / 64 + B.F4_ROUNDING_SLACK


def test_float32_rounding_goes_the_safe_way():
    r = rng(3)
    parts = [Summary.from_values(r.normal(size=4000), r.gamma(0.5, 1.0, 4000), capacity=64) for _ in range(4)]
    s = parts[0].merge(*parts[1:])
    p = B.summary_to_payload(s, 1)
    assert p["layout"] == "bounds" and p["rank_type"] == "<f4"
    t = Summary.from_bytes(B.encode_summary(s, 1))
    # rmin and w rounded down, rmax up: every decoded bound still holds
    assert np.all(t.rmin <= s.rmin) and np.all(t.weights <= s.weights) and np.all(t.rmax >= s.rmax)
    # each field moved by less than one float32 ulp of W
    ulp = 2.0**-23 * s.total_weight
    assert np.all(s.rmin - t.rmin < ulp) and np.all(t.rmax - s.rmax < ulp) and np.all(s.weights - t.weights < ulp)
    assert t.bound == s.bound + B.F4_ROUNDING_SLACK
    assert t.epsilon <= t.bound and t.epsilon - s.epsilon < B.F4_ROUNDING_SLACK
    # a second trip changes nothing: the values are float32 already
    assert Summary.from_bytes(B.encode_summary(t, 1)) == t
    # and a summary decoded from a packed blob is float32-exact too (a cut table embeds it so)
    v = Summary.from_bytes(s.to_bytes())
    assert Summary.from_bytes(B.encode_summary(v, 1)) == v


def test_tiny_total_weight_keeps_float64_ranks():
    # below float32's normal range ulps are absolute, not relative: keep f8 there (version 1);
    # the packed grid is relative to W down to float64's normal range, subnormal W uses bounds
    s = Summary.from_values(rng(4).normal(size=2000), np.full(2000, 1e-40), capacity=10)
    s = s.merge(Summary.from_values(np.array([0.5]), [1e-40]))
    assert B.summary_to_payload(s, 1)["rank_type"] == "<f8"
    assert Summary.from_bytes(B.encode_summary(s, 1)) == s
    assert B.summary_to_payload(s)["layout"] == "packed"
    check_round_trip(s)
    sub = Summary.from_values(rng(4).normal(size=2000), np.full(2000, 1e-312), capacity=10)
    assert sub.total_weight < np.finfo(np.float64).tiny
    p = B.summary_to_payload(sub)
    assert p["layout"] == "bounds" and p["rank_type"] == "<f8"
    assert Summary.from_bytes(sub.to_bytes()) == sub


def test_summary_set_round_trip_and_errors():
    r = rng(5)
    sums = {"b": Summary.from_values(r.normal(size=100)), "a": Summary.from_values(r.normal(size=100), capacity=8),
            "": Summary.empty()}
    blob = B.encode_summary_set(sums, {"unit": "u1", "rows": 100, "frac": 0.5, "ok": True, "none": None})
    got, meta = B.decode_summary_set(blob)
    assert list(got) == ["b", "a", ""] and all(got[k] == sums[k] for k in sums)
    assert meta == {"unit": "u1", "rows": 100, "frac": 0.5, "ok": True, "none": None}
    with pytest.raises(TypeError):
        B.encode_summary_set(sums, {"nested": [1]})
    with pytest.raises(TypeError):
        B.encode_summary_set({"a": "not a summary"})
    with pytest.raises(FormatError, match="kind"):
        Summary.from_bytes(blob)
    with pytest.raises(FormatError, match="kind"):
        B.decode_summary_set(sums["b"].to_bytes())
    env = msgpack.unpackb(blob, raw=False)
    body = msgpack.unpackb(env["payload"], raw=False)
    for mutate, match in [
        (lambda d: d.update(names=["b", "b", ""]), "distinct"),
        (lambda d: d.update(names=["b", "a"]), "equal-length"),
        (lambda d: d.update(names=[1, "a", ""]), "string"),
        (lambda d: d.update(meta={"x": [1]}), "flat map"),
        (lambda d: d.update(meta=[]), "flat map"),
        (lambda d: d.pop("meta"), "keys names, summaries, meta"),
        (lambda d: d.update(extra=1), "keys names, summaries, meta"),
        (lambda d: d["summaries"][1].update(n=-1), "feature 'a'"),
    ]:
        d = msgpack.unpackb(env["payload"], raw=False)
        mutate(d)
        with pytest.raises(FormatError, match=match):
            B.decode_summary_set(B.encode_envelope(B.KIND_SUMMARY_SET, msgpack.packb(d, use_bin_type=True)))
    assert body["names"] == ["b", "a", ""]


# --------------------------------------------------------------------------- envelope errors
GOOD = Summary.from_values(np.arange(20.0), capacity=5).to_bytes()


def env_with(**changes) -> bytes:
    env = msgpack.unpackb(GOOD, raw=False)
    for k, v in changes.items():
        if v is KeyError:
            env.pop(k)
        else:
            env[k] = v
    return msgpack.packb(env, use_bin_type=True)


@pytest.mark.parametrize("blob, match", [
    ("a string", "expected bytes, got str"),
    (b"", "msgpack"),
    (GOOD[:-1], "msgpack"),
    (GOOD + b"\x00", "msgpack"),
    (msgpack.packb([1, 2]), "map envelope"),
    (env_with(kind="sketchmerge.cut-table"), "expected kind 'sketchmerge.summary'"),
    (env_with(kind=KeyError), "expected kind"),
    (env_with(format=3), "expected format version 1 or 2, got 3 .*newer"),
    (env_with(format=0), "older"),
    (env_with(format=-1), "older"),
    (env_with(format=True), "integer format version"),
    (env_with(format="1"), "integer format version"),
    (env_with(crc32=0), "checksum mismatch"),
    (env_with(crc32="x"), "integer crc32"),
    (env_with(payload="text"), "binary payload"),
    (env_with(payload=KeyError), "binary payload"),
    (env_with(extra=1), "envelope keys"),
    (msgpack.packb({1: 2}), "msgpack"),                     # strict map keys
    (msgpack.packb(msgpack.ExtType(5, b"xy")), "msgpack"),  # no extension types
    (b"\xdd\xff\xff\xff\xff", "msgpack"),                   # array32 claiming 4 billion items
    (b"\xc6\x7f\xff\xff\xff", "msgpack"),                   # bin32 claiming 2 GiB
])
def test_envelope_errors(blob, match):
    with pytest.raises(FormatError, match=match) as e:
        Summary.from_bytes(blob)
    assert isinstance(e.value, ValueError)


def test_envelope_size_limit(monkeypatch):
    monkeypatch.setattr(B, "_MAX_BLOB", 100)
    with pytest.raises(FormatError, match="at most 100 bytes"):
        Summary.from_bytes(GOOD)


def test_crc_is_zlib_crc32_of_payload():
    env = msgpack.unpackb(GOOD, raw=False)
    assert env["crc32"] == zlib.crc32(env["payload"])
    # CRC-32 check value of the ASCII digits "123456789" is 0xCBF43926 (common practice)
    assert zlib.crc32(b"123456789") == 0xCBF43926


# --------------------------------------------------------------------------- payload errors
def good_payload(which="ranked") -> dict:
    r = rng(6)
    x = r.normal(size=2000)
    s = {"xw": Summary.from_values(r.integers(0, 9, 200)),
         "ranked": Summary.from_values(x, capacity=16),
         "bounds": Summary.from_values(x, capacity=16).merge(Summary.from_values(x[:100], capacity=4)),
         # version 2: counts (grid 1), float weights (a finer grid), exact with counts
         "packed": Summary.from_values(x, capacity=16),
         "packed-w": Summary.from_values(x, r.gamma(0.5, 1.0, 2000), capacity=16).merge(
             Summary.from_values(x[:100], capacity=4)),
         "packed-exact": Summary.from_values(r.integers(0, 9, 200))}[which]
    p = payload_of(B.encode_summary(s, 2 if which.startswith("packed") else 1))
    assert p["layout"] == which.split("-")[0]
    return p


def bits(values) -> bytes:
    return B._pack_bits(np.asarray(values, dtype=np.uint64))


def dirty_padding(p):
    # one bit per value (n = 17): the last byte has 7 padding bits, one of them set
    b = bytearray(bits(np.ones(p["n"])))
    assert p["n"] % 8
    b[-1] |= 0x80
    p["u_bits"] = bytes(b)


def set_(key, value):
    def f(p):
        p[key] = value
    return f


def drop(key):
    return lambda p: p.pop(key)


def f8(a):
    return np.asarray(a, dtype="<f8").tobytes()


PAYLOAD_CASES = [
    ("ranked", drop("count"), "expected field 'count'"),
    ("ranked", set_("count", 1.5), "'count' of type int"),
    ("ranked", set_("count", True), "'count' of type int"),
    ("ranked", set_("exact", 1), "'exact' of type bool"),
    ("ranked", set_("x", "text"), "'x' of type bytes"),
    ("ranked", set_("layout", "dense"), "layout 'xw', 'ranked', 'bounds' or 'packed'"),
    ("ranked", set_("surprise", 1), "unexpected fields"),
    ("ranked", set_("dtype", "object"), "numeric dtype name"),
    ("ranked", set_("dtype", "float64; rm -rf"), "numeric dtype name"),
    ("ranked", set_("n", -1), "0 <= n <= count"),
    ("ranked", set_("n", 10**12), "0 <= n <= count"),
    ("ranked", set_("missing_count", -3), "missing_count >= 0"),
    ("ranked", set_("total_weight", float("nan")), "finite total_weight"),
    ("ranked", set_("bound", -0.1), "finite bound"),
    ("ranked", set_("missing_weight", float("inf")), "finite missing_weight"),
    ("ranked", set_("x_type", "<i8"), "x_type '<f8' or '<f4'"),
    ("ranked", set_("x", b"\x00" * 7), "bytes for 'x'"),
    ("ranked", lambda p: p.update(x=p["x"][::-1]), "strictly increasing"),
    ("ranked", lambda p: p.update(x=f8([np.nan] * p["n"]), x_type="<f8"), "strictly increasing"),
    ("ranked", set_("exact", True), "exact=false"),
    ("ranked", set_("rank_type", "<f8"), "bytes for 'rmin'|rank_type '<f4'"),
    ("ranked", lambda p: p.update(w=np.full(p["n"], -1, "<f4").tobytes()), "rank bounds"),
    ("ranked", lambda p: p.update(total_weight=10.0), "within the total weight"),
    ("ranked", set_("bound", 0.0), "certified epsilon within the stored bound"),
    ("xw", set_("exact", False), "exact=true and bound 0"),
    ("xw", set_("bound", 0.5), "exact=true and bound 0"),
    ("xw", lambda p: p.update(total_weight=p["total_weight"] + 1), "total_weight"),
    ("xw", lambda p: p.update(w=np.full(p["n"], np.inf, "<f4").tobytes()), "finite weights"),
    ("xw", drop("w_type"), "expected field 'w_type'"),
    ("xw", lambda p: p.update(n=0, x=b"", w=b""), "entries exactly when count > 0"),
    ("xw", lambda p: p.update(count=0), "0 <= n <= count"),
    ("bounds", drop("rmax"), "expected field 'rmax'"),
    ("bounds", lambda p: p.update(rmin=p["rmax"], rmax=p["rmin"]), "rmin <= rmax|stored bound"),
    ("bounds", lambda p: p.update(rank_type="<f2"), "rank_type '<f8' or '<f4'"),
    # layout packed
    ("packed", drop("u_bits"), "expected field 'u_bits'"),
    ("packed", set_("x_type", "<f8"), "unexpected fields"),
    ("packed", set_("quantum", "1"), "'quantum' of type float"),
    ("packed", set_("x_start", 1.5), "'x_start' of type int"),
    ("packed", set_("x_shift", True), "'x_shift' of type int"),
    ("packed", set_("x_bits", [1]), "'x_bits' of type bytes"),
    ("packed", set_("quantum", 0.5), r"expected quantum 1 or 0\.0001220703125 \(2\*\*\(floor\(log2 total_weight\) - 23\)\), got 0\.5"),
    ("packed", set_("quantum", float("nan")), "expected quantum"),
    ("packed-w", lambda p: p.update(quantum=p["quantum"] * 2), "expected quantum"),
    ("packed-w", set_("quantum", 1.0), "within the total weight"),   # q = 1 is allowed below 2**53
    ("packed", set_("x_start", -1), r"'x_start' in \[0, 18446744073709551615\]"),
    ("packed", set_("rmin_start", 2**62 + 1), "'rmin_start' in"),
    ("packed", set_("x_shift", 64), r"'x_shift' in \[0, 63\]"),
    ("packed", set_("rmin_shift", -1), "'rmin_shift' in"),
    ("packed", lambda p: p.update(x_bits=p["x_bits"][:-1]), "bytes for 'x_bits'"),
    ("packed", lambda p: p.update(x_bits=p["x_bits"] + b"\x00"), "bytes for 'x_bits'"),
    ("packed", set_("w_bits", b""), "1 width bytes at the start of 'w_bits'"),
    ("packed", lambda p: p.update(w_bits=b"\x41" + p["w_bits"][1:]), "block widths 0 to 64 in 'w_bits', got 65"),
    ("packed", dirty_padding, "zero padding bits at the end of 'u_bits'"),
    ("packed", lambda p: p.update(x_bits=bits(np.zeros(p["n"] - 1))), "strictly increasing"),
    ("packed", lambda p: p.update(x_start=2**64 - 5), "strictly increasing"),      # keys wrap around
    ("packed", lambda p: p.update(w_bits=bits(np.full(p["n"], 2**62 + 1))), r"quantized w values at most 2\*\*62"),
    # u_bits hold zigzag codes of first differences: code 2k is +k, 2k - 1 is -k
    ("packed", lambda p: p.update(u_bits=bits([2**63 + 2] + [0] * (p["n"] - 1))), r"quantized u values at most"),
    ("packed", lambda p: p.update(u_bits=bits([2000] + [0] * (p["n"] - 1))), "within the total weight"),
    ("packed", lambda p: p.update(u_bits=bits([600, 599] + [0] * (p["n"] - 2))), "certified epsilon within"),
    ("packed", set_("bound", 0.0), "certified epsilon within the stored bound"),
    ("packed", set_("exact", True), "unexpected fields"),
    ("packed", lambda p: p.update(n=0, count=0, total_weight=0.0), "n >= 1 for layout 'packed'"),
    ("packed-exact", set_("u_bits", b""), "unexpected fields"),
    ("packed-exact", set_("quantum", 0.5), "expected quantum 1, bound 0"),
    ("packed-exact", set_("bound", 0.1), "expected quantum 1, bound 0"),
    ("packed-exact", lambda p: p.update(total_weight=2.0**53), "total_weight below 2\\*\\*53"),
    ("packed-exact", lambda p: p.update(total_weight=p["total_weight"] + 1), "total_weight"),
    ("packed-exact", lambda p: p.update(w_bits=bits(np.full(p["n"], 2**53))), r"integer weights below 2\*\*53"),
    ("packed-exact", set_("exact", False), "expected field 'rmin_start'"),
]


@pytest.mark.parametrize("which, mutate, match", PAYLOAD_CASES)
def test_payload_errors(which, mutate, match):
    p = good_payload(which)
    Summary.from_bytes(rewrap(p))  # the unmutated payload is fine
    mutate(p)
    with pytest.raises(FormatError, match=match):
        Summary.from_bytes(rewrap(p))


def test_version_1_blobs_never_hold_packed():
    p = good_payload("packed")
    Summary.from_bytes(B.encode_envelope(B.KIND_SUMMARY, msgpack.packb(p, use_bin_type=True), 2))
    v1 = B.encode_envelope(B.KIND_SUMMARY, msgpack.packb(p, use_bin_type=True), 1)
    with pytest.raises(FormatError, match=r"layout 'xw', 'ranked' or 'bounds' \(format version 1\), got 'packed'"):
        Summary.from_bytes(v1)
    body = {"names": ["a"], "summaries": [p], "meta": {}}
    with pytest.raises(FormatError, match="format version 1"):
        B.decode_summary_set(B.encode_envelope(B.KIND_SUMMARY_SET, msgpack.packb(body, use_bin_type=True), 1))
    with pytest.raises(ValueError, match="format version 1 or 2"):
        B.encode_summary(Summary.empty(), 3)


def test_cut_tables_embed_version_1_payloads():
    # tables stay at format 1 and embed version-1 layouts, so readers predating packed
    # blobs keep loading them (docs/FORMAT.md, "Cut table")
    from sketchmerge.cuts import decode_table, encode_table, feature_cuts

    r = rng(9)
    leaf = Summary.from_values(r.normal(size=20_000), r.lognormal(0.0, 0.75, 20_000), capacity=256)
    root = Summary.from_bytes(leaf.to_bytes())          # what the build decodes from the root blob
    f = feature_cuts("level", root, 16, 1 / 64)
    table = encode_table([f], version=1, content_extra={"source": "x"}, record={"created": "t"})
    env = msgpack.unpackb(table, raw=False)
    assert env["format"] == 1
    content = msgpack.unpackb(msgpack.unpackb(env["payload"], raw=False)["content"], raw=False)
    assert content["features"][0]["summary"]["layout"] == "bounds"
    got = decode_table(table).feature("level").summary
    assert got == root   # the grid is float32-exact: the table adds no rounding
    # a table whose summary is packed is not version 1
    content["features"][0]["summary"] = B.summary_to_payload(root)
    assert content["features"][0]["summary"]["layout"] == "packed"
    with pytest.raises(FormatError, match="format version 1"):
        B.summary_from_payload(content["features"][0]["summary"], "table feature", 1)


def test_payload_that_is_not_a_map():
    with pytest.raises(FormatError, match="expected a map"):
        Summary.from_bytes(B.encode_envelope(B.KIND_SUMMARY, msgpack.packb([1, 2, 3])))
    with pytest.raises(FormatError, match="msgpack"):
        Summary.from_bytes(B.encode_envelope(B.KIND_SUMMARY, b"\xc1"))
