"""Decoder fuzzing: well over 10,000 generated malformed blobs, every one of which must
end in FormatError (never another exception, a crash, a hang or a huge allocation).

The cases are generated from fixed seeds, so CI runs the same ones every time:

* every truncation of a set of valid blobs, and valid blobs with bytes appended;
* single-byte changes inside the payload, which the CRC-32 must catch;
* payloads damaged field by field (wrong types, missing or extra fields, bad
  lengths, unsorted or NaN values, impossible ranks...), re-wrapped with a
  correct checksum so that the payload checks themselves are exercised;
* random msgpack documents as payloads, random msgpack envelopes, random bytes.

The valid blobs cover every layout of format versions 1 and 2 (``packed``: widths,
stream lengths, padding, shifts, starts and the rank grid are damaged too).

A further set changes single bytes anywhere, envelope header included; there
a change can be harmless (an integer re-encoded in a wider type decodes to the
same number), so the decoder must either raise FormatError or return exactly
the original summary.
"""

from __future__ import annotations

import time
import tracemalloc

import msgpack
import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from sketchmerge import FormatError, Summary
from sketchmerge import blob as B


def rng(seed):
    return np.random.default_rng(seed)


def valid_summaries():
    r = rng(100)
    x = r.normal(size=3000)
    return [
        Summary.from_values(r.integers(0, 12, 500)),                               # packed, exact counts
        Summary.from_values(x[:40], r.random(40)),                                 # xw, f8
        Summary.from_values(x, capacity=24),                                       # packed, grid 1
        Summary.from_values(x, r.gamma(0.5, 1.0, 3000), capacity=20).merge(
            Summary.from_values(x[:300], capacity=6)),                             # packed, finer grid
        Summary.from_values(x[:500], np.full(500, 1e38), capacity=12),             # packed, W ~ 5e40
        Summary.from_values(np.array([-np.inf, 0.0, np.inf, np.nan])),             # packed, keys near 2**63
        Summary.empty(),                                                           # xw, no entries
        Summary.from_values(x.astype(np.float32), r.lognormal(0, 1, 3000), capacity=30),  # packed, shift 29
        Summary.from_values(np.array([4.5] * 7), capacity=2),                      # packed, one entry
        Summary.from_values(x[:900], np.full(900, 1e-312), capacity=8),            # bounds, subnormal W
    ]


SUMMARIES = valid_summaries()
# every summary in format version 2, and the first five in version 1 (xw, ranked, bounds)
BLOBS = [s.to_bytes() for s in SUMMARIES] + [B.encode_summary(s, 1) for s in SUMMARIES[:5]]
SET_BLOB = B.encode_summary_set({f"f{i}": s for i, s in enumerate(SUMMARIES[:4])}, {"unit": "u", "rows": 3})
SET_BLOB_V1 = B.encode_summary_set({f"f{i}": s for i, s in enumerate(SUMMARIES[:4])}, {"unit": "u"}, 1)
SETS = [SET_BLOB, SET_BLOB_V1]


def decode_any(blob, kind):
    return Summary.from_bytes(blob) if kind == "summary" else B.decode_summary_set(blob)


def payload_region(blob: bytes) -> tuple[int, int]:
    """Byte offsets of the payload inside an envelope."""
    env = msgpack.unpackb(blob, raw=False)
    p = env["payload"]
    start = blob.index(p)
    return start, start + len(p)


def rewrap(payload_obj, kind=B.KIND_SUMMARY) -> bytes:
    return B.encode_envelope(kind, msgpack.packb(payload_obj, use_bin_type=True))


# --------------------------------------------------------------------------- case generators
def truncations_and_appends():
    for blob, kind in [(b, "summary") for b in BLOBS] + [(b, "set") for b in SETS]:
        for n in range(len(blob)):
            yield blob[:n], kind
        r = rng(len(blob))
        for k in range(40):
            yield blob + bytes(r.integers(0, 256, 1 + k % 9, dtype=np.uint8)), kind


def payload_byte_changes(per_blob=300):
    for i, (blob, kind) in enumerate([(b, "summary") for b in BLOBS] + [(b, "set") for b in SETS]):
        start, stop = payload_region(blob)
        r = rng(1000 + i)
        for _ in range(per_blob):
            pos = int(r.integers(start, stop))
            new = int(r.integers(0, 256))
            if new == blob[pos]:
                new ^= 0xFF
            b = bytearray(blob)
            b[pos] = new
            yield bytes(b), kind


def pick(r, options):
    return options[int(r.integers(0, len(options)))]


def _random_obj(r, depth=0):
    t = int(r.integers(0, 10 if depth < 3 else 7))
    if t == 0:
        return None
    if t == 1:
        return bool(r.integers(0, 2))
    if t == 2:
        return pick(r, [0, 1, -1, 2**31, -(2**63), 2**64 - 1, int(r.integers(-1000, 1000))])
    if t == 3:
        return pick(r, [0.0, -0.0, 1.5, np.nan, np.inf, -np.inf, 1e308, 5e-324])
    if t == 4:
        return pick(r, ["", "xw", "bounds", "ranked", "packed", "<f8", "<f4", "float64", "n", "x",
                        "\u00e9\u2603"])
    if t == 5:
        return bytes(r.integers(0, 256, int(r.integers(0, 24)), dtype=np.uint8))
    if t == 6:
        return int(r.integers(0, 50))
    if t == 7:
        return [_random_obj(r, depth + 1) for _ in range(int(r.integers(0, 5)))]
    keys = ["dtype", "count", "missing_count", "total_weight", "missing_weight", "exact", "n", "x_type",
            "x", "layout", "bound", "w_type", "w", "rank_type", "rmin", "rmax", "names", "summaries",
            "meta", "kind", "format", "payload", "crc32", "zz", "quantum", "x_start", "x_shift", "x_bits",
            "rmin_start", "rmin_shift", "rmin_bits", "w_bits", "u_bits"]
    return {pick(r, keys): _random_obj(r, depth + 1) for _ in range(int(r.integers(0, 14)))}


def random_documents(count=1500):
    r = rng(7)
    for i in range(count):
        obj = _random_obj(r)
        kind = "summary" if i % 3 else "set"
        yield rewrap(obj, B.KIND_SUMMARY if kind == "summary" else B.KIND_SUMMARY_SET), kind
    for i in range(500):  # random envelopes
        env = _random_obj(r)
        if isinstance(env, dict) and i % 2:
            env.update(kind=B.KIND_SUMMARY, format=1 + i % 4 // 2)
        yield msgpack.packb(env, use_bin_type=True), "summary"
    for i in range(500):  # random bytes
        yield bytes(r.integers(0, 256, int(r.integers(0, 300)), dtype=np.uint8)), "summary"


def _arr(n, dtype, fill):
    return np.full(n, fill, dtype=dtype).tobytes()


# Each mutation makes a valid payload invalid.  Random parameters come from r.
MUTATIONS = [   # any layout
    lambda p, r: p.pop(str(r.choice(sorted(p)))),
    lambda p, r: p.update({str(r.choice(sorted(p))): [None, [], {}, "?", b"?", -1.5][int(r.integers(0, 6))]}),
    lambda p, r: p.update(extra_field=int(r.integers(0, 9))),
    lambda p, r: p.update(n=p["n"] + int(r.integers(1, 1000))),
    lambda p, r: p.update(n=-int(r.integers(1, 10**9))),
    lambda p, r: p.update(count=p["n"] - int(r.integers(1, 5))) if p["n"] else p.update(count=5),
    lambda p, r: p.update(layout=str(r.choice(["", "XW", "bound", "dense", "ranks", "pack"]))),
    lambda p, r: p.update(dtype=str(r.choice(["", "object", "str", "float128", "complex64", "x" * 99]))),
    lambda p, r: p.update(total_weight=float(r.choice([np.nan, np.inf, -1.0]))),
    lambda p, r: p.update(bound=float(r.choice([np.nan, np.inf, -1e-9]))),
    lambda p, r: p.update(missing_weight=float(r.choice([np.nan, -np.inf, -2.0]))),
    lambda p, r: p.update(missing_count=-int(r.integers(1, 100))),
    lambda p, r: p.update(exact=not p["exact"]),
]

ARRAY_MUTATIONS = [   # layouts xw, ranked and bounds
    lambda p, r: p.update(x=p["x"][: max(0, len(p["x"]) - int(r.integers(1, 8)))]),
    lambda p, r: p.update(x=p["x"] + b"\x00" * int(r.integers(1, 8))),
    lambda p, r: p.update(x_type=str(r.choice(["<f2", ">f8", "<i8", "f8", "", "float64"]))),
    lambda p, r: p.update(x=np.frombuffer(p["x"], p["x_type"])[::-1].copy().tobytes()) if p["n"] > 1
    else p.update(n=3),
    lambda p, r: p.update(x=_arr(p["n"], p["x_type"], np.nan)) if p["n"] else p.update(count=-1),
    lambda p, r: p.update(layout="packed"),
]


def _bad_rank_mutation(p, r):
    n = p["n"]
    if p["layout"] == "xw":
        p.update(w=_arr(n, p["w_type"], float(r.choice([-1.0, np.nan, np.inf]))) if n else b"\x00")
    else:
        key = str(r.choice(["rmin", "w"]))
        p.update({key: _arr(n, p["rank_type"], float(r.choice([-1.0, np.nan, np.inf])))} if n else {key: b"\x01"})


ARRAY_MUTATIONS.append(_bad_rank_mutation)


def _streams(p):
    return sorted(k for k in p if k.endswith("_bits"))


def _cut_stream(p, r):
    k = str(r.choice([k for k in _streams(p) if p[k]]))
    p[k] = p[k][: max(0, len(p[k]) - int(r.integers(1, 9)))]


def _wide_block(p, r):
    k = str(r.choice([k for k in _streams(p) if p[k]]))
    m = p["n"] - 1 if k in ("x_bits", "rmin_bits") else p["n"]
    b = bytearray(p[k])
    b[int(r.integers(0, -(-m // 32)))] = int(r.integers(65, 256))   # a width byte beyond 64
    p[k] = bytes(b)


def _longer_stream(p, r):
    k = str(r.choice(_streams(p)))
    p[k] = p[k] + bytes(int(r.integers(1, 9)))


def _zero_values(p, r):
    if p["n"] > 1:   # every second difference 0 and no shift: all keys equal
        p.update(x_bits=bytes(-(-(p["n"] - 1) // 32)), x_shift=0)
    else:
        p.update(n=2)


PACKED_MUTATIONS = [
    _cut_stream,
    _wide_block,
    _zero_values,
    _longer_stream,
    lambda p, r: p.update({str(r.choice([k for k in p if k.endswith("_shift")])): int(r.choice([64, 65, 99, -1]))}),
    lambda p, r: p.update(x_start=int(r.choice([-1, -(2**63)]))),
    lambda p, r: p.update(quantum=float(r.choice([0.0, -1.0, 3.0, np.nan, np.inf, 1e300]))),
    lambda p, r: p.update(w_bits=B._pack_bits(np.full(p["n"], 2**62 + int(r.integers(1, 9)), np.uint64))),
    lambda p, r: p.update(x_type="<f8", x=p.pop("x_bits")),
]


def field_mutations(count=3000):
    r = rng(11)
    payloads = [msgpack.unpackb(msgpack.unpackb(b, raw=False)["payload"], raw=False) for b in BLOBS]
    for i in range(count):
        p = dict(payloads[i % len(payloads)])
        muts = MUTATIONS + (PACKED_MUTATIONS if p["layout"] == "packed" else ARRAY_MUTATIONS)
        m = muts[int(r.integers(0, len(muts)))]
        m(p, r)
        if p == payloads[i % len(payloads)]:
            continue  # e.g. cutting bytes off an empty array: nothing changed
        if i % 4 == 0:  # and inside a summary set
            body = {"names": ["a", "b"], "summaries": [payloads[0], p], "meta": {}}
            yield rewrap(body, B.KIND_SUMMARY_SET), "set"
        else:
            yield rewrap(p), "summary"


def set_mutations(count=600):
    r = rng(12)
    body = msgpack.unpackb(msgpack.unpackb(SET_BLOB, raw=False)["payload"], raw=False)
    muts = [
        lambda b: b.update(names=b["names"][:-1]),
        lambda b: b.update(names=[b["names"][0]] * len(b["names"])),
        lambda b: b.update(names=[1] + b["names"][1:]),
        lambda b: b.update(meta={"k": [1, 2]}),
        lambda b: b.update(meta="meta"),
        lambda b: b.pop("summaries"),
        lambda b: b.update(summaries=b["summaries"][:1] + ["x"] + b["summaries"][2:]),
        lambda b: b.update(more=1),
        lambda b: b.update(names="abcd"),
    ]
    for i in range(count):
        b = {k: (list(v) if isinstance(v, list) else dict(v)) for k, v in body.items()}
        muts[int(r.integers(0, len(muts)))](b)
        yield rewrap(b, B.KIND_SUMMARY_SET), "set"


def malformed_cases():
    yield from truncations_and_appends()
    yield from payload_byte_changes()
    yield from field_mutations()
    yield from set_mutations()
    yield from random_documents()


# --------------------------------------------------------------------------- tests
def test_valid_blobs_decode():
    seen = set()
    for b in BLOBS:
        env = msgpack.unpackb(b, raw=False)
        p = msgpack.unpackb(env["payload"], raw=False)
        seen.add((env["format"], p["layout"], p["exact"], p.get("quantum", 0.0) == 1.0))
        t = Summary.from_bytes(b)
        assert t == Summary.from_bytes(B.encode_summary(t, env["format"]))
    assert {(1, "xw"), (1, "ranked"), (1, "bounds"), (2, "xw"), (2, "bounds"), (2, "packed")} <= \
        {k[:2] for k in seen}
    assert {(2, "packed", True, True), (2, "packed", False, True), (2, "packed", False, False)} <= seen
    for b in SETS:
        assert len(B.decode_summary_set(b)[0]) == 4


def test_ten_thousand_malformed_blobs_all_raise_format_error():
    count = 0
    slowest = 0.0
    others = []
    for blob, kind in malformed_cases():
        t0 = time.perf_counter()
        try:
            decode_any(blob, kind)
        except FormatError:
            pass
        except Exception as e:  # pragma: no cover - reported below
            others.append((type(e).__name__, str(e)[:100], blob[:40]))
        else:
            others.append(("decoded", "", blob[:40]))
        slowest = max(slowest, time.perf_counter() - t0)
        count += 1
    assert not others, others[:5]
    assert count >= 10_000, count
    assert slowest < 5.0  # no case may hang


def test_byte_changes_anywhere_fail_or_change_nothing():
    originals = [(b, "summary", Summary.from_bytes(b)) for b in BLOBS]
    originals += [(b, "set", B.decode_summary_set(b)) for b in SETS]
    raised = harmless = 0
    for i, (blob, kind, orig) in enumerate(originals):
        r = rng(5000 + i)
        for _ in range(250):
            b = bytearray(blob)
            pos = int(r.integers(0, len(b)))
            b[pos] ^= 1 << int(r.integers(0, 8))
            try:
                got = decode_any(bytes(b), kind)
            except FormatError:
                raised += 1
                continue
            assert got == orig  # a harmless change (say, an integer re-encoded wider)
            harmless += 1
    assert raised > 0.95 * (raised + harmless)


def test_declared_sizes_do_not_allocate():
    # headers that claim huge arrays or strings must fail before any allocation
    evil = [
        b"\xdd\x7f\xff\xff\xff",                            # array32 of 2**31 items
        b"\xdf\x7f\xff\xff\xff",                            # map32 of 2**31 pairs
        b"\xdb\x7f\xff\xff\xff" + b"a" * 10,                # str32 of 2 GiB
        b"\xc6\x7f\xff\xff\xff" + b"a" * 10,                # bin32 of 2 GiB
    ]
    good = msgpack.unpackb(msgpack.unpackb(BLOBS[2], raw=False)["payload"], raw=False)
    huge_n = dict(good, n=2**40, count=2**41)
    evil.append(rewrap(huge_n))
    evil.append(rewrap(dict(good, n=2**26, count=2**27)))
    evil.append(rewrap(b"\xdd\x7f\xff\xff\xff"))
    tracemalloc.start()
    try:
        for blob in evil:
            with pytest.raises(FormatError):
                Summary.from_bytes(blob)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 1 << 20


def test_packed_streams_allocate_in_proportion_to_their_bytes():
    # Every stream of a packed payload has one width byte per 32 values, so a payload of L
    # bytes describes at most 8 L entries (16 L when exact) however small its widths: zero
    # widths claiming many entries decode to values that are not increasing, after an
    # allocation bounded by the input (docs/FORMAT.md, "Decoder limits")
    good = msgpack.unpackb(msgpack.unpackb(BLOBS[2], raw=False)["payload"], raw=False)
    assert good["layout"] == "packed"
    for n in (2**12, 2**16):
        nb, nb1 = -(-n // 32), -(-(n - 1) // 32)
        p = dict(good, n=n, count=n, x_bits=bytes(nb1), rmin_bits=bytes(nb1), w_bits=bytes(nb), u_bits=bytes(nb))
        blob = rewrap(p)
        tracemalloc.start()
        try:
            with pytest.raises(FormatError, match="strictly increasing"):
                Summary.from_bytes(blob)
            peak = tracemalloc.get_traced_memory()[1]
        finally:
            tracemalloc.stop()
        # about 70 bytes per entry decoded, plus a fixed 1 MB of temporaries (blocks go 512 at a time)
        assert len(blob) < n // 7 + 300 and peak < 1000 * len(blob) + (2 << 20), (len(blob), peak)
    # one stream too short for the entries claimed: rejected before anything is allocated
    p = dict(good, n=2**24, count=2**24, x_bits=bytes(2**19 - 1))
    tracemalloc.start()
    try:
        with pytest.raises(FormatError, match="width bytes at the start of 'x_bits'"):
            Summary.from_bytes(rewrap(p))
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 4 << 20   # the payload itself is 0.5 MB


@given(st.recursive(
    st.none() | st.booleans() | st.integers(-(2**63), 2**64 - 1) | st.floats() | st.text(max_size=8)
    | st.binary(max_size=32),
    lambda inner: st.lists(inner, max_size=5) | st.dictionaries(
        st.sampled_from(["n", "x", "w", "layout", "count", "dtype", "exact", "bound", "names", "meta"])
        | st.text(max_size=4),
        inner, max_size=12),
    max_leaves=30))
def test_any_msgpack_payload_is_rejected_cleanly(obj):
    for kind in (B.KIND_SUMMARY, B.KIND_SUMMARY_SET):
        with pytest.raises(FormatError):
            decode_any(rewrap(obj, kind), "summary" if kind == B.KIND_SUMMARY else "set")
