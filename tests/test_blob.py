"""Summary blobs (sketchmerge.blob, docs/FORMAT.md): round trips, layouts and their
sizes, float32 rounding in the safe direction, golden files of format version 1,
an independent reader, and the errors the decoder raises."""

from __future__ import annotations

import json
import pathlib
import zlib

import msgpack
import numpy as np
import pytest

from sketchmerge import FormatError, Summary
from sketchmerge import blob as B

DATA = pathlib.Path(__file__).parent / "data"
EXPECTED = json.loads((DATA / "summary-v1-expected.json").read_text())


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


@pytest.mark.parametrize("name", sorted(k for k in EXPECTED if k.startswith("summary-v1-")))
def test_golden_v1_decodes_to_recorded_values(name):
    blob = (DATA / name).read_bytes()
    e = EXPECTED[name]
    s = Summary.from_bytes(blob)
    assert B.summary_to_payload(s)["layout"] == e["layout"]
    assert (s.dtype, s.count, s.missing_count, s.is_exact) == (e["dtype"], e["count"], e["missing_count"], e["exact"])
    assert s.missing_weight == float.fromhex(e["missing_weight"])
    assert s.total_weight == float.fromhex(e["total_weight"])
    assert s.bound == float.fromhex(e["bound"]) and s.epsilon == float.fromhex(e["epsilon"])
    for field, arr in (("values", s.values), ("rmin", s.rmin), ("rmax", s.rmax), ("weights", s.weights)):
        np.testing.assert_array_equal(arr, from_hex(e[field]), err_msg=field)
    assert s.epsilon <= s.bound
    # the encoding is canonical: the decoded summary encodes to the very same bytes
    assert s.to_bytes() == blob


def test_golden_v1_exact_blobs_equal_a_fresh_encoding():
    import sys

    sys.path.insert(0, str(DATA))
    try:
        import make_golden_v1 as gen
    finally:
        sys.path.pop(0)
    temp, humid, vent, *_ = gen.inputs()
    assert Summary.from_values(temp).to_bytes() == (DATA / "summary-v1-exact.bin").read_bytes()
    assert Summary.from_values(humid, vent).to_bytes() == (DATA / "summary-v1-exact-f4.bin").read_bytes()


def test_golden_v1_summary_set():
    blob = (DATA / "summary-set-v1.bin").read_bytes()
    e = EXPECTED["summary-set-v1.bin"]
    sums, meta = B.decode_summary_set(blob)
    assert list(sums) == e["names"] and meta == e["meta"]
    for name, member in zip(e["names"], e["members"]):
        assert sums[name] == Summary.from_bytes((DATA / member).read_bytes())
    assert B.encode_summary_set(sums, meta) == blob


def independent_read(blob: bytes) -> dict:
    """A reader following docs/FORMAT.md with msgpack, zlib and numpy only."""
    env = msgpack.unpackb(blob, raw=False, strict_map_key=True, max_bin_len=len(blob))
    assert env["format"] == 1 and env["kind"] == "sketchmerge.summary"
    assert zlib.crc32(env["payload"]) == env["crc32"]
    p = msgpack.unpackb(env["payload"], raw=False, strict_map_key=True)
    x = np.frombuffer(p["x"], dtype=p["x_type"]).astype(np.float64)
    if p["layout"] == "xw":
        w = np.frombuffer(p["w"], dtype=p["w_type"]).astype(np.float64)
        rmax = np.cumsum(w)
        rmin = np.concatenate(([0.0], rmax))[:-1]
    elif p["layout"] == "ranked":
        rmin = np.frombuffer(p["rmin"], dtype=p["rank_type"]).astype(np.float64)
        w = np.frombuffer(p["w"], dtype=p["rank_type"]).astype(np.float64)
        rmax = rmin + w
    else:
        rmin, rmax, w = (np.frombuffer(p[k], dtype=p["rank_type"]).astype(np.float64)
                         for k in ("rmin", "rmax", "w"))
    return {"x": x, "rmin": rmin, "rmax": rmax, "w": w, "n": p["n"], "bound": p["bound"]}


@pytest.mark.parametrize("name", sorted(k for k in EXPECTED if k.startswith("summary-v1-")))
def test_format_doc_reader_agrees_with_decoder(name):
    blob = (DATA / name).read_bytes()
    r = independent_read(blob)
    s = Summary.from_bytes(blob)
    assert r["n"] == len(s) and r["bound"] == s.bound
    for a, b in ((r["x"], s.values), (r["rmin"], s.rmin), (r["rmax"], s.rmax), (r["w"], s.weights)):
        np.testing.assert_array_equal(a, b)


# --------------------------------------------------------------------------- round trips and layouts
def entry_bytes(s: Summary) -> float:
    p = B.summary_to_payload(s)
    arrays = sum(len(p[k]) for k in ("x", "w", "rmin", "rmax") if k in p)
    return arrays / len(s)


def test_layouts_and_bytes_per_entry():
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
        assert B.summary_to_payload(s)["layout"] == layout
        assert entry_bytes(s) == per_entry
        blob = s.to_bytes()
        # the envelope and header add a fixed ~250 bytes
        assert len(blob) <= per_entry * len(s) + 300
        t = Summary.from_bytes(blob)
        assert t.epsilon <= t.bound
        np.testing.assert_array_equal(t.values, s.values)


@pytest.mark.parametrize("make", [
    lambda r: Summary.from_values(r.normal(size=3000)),
    lambda r: Summary.from_values(r.normal(size=3000), r.random(3000)),
    lambda r: Summary.from_values(r.integers(0, 9, 3000), capacity=4),
    lambda r: Summary.from_values(r.normal(size=3000), capacity=100),
    lambda r: Summary.from_values(r.normal(size=3000), r.integers(0, 5, 3000), capacity=100)
    .merge(Summary.from_values(r.normal(size=300), capacity=10)).prune(64),
    lambda r: Summary.from_values(np.array([-np.inf, 1.0, np.inf, np.nan]), [1.0, 2.0, 3.0, 4.0]),
    lambda r: Summary.from_values(np.array([1.5, 2.5]), capacity=1),
    lambda r: Summary.empty("int32"),
])
def test_lossless_round_trip_is_exact(make):
    s = make(rng(2))
    t = Summary.from_bytes(s.to_bytes())
    assert t == s
    for a in (t.values, t.rmin, t.rmax, t.weights):
        assert a.dtype == np.float64 and not a.flags.writeable


def test_float32_rounding_goes_the_safe_way():
    r = rng(3)
    parts = [Summary.from_values(r.normal(size=4000), r.gamma(0.5, 1.0, 4000), capacity=64) for _ in range(4)]
    s = parts[0].merge(*parts[1:])
    p = B.summary_to_payload(s)
    assert p["layout"] == "bounds" and p["rank_type"] == "<f4"
    t = Summary.from_bytes(s.to_bytes())
    # rmin and w rounded down, rmax up: every decoded bound still holds
    assert np.all(t.rmin <= s.rmin) and np.all(t.weights <= s.weights) and np.all(t.rmax >= s.rmax)
    # each field moved by less than one float32 ulp of W
    ulp = 2.0**-23 * s.total_weight
    assert np.all(s.rmin - t.rmin < ulp) and np.all(t.rmax - s.rmax < ulp) and np.all(s.weights - t.weights < ulp)
    assert t.bound == s.bound + B.F4_ROUNDING_SLACK
    assert t.epsilon <= t.bound and t.epsilon - s.epsilon < B.F4_ROUNDING_SLACK
    # a second trip changes nothing: the values are float32 already
    assert Summary.from_bytes(t.to_bytes()) == t


def test_tiny_total_weight_keeps_float64_ranks():
    # below float32's normal range ulps are absolute, not relative: keep f8 there
    s = Summary.from_values(rng(4).normal(size=2000), np.full(2000, 1e-40), capacity=10)
    s = s.merge(Summary.from_values(np.array([0.5]), [1e-40]))
    p = B.summary_to_payload(s)
    assert p["rank_type"] == "<f8"
    assert Summary.from_bytes(s.to_bytes()) == s


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
    (env_with(format=2), "expected format version 1, got 2 .*newer"),
    (env_with(format=0), "older"),
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
    s = {"xw": Summary.from_values(r.integers(0, 9, 200)),
         "ranked": Summary.from_values(r.normal(size=2000), capacity=16),
         "bounds": Summary.from_values(r.normal(size=2000), capacity=16).merge(
             Summary.from_values(r.normal(size=100), capacity=4))}[which]
    return payload_of(s.to_bytes())


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
    ("ranked", set_("layout", "dense"), "layout 'xw', 'ranked' or 'bounds'"),
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
]


@pytest.mark.parametrize("which, mutate, match", PAYLOAD_CASES)
def test_payload_errors(which, mutate, match):
    p = good_payload(which)
    Summary.from_bytes(rewrap(p))  # the unmutated payload is fine
    mutate(p)
    with pytest.raises(FormatError, match=match):
        Summary.from_bytes(rewrap(p))


def test_payload_that_is_not_a_map():
    with pytest.raises(FormatError, match="expected a map"):
        Summary.from_bytes(B.encode_envelope(B.KIND_SUMMARY, msgpack.packb([1, 2, 3])))
    with pytest.raises(FormatError, match="msgpack"):
        Summary.from_bytes(B.encode_envelope(B.KIND_SUMMARY, b"\xc1"))
