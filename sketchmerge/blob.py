"""Summary blobs: the msgpack wire format of one summary and of a multi-feature set.

The format is specified in ``docs/FORMAT.md`` (sections "Envelope", "Summary
payload" and "Summary set"); keep this module and that document in step and
add a golden file under ``tests/data/`` for every format version.

Bytes are untrusted when decoded: every msgpack call passes explicit options
(binary type on, raw strings off, strict map keys, bounded sizes), nothing is
ever unpickled or evaluated, and anything wrong raises :class:`FormatError`.
"""

from __future__ import annotations

import zlib

import msgpack
import numpy as np

from .errors import FormatError
from .summary import Summary

__all__ = [
    "FORMAT_VERSION",
    "KIND_SUMMARY",
    "KIND_SUMMARY_SET",
    "decode_envelope",
    "decode_summary",
    "decode_summary_set",
    "encode_envelope",
    "encode_summary",
    "encode_summary_set",
    "summary_from_payload",
    "summary_to_payload",
]

FORMAT_VERSION = 1
KIND_SUMMARY = "sketchmerge.summary"
KIND_SUMMARY_SET = "sketchmerge.summary-set"

#: added to the a-priori bound when rank fields are rounded to float32 (4 ulp of W)
F4_ROUNDING_SLACK = 2.0**-21

_F4_MAX = float(np.finfo(np.float32).max)
_MAX_BLOB = 1 << 31  # 2 GiB: larger inputs are rejected before unpacking
_DTYPES = {"<f8": np.dtype("<f8"), "<f4": np.dtype("<f4")}


def _pack(obj) -> bytes:
    return msgpack.packb(obj, use_bin_type=True, strict_types=False)


def _unpack(data: bytes, what: str, *, max_array: int = 1 << 20, max_map: int = 1 << 12):
    """Unpack untrusted msgpack with explicit safety limits."""
    try:
        return msgpack.unpackb(
            data,
            raw=False,
            strict_map_key=True,
            use_list=True,
            max_str_len=min(len(data), 1 << 20),
            max_bin_len=len(data),
            max_array_len=min(len(data), max_array),
            max_map_len=min(len(data), max_map),
            max_ext_len=0,
        )
    except Exception as e:  # msgpack raises several types; all mean malformed bytes
        raise FormatError(f"{what}: expected a msgpack document, got malformed bytes ({type(e).__name__}: {e})") from e


def encode_envelope(kind: str, payload: bytes) -> bytes:
    """Wrap a payload: kind, format version, payload bytes and their CRC-32."""
    return _pack({"kind": kind, "format": FORMAT_VERSION, "payload": payload,
                  "crc32": zlib.crc32(payload) & 0xFFFFFFFF})


def decode_envelope(blob, kind: str, what: str = "blob") -> bytes:
    """Check an envelope's kind, version and checksum; return the payload bytes."""
    if not isinstance(blob, (bytes, bytearray, memoryview)):
        raise FormatError(f"{what}: expected bytes, got {type(blob).__name__}")
    blob = bytes(blob)
    if len(blob) > _MAX_BLOB:
        raise FormatError(f"{what}: expected at most {_MAX_BLOB} bytes, got {len(blob)}")
    env = _unpack(blob, what, max_array=16, max_map=16)
    if not isinstance(env, dict):
        raise FormatError(f"{what}: expected a msgpack map envelope, got {type(env).__name__}")
    got_kind = env.get("kind")
    if got_kind != kind:
        raise FormatError(f"{what}: expected kind {kind!r}, got {got_kind!r}")
    version = env.get("format")
    if type(version) is not int:
        raise FormatError(f"{what}: expected an integer format version, got {version!r}")
    if version != FORMAT_VERSION:
        raise FormatError(f"{what}: expected format version {FORMAT_VERSION}, got {version} "
                          "(written by a newer or older sketchmerge?)")
    payload = env.get("payload")
    crc = env.get("crc32")
    if not isinstance(payload, bytes):
        raise FormatError(f"{what}: expected binary payload, got {type(payload).__name__}")
    if type(crc) is not int:
        raise FormatError(f"{what}: expected an integer crc32, got {crc!r}")
    actual = zlib.crc32(payload) & 0xFFFFFFFF
    if actual != crc:
        raise FormatError(f"{what}: checksum mismatch: expected crc32 {crc:#010x}, got {actual:#010x}")
    extra = set(env) - {"kind", "format", "payload", "crc32"}
    if extra:
        raise FormatError(f"{what}: unexpected envelope keys {sorted(extra)}")
    return payload


# --------------------------------------------------------------------------- summary payload
def _round_f4(a: np.ndarray, direction: str) -> np.ndarray:
    """Round float64 to float32 toward -inf ('down') or +inf ('up')."""
    f = a.astype(np.float32)
    back = f.astype(np.float64)
    if direction == "down":
        fix = back > a
        f[fix] = np.nextafter(f[fix], np.float32(-np.inf))
    else:
        fix = back < a
        f[fix] = np.nextafter(f[fix], np.float32(np.inf))
    return f


def _lossless_f4(a: np.ndarray) -> bool:
    with np.errstate(over="ignore", invalid="ignore"):
        return bool(np.array_equal(a.astype(np.float32).astype(np.float64), a))


def _arr(a: np.ndarray, f4: bool):
    if f4:
        return "<f4", a.astype("<f4").tobytes()
    return "<f8", a.astype("<f8").tobytes()


def summary_to_payload(s: Summary) -> dict:
    """The payload map of one summary (msgpack-ready; see docs/FORMAT.md)."""
    x = s.values
    xt, xb = _arr(x, _lossless_f4(x))
    out = {
        "dtype": s.dtype,
        "count": s.count,
        "missing_count": s.missing_count,
        "total_weight": s.total_weight,
        "missing_weight": s.missing_weight,
        "exact": s.is_exact,
        "n": len(s),
        "x_type": xt,
        "x": xb,
    }
    if s.is_exact:
        # ranks are the canonical cumulative sum of w: store w only
        wt, wb = _arr(s.weights, _lossless_f4(s.weights))
        out.update(layout="xw", bound=0.0, w_type=wt, w=wb)
        return out
    lo, hi, w = s.rmin, s.rmax, s.weights
    bound = s.bound
    if hi.size and float(hi.max()) < _F4_MAX * 0.5:
        lo4, hi4, w4 = _round_f4(lo, "down"), _round_f4(hi, "up"), _round_f4(w, "down")
        changed = not (np.array_equal(lo4, lo) and np.array_equal(hi4, hi) and np.array_equal(w4, w))
        if changed:
            bound = bound + F4_ROUNDING_SLACK
        rt = "<f4"
        rb = (lo4.astype("<f4").tobytes(), hi4.astype("<f4").tobytes(), w4.astype("<f4").tobytes())
    else:
        rt = "<f8"
        rb = (lo.astype("<f8").tobytes(), hi.astype("<f8").tobytes(), w.astype("<f8").tobytes())
    out.update(layout="bounds", bound=bound, rank_type=rt, rmin=rb[0], rmax=rb[1], w=rb[2])
    return out


_COMMON = {"dtype": str, "count": int, "missing_count": int, "total_weight": float,
           "missing_weight": float, "exact": bool, "n": int, "x_type": str, "x": bytes,
           "layout": str, "bound": float}
_LAYOUT = {"xw": {"w_type": str, "w": bytes},
           "bounds": {"rank_type": str, "rmin": bytes, "rmax": bytes, "w": bytes}}


def _field(p: dict, key: str, typ, what: str):
    if key not in p:
        raise FormatError(f"{what}: expected field {key!r}, got none")
    v = p[key]
    if typ is float and type(v) is int:
        v = float(v)
    if type(v) is not typ:
        raise FormatError(f"{what}: expected {key!r} of type {typ.__name__}, got {type(v).__name__}")
    return v


def _array(p: dict, key: str, tkey: str, n: int, what: str) -> np.ndarray:
    t = p[tkey]
    if t not in _DTYPES:
        raise FormatError(f"{what}: expected {tkey} '<f8' or '<f4', got {t!r}")
    dt = _DTYPES[t]
    b = p[key]
    if len(b) != n * dt.itemsize:
        raise FormatError(f"{what}: expected {n * dt.itemsize} bytes for {key!r} ({n} x {t}), got {len(b)}")
    return np.frombuffer(b, dtype=dt).astype(np.float64)


def summary_from_payload(p, what: str = "summary") -> Summary:
    """Validate a payload map and build the Summary it describes."""
    if not isinstance(p, dict):
        raise FormatError(f"{what}: expected a map, got {type(p).__name__}")
    v = {k: _field(p, k, t, what) for k, t in _COMMON.items()}
    layout = v["layout"]
    if layout not in _LAYOUT:
        raise FormatError(f"{what}: expected layout 'xw' or 'bounds', got {layout!r}")
    for k, t in _LAYOUT[layout].items():
        _field(p, k, t, what)
    extra = set(p) - set(_COMMON) - set(_LAYOUT[layout])
    if extra:
        raise FormatError(f"{what}: unexpected fields {sorted(extra)}")
    n = v["n"]
    if n < 0 or v["count"] < 0 or v["missing_count"] < 0 or n > v["count"]:
        raise FormatError(f"{what}: expected 0 <= n <= count, got n={n}, count={v['count']}")
    for k in ("total_weight", "missing_weight", "bound"):
        if not (np.isfinite(v[k]) and v[k] >= 0.0):
            raise FormatError(f"{what}: expected finite {k} >= 0, got {v[k]!r}")
    x = _array(p, "x", "x_type", n, what)
    if np.isnan(x).any() or (n > 1 and not bool(np.all(x[1:] > x[:-1]))):
        raise FormatError(f"{what}: expected strictly increasing entry values, got unsorted or NaN values")
    common = dict(count=v["count"], missing_count=v["missing_count"],
                  missing_weight=v["missing_weight"], dtype=v["dtype"])
    if layout == "xw":
        if not v["exact"]:
            raise FormatError(f"{what}: expected exact=true for layout 'xw', got false")
        w = _array(p, "w", "w_type", n, what)
        if not (np.all(np.isfinite(w)) and np.all(w >= 0.0)):
            raise FormatError(f"{what}: expected finite weights >= 0")
        s = Summary._exact_from_entries(x, w, **common)
        if s.total_weight != v["total_weight"]:
            raise FormatError(f"{what}: expected total_weight {s.total_weight!r} from the entries, "
                              f"got {v['total_weight']!r}")
        return s
    if v["exact"]:
        raise FormatError(f"{what}: expected exact=false for layout 'bounds', got true")
    lo = _array(p, "rmin", "rank_type", n, what)
    hi = _array(p, "rmax", "rank_type", n, what)
    w = _array(p, "w", "rank_type", n, what)
    total = v["total_weight"]
    ok = (np.all(np.isfinite(lo)) and np.all(np.isfinite(hi)) and np.all(np.isfinite(w))
          and np.all(lo >= 0.0) and np.all(w >= 0.0) and np.all(lo <= hi))
    if not ok:
        raise FormatError(f"{what}: expected finite rank bounds with 0 <= rmin <= rmax and w >= 0")
    return Summary(x, lo, hi, w, total_weight=total, bound=v["bound"], exact=False, **common)


# --------------------------------------------------------------------------- public codecs
def encode_summary(s: Summary) -> bytes:
    """One summary as a blob of kind ``sketchmerge.summary``."""
    return encode_envelope(KIND_SUMMARY, _pack(summary_to_payload(s)))


def decode_summary(blob) -> Summary:
    """Decode a ``sketchmerge.summary`` blob; any defect raises FormatError."""
    payload = decode_envelope(blob, KIND_SUMMARY, "summary blob")
    return summary_from_payload(_unpack(payload, "summary blob payload", max_map=64), "summary blob")


_META_TYPES = (str, int, float, bool, type(None))


def encode_summary_set(summaries: dict, meta: dict | None = None) -> bytes:
    """The summaries of several features (one work unit or one merge node) in one blob.

    ``summaries`` maps feature name to :class:`Summary`, in the order to keep;
    ``meta`` is a flat map of str to str/int/float/bool/None.
    """
    meta = dict(meta or {})
    for k, v in meta.items():
        if not isinstance(k, str) or not isinstance(v, _META_TYPES):
            raise TypeError(f"summary-set meta must map str to scalars, got {k!r}: {type(v).__name__}")
    body = {"names": list(summaries), "summaries": [summary_to_payload(s) for s in summaries.values()],
            "meta": meta}
    return encode_envelope(KIND_SUMMARY_SET, _pack(body))


def decode_summary_set(blob) -> tuple[dict, dict]:
    """Decode a ``sketchmerge.summary-set`` blob into ``(summaries, meta)``."""
    what = "summary-set blob"
    payload = decode_envelope(blob, KIND_SUMMARY_SET, what)
    body = _unpack(payload, what + " payload", max_map=1 << 12)
    if not isinstance(body, dict) or set(body) != {"names", "summaries", "meta"}:
        raise FormatError(f"{what}: expected a map with keys names, summaries, meta, got "
                          f"{sorted(body) if isinstance(body, dict) else type(body).__name__}")
    names, sums, meta = body["names"], body["summaries"], body["meta"]
    if not isinstance(names, list) or not isinstance(sums, list) or len(names) != len(sums):
        raise FormatError(f"{what}: expected equal-length lists of names and summaries")
    if not all(isinstance(n, str) for n in names) or len(set(names)) != len(names):
        raise FormatError(f"{what}: expected distinct string feature names")
    if not isinstance(meta, dict) or not all(isinstance(v, _META_TYPES) for v in meta.values()):
        raise FormatError(f"{what}: expected meta as a flat map of scalars")
    out = {n: summary_from_payload(p, f"{what} feature {n!r}") for n, p in zip(names, sums)}
    return out, meta
