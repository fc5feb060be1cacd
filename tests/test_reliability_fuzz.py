"""Hostile bytes: fuzz the blob and cut-table decoders.

Every decoder of stored bytes (``decode_summary``, ``decode_summary_set``,
``decode_table``) must answer any input with either a valid object or
:class:`FormatError` -- never another exception, never unbounded memory or time.
The cases are generated from valid documents by a seeded mutator:

* byte damage: flipped bytes, cuts, insertions, splices of two documents;
* hostile msgpack headers (format codes from the msgpack specification,
  github.com/msgpack/msgpack/blob/master/spec.md): str/bin/array/map 32 headers
  declaring 2**32-1 items or bytes, ext types, 100,000-deep nesting, non-string
  map keys;
* structure-aware edits behind *valid* checksums (the envelope's CRC-32 and the
  table's content SHA-256 are recomputed after the edit, so the payload checks
  are what is exercised): a field replaced by a wrong type, a huge or negative
  integer, NaN/inf, a deep nest, a long string or binary; fields removed or
  added; array bytes resized; other kinds and format versions.

CI runs 10,000 cases; ``-m slow`` runs 100,000.
"""

from __future__ import annotations

import hashlib
import random
import resource
import time
import warnings
import zlib

import msgpack
import numpy as np
import pytest

from sketchmerge.blob import decode_summary, decode_summary_set, encode_summary, encode_summary_set
from sketchmerge.cuts import decode_table, encode_table, feature_cuts
from sketchmerge.errors import FormatError
from sketchmerge.store import decode_manifest, decode_pointer, encode_manifest, encode_pointer
from sketchmerge.summary import Summary

# ----------------------------------------------------------------------------- corpus


def _summaries(rng: np.random.Generator) -> dict[str, Summary]:
    x = rng.lognormal(0, 1, 4000)
    w = rng.uniform(0.1, 2.0, 4000)
    k = rng.integers(0, 5, 4000).astype(np.float64)
    x_nan = x.copy()
    x_nan[::7] = np.nan
    return {
        "exact_small": Summary.from_values(k),                          # exact layout
        "weighted": Summary.from_values(x, w).prune(64),                # rank-bounds layout
        "with_missing": Summary.from_values(x_nan, w).prune(48),
        "merged": Summary.from_values(x[:2000]).merge(Summary.from_values(x[2000:])).prune(32),
        "empty": Summary.empty(),
    }


def corpus() -> dict[str, tuple[bytes, object]]:
    """Valid documents and the decoder of each."""
    rng = np.random.default_rng(20261201)
    sums = _summaries(rng)
    docs: dict[str, tuple[bytes, object]] = {}
    for name, s in sums.items():
        docs[f"summary/{name}"] = (encode_summary(s), decode_summary)
    docs["set"] = (encode_summary_set(sums, {"rows": 4000, "note": "x"}), decode_summary_set)
    feats = [feature_cuts(n, s, 16, 1 / 128) for n, s in sums.items()]
    content = {"source": "orchard/plots", "options": {"bins": 16}, "rows": 4000, "root": "ab" * 16,
               "skipped": [], "units": {"address": ["a#rg=0-0"], "fingerprint": ["f" * 64],
                                        "rows": [4000], "nbytes": [1]}}
    table = encode_table(feats, version=3, content_extra=content,
                         record={"created": "2026-12-01T00:00:00Z", "tool": "t"})
    docs["table"] = (table, decode_table)
    # the store's own documents (pointer and manifest) face the same hostile bytes
    docs["store/pointer"] = (encode_pointer(3, hashlib.sha256(table).hexdigest(), 1.0), decode_pointer)
    docs["store/manifest"] = (encode_manifest(3, "0123456789abcdef", table,
                                              ["ab" * 8, "cd" * 16 + ".node"], 1.0), decode_manifest)
    return docs


# ----------------------------------------------------------------------------- hostile pieces

HUGE = 0xFFFFFFFF


def hostile_headers() -> list[bytes]:
    """msgpack fragments whose headers lie (format codes: msgpack spec, "Formats")."""
    return [
        b"\xdb" + HUGE.to_bytes(4, "big") + b"abc",          # str 32, 4 GiB declared
        b"\xc6" + HUGE.to_bytes(4, "big") + b"abc",          # bin 32
        b"\xdd" + HUGE.to_bytes(4, "big") + b"\x00",         # array 32
        b"\xdf" + HUGE.to_bytes(4, "big") + b"\xa1k\x00",    # map 32
        b"\xc9" + HUGE.to_bytes(4, "big") + b"\x01ab",       # ext 32
        b"\xd4\x01\x00",                                     # fixext 1
        b"\xc7\x05\xff" + b"\x00" * 5,                       # ext 8, timestamp type -1, bad length
        b"\x91" * 100_000 + b"\xc0",                         # 100,000 nested arrays
        b"\x81\xa1k" * 50_000 + b"\xc0",                     # 50,000 nested maps
        b"\x81\x01\x02",                                     # int map key
        b"\x81\xc4\x01k\x02",                                # bin map key
        b"\xc1",                                             # never-used code
        b"\xcf" + b"\xff" * 8,                               # uint64 max
        b"\xd3" + b"\x80" + b"\x00" * 7,                     # int64 min
        b"\xcb" + np.float64(np.nan).tobytes()[::-1],        # float64 NaN
        b"",
    ]


def _deep(depth: int):
    v: object = 0
    for _ in range(depth):
        v = [v]
    return v


def hostile_values(rng: random.Random) -> list[object]:
    return [
        None, True, False, 0, -1, 2**63 - 1, -(2**63), 2**64 - 1, 1.5, float("nan"), float("inf"),
        float("-inf"), -0.0, 1e308, "", "x" * rng.randint(1, 5000), "sketchmerge.summary",
        b"", b"\x00" * rng.randint(1, 5000), [], [1, 2, 3], {}, {"a": 1}, _deep(400),
        list(range(rng.randint(0, 3000))), {"k%d" % i: i for i in range(rng.randint(0, 300))},
    ]


# ----------------------------------------------------------------------------- mutation

def _unpack(b: bytes):
    return msgpack.unpackb(b, raw=False, strict_map_key=False, use_list=True)


def _pack(o) -> bytes:
    return msgpack.packb(o, use_bin_type=True)


def _paths(obj, prefix=(), out=None, limit=400):
    """Every (container, key) location in a nested object, up to ``limit``."""
    if out is None:
        out = []
    if len(out) >= limit:
        return out
    if isinstance(obj, dict):
        for k, v in obj.items():
            out.append((obj, k))
            _paths(v, prefix + (k,), out, limit)
    elif isinstance(obj, list):
        for i, v in enumerate(obj[:50]):
            out.append((obj, i))
            _paths(v, prefix + (i,), out, limit)
    return out


def _edit(obj, rng: random.Random) -> None:
    """One random structural edit, in place."""
    locs = _paths(obj)
    if not locs:
        return
    parent, key = rng.choice(locs)
    op = rng.random()
    if op < 0.55:
        parent[key] = rng.choice(hostile_values(rng))
    elif op < 0.70 and isinstance(parent, dict):
        del parent[key]
    elif op < 0.80 and isinstance(parent, dict):
        parent[rng.choice(["extra", "n", "x", "kind", "format", "names", "version"]) + "_" * rng.randint(0, 1)] = \
            rng.choice(hostile_values(rng))
    elif isinstance(parent[key], (bytes, bytearray)):
        b = bytes(parent[key])
        cut = rng.randint(0, len(b)) if b else 0
        parent[key] = rng.choice([b[:cut], b + b[:rng.randint(1, 64)], b[::-1],
                                  bytes(rng.getrandbits(8) for _ in range(min(len(b), 256)))])
    elif isinstance(parent[key], list) and parent[key]:
        lst = parent[key]
        rng.choice([lambda: lst.pop(), lambda: lst.append(rng.choice(hostile_values(rng))),
                    lambda: lst.reverse(), lambda: lst.extend(lst[:3])])()
    elif isinstance(parent[key], (int, float)) and not isinstance(parent[key], bool):
        v = parent[key]
        parent[key] = rng.choice([v + 1, v - 1, -v, v * 1e300 if isinstance(v, float) else v * 2**40,
                                  float(v) if isinstance(v, int) else int(v) if np.isfinite(v) else 0])
    else:
        parent[key] = rng.choice(hostile_values(rng))


def _rewrap(env: dict, payload: bytes, fix_crc: bool) -> bytes:
    env = dict(env)
    env["payload"] = payload
    if fix_crc and "crc32" in env:           # blob envelopes (docs/FORMAT.md)
        env["crc32"] = zlib.crc32(payload) & 0xFFFFFFFF
    if fix_crc and "sha256" in env:          # store documents (docs/STORE.md)
        env["sha256"] = hashlib.sha256(payload).hexdigest()
    return _pack(env)


def mutate(doc: bytes, kind: str, rng: random.Random, others: list[bytes]) -> tuple[str, bytes]:
    """One hostile variant of ``doc``; returns (strategy, bytes)."""
    r = rng.random()
    if r < 0.18:   # byte damage
        b = bytearray(doc)
        for _ in range(rng.randint(1, 8)):
            b[rng.randrange(len(b))] = rng.getrandbits(8)
        return "flip", bytes(b)
    if r < 0.26:
        return "cut", doc[:rng.randrange(len(doc))]
    if r < 0.32:
        i = rng.randrange(len(doc))
        return "insert", doc[:i] + rng.choice(hostile_headers()) + doc[i:]
    if r < 0.36:
        o = rng.choice(others)
        return "splice", doc[:rng.randrange(len(doc))] + o[rng.randrange(len(o)):]
    if r < 0.42:
        return "header", rng.choice(hostile_headers())
    env = _unpack(doc)
    if r < 0.50:   # envelope edits: kind, version, checksum, fields
        env = dict(env)
        choice = rng.randrange(6)
        if choice == 0:
            env["format"] = rng.choice([0, 2, 99, -1, "1", 1.0, True, None, 2**64 - 1])
        elif choice == 1:
            env["kind"] = rng.choice(["sketchmerge.summary", "sketchmerge.summary-set",
                                      "sketchmerge.cut-table", "", None, 7, b"sketchmerge.summary"])
        elif choice == 2:
            ck = "crc32" if "crc32" in env else "sha256"
            env[ck] = rng.choice([-1, 2**40, "0", None, "f" * 64, b"\x00" * 32])
        elif choice == 3:
            env.pop(rng.choice(sorted(env)))
        elif choice == 4:
            env["extra"] = 1
        else:
            env["payload"] = rng.choice(hostile_values(rng))
        return "envelope", _pack(env)
    payload = env["payload"]
    if r < 0.56:   # hostile msgpack inside a payload with a valid CRC
        return "payload-header", _rewrap(env, rng.choice(hostile_headers()), True)
    body = _unpack(payload)
    if kind == "table" and rng.random() < 0.6:
        # edit inside the content, then fix both the content SHA-256 and the CRC
        content = _unpack(body["content"])
        for _ in range(rng.randint(1, 3)):
            _edit(content, rng)
        try:
            cb = _pack(content)
        except (ValueError, OverflowError, TypeError):
            return "content-unpackable", doc
        if rng.random() < 0.1:
            cb = rng.choice(hostile_headers())
        body = dict(body)
        body["content"] = cb
        if rng.random() < 0.9:
            body["content_sha256"] = hashlib.sha256(cb).hexdigest()
        return "content-edit", _rewrap(env, _pack(body), True)
    for _ in range(rng.randint(1, 3)):
        _edit(body, rng)
    try:
        pb = _pack(body)
    except (ValueError, OverflowError, TypeError):
        return "payload-unpackable", doc
    return "payload-edit", _rewrap(env, pb, rng.random() < 0.92)


# ----------------------------------------------------------------------------- the run

def run_fuzz(cases: int, seed: int) -> dict:
    """Run ``cases`` hostile inputs through the decoders; collect anything but FormatError."""
    docs = corpus()
    names = sorted(docs)
    others = [docs[n][0] for n in names]
    rng = random.Random(seed)
    bad: list[tuple[str, str, str, str]] = []
    outcomes = {"format_error": 0, "decoded": 0}
    strategies: dict[str, int] = {}
    warned: dict[str, int] = {}
    slowest = (0.0, "")
    largest = 0
    rss0 = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    t_all = time.perf_counter()
    for i in range(cases):
        name = names[i % len(names)]
        doc, decoder = docs[name]
        kind = "table" if name == "table" else "blob"
        strategy, data = mutate(doc, kind, rng, others)
        strategies[strategy] = strategies.get(strategy, 0) + 1
        largest = max(largest, len(data))
        t0 = time.perf_counter()
        with warnings.catch_warnings(record=True) as caught:
            # warnings are counted, not raised: a numpy RuntimeWarning on hostile bytes is
            # checked by its own test below
            warnings.simplefilter("always")
            try:
                decoder(data)
                outcomes["decoded"] += 1
            except FormatError:
                outcomes["format_error"] += 1
            except Exception as e:  # noqa: BLE001 - what the test is looking for
                bad.append((name, strategy, type(e).__name__, str(e)[:200]))
        dt = time.perf_counter() - t0
        for w in caught:
            key = f"{w.category.__name__}: {w.message}"
            warned[key] = warned.get(key, 0) + 1
        if dt > slowest[0]:
            slowest = (dt, f"{name}/{strategy}")
    rss1 = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return {"cases": cases, "bad": bad, "outcomes": outcomes, "strategies": strategies, "warnings": warned,
            "slowest_s": slowest[0], "slowest_case": slowest[1], "largest_input": largest,
            "max_rss_growth_mb": (rss1 - rss0) / 1024.0, "seconds": time.perf_counter() - t_all}


def _report(r: dict) -> str:
    return (f"{r['cases']} cases in {r['seconds']:.1f} s: {r['outcomes']}; slowest {r['slowest_s'] * 1e3:.1f} ms "
            f"({r['slowest_case']}); largest input {r['largest_input']:,} B; max RSS growth "
            f"{r['max_rss_growth_mb']:.1f} MB; warnings {r['warnings']}; "
            f"strategies {sorted(r['strategies'].items())}")


def _check(r: dict) -> None:
    print(_report(r))
    assert not r["bad"], f"{len(r['bad'])} non-FormatError outcomes, first: {r['bad'][:5]}"
    # bounded memory and time: a 4 GiB declared length must not be allocated, and no
    # single decode of an input below a few MB may run away (generous limits; the
    # figures above are the measurement)
    assert r["max_rss_growth_mb"] < 256, r["max_rss_growth_mb"]
    assert r["slowest_s"] < 5.0, (r["slowest_s"], r["slowest_case"])
    assert r["outcomes"]["format_error"] > 0.8 * r["cases"]


def test_corpus_decodes():
    # the unmutated corpus is valid: the fuzz starts from documents that pass
    for name, (doc, decoder) in corpus().items():
        decoder(doc)


@pytest.mark.parametrize("data", hostile_headers(), ids=lambda b: b[:6].hex() or "empty")
def test_hostile_headers_alone(data):
    for decoder in (decode_summary, decode_summary_set, decode_table, decode_pointer, decode_manifest):
        with pytest.raises(FormatError):
            decoder(data)


def test_fuzz_ci():
    _check(run_fuzz(10_000, seed=1))


@pytest.mark.slow
def test_fuzz_many():
    _check(run_fuzz(100_000, seed=2))


def test_signalling_nan_in_a_float32_array_is_a_format_error_without_warnings():
    s = Summary.from_values(np.random.default_rng(3).lognormal(0, 1, 5000)).prune(32)
    env = _unpack(encode_summary(s, version=1))   # format 1: float32 arrays (docs/FORMAT.md)
    body = _unpack(env["payload"])
    assert body["rank_type"] == "<f4"   # float32 rank fields (docs/FORMAT.md)
    # 0x7f800001: a signalling NaN in IEEE 754 binary32 (exponent all ones, quiet bit clear)
    body["w"] = np.full(body["n"], 0x7F800001, "<u4").tobytes()
    data = _rewrap(env, _pack(body), True)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        with pytest.raises(FormatError):
            decode_summary(data)
