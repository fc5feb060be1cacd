"""Summary blobs: the msgpack wire format of one summary and of a multi-feature set.

The format is specified in ``docs/FORMAT.md`` (sections "Envelope", "Summary
payload" and "Summary set"); keep this module and that document in step and
add golden files under ``tests/data/`` for every format version.

Bytes are untrusted when decoded: every msgpack call passes explicit options
(binary type on, raw strings off, strict map keys, bounded sizes), nothing is
ever unpickled or evaluated, and anything wrong raises :class:`FormatError`
saying what was expected and what was found.

Payload layouts (docs/FORMAT.md, "Summary payload"):

``xw``       exact summaries: values and weights; ranks are their cumulative sum.
``ranked``   non-exact summaries whose every entry has exact ranks
             (``rmax == rmin + w``, what a direct or first prune produces):
             values, ``rmin`` and ``w``; ``rmax`` is derived.  Used only when
             the rank fields are stored losslessly.
``bounds``   any summary: values, ``rmin``, ``rmax`` and ``w``.

Arrays are little-endian ``<f8``, or ``<f4`` when that is lossless.  The rank
fields of a ``bounds`` payload may also be rounded to ``<f4`` in the safe
direction (``rmin`` and ``w`` down, ``rmax`` up); then the stored a-priori
bound grows by :data:`F4_ROUNDING_SLACK`, so a decoded summary's certified
epsilon still stays within its bound.
"""

from __future__ import annotations

import re
import zlib

import msgpack
import numpy as np

from .errors import FormatError
from .summary import Summary

__all__ = [
    "F4_ROUNDING_SLACK",
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

#: Added to the a-priori bound when a ``bounds`` payload's rank fields are
#: rounded to float32.  Each rounded field moves by less than one float32 ulp,
#: i.e. by less than ``2**-23 * W`` (every rank field lies in ``[0, W]``), and
#: the certified epsilon combines at most four fields, so it moves by less
#: than ``4 * 2**-23 = 2**-21`` (about 4.8e-7) in normalised rank.
F4_ROUNDING_SLACK = 2.0**-21

_F4_MAX = float(np.finfo(np.float32).max)
_F4_MIN_TOTAL = 2.0**-100   # below float32's normal range ulps stop being relative
_MAX_BLOB = 1 << 31         # 2 GiB: larger inputs are rejected before unpacking
_MAX_ENTRIES = 1 << 27      # per summary; also bounded by the blob's own length
_DTYPES = {"<f8": np.dtype("<f8"), "<f4": np.dtype("<f4")}
_DTYPE_NAME = re.compile(r"(float(16|32|64)|u?int(8|16|32|64)|bool)\Z")
#: the decoder's tolerance (in normalised rank) for float rounding when it
#: checks a summary's ranks against its total weight and its bound
_TOLERANCE = 1e-9


def _short(v, limit: int = 60) -> str:
    """repr of an untrusted value, cut to ``limit`` characters for messages."""
    r = repr(v)
    return r if len(r) <= limit else r[: limit - 3] + "..."


def _pack(obj) -> bytes:
    return msgpack.packb(obj, use_bin_type=True, strict_types=False)


def _unpack(data: bytes, what: str, *, max_array: int = 1 << 20, max_map: int = 1 << 12):
    """Unpack untrusted msgpack with explicit safety limits (each also capped by the data's length)."""
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
        raise FormatError(f"{what}: expected a msgpack document, got malformed bytes "
                          f"({type(e).__name__}: {_short(str(e), 120)})") from e


def encode_envelope(kind: str, payload: bytes) -> bytes:
    """Wrap a payload: kind, format version, payload bytes and their CRC-32 (zlib's)."""
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
        raise FormatError(f"{what}: expected kind {kind!r}, got {_short(got_kind)}")
    version = env.get("format")
    if type(version) is not int:
        raise FormatError(f"{what}: expected an integer format version, got {_short(version)}")
    if version != FORMAT_VERSION:
        hint = "newer" if version > FORMAT_VERSION else "older"
        raise FormatError(f"{what}: expected format version {FORMAT_VERSION}, got {version} "
                          f"(written by a {hint} sketchmerge?)")
    payload = env.get("payload")
    crc = env.get("crc32")
    if not isinstance(payload, bytes):
        raise FormatError(f"{what}: expected binary payload, got {type(payload).__name__}")
    if type(crc) is not int:
        raise FormatError(f"{what}: expected an integer crc32, got {_short(crc)}")
    extra = set(env) - {"kind", "format", "payload", "crc32"}
    if extra:
        raise FormatError(f"{what}: expected envelope keys kind, format, payload, crc32, "
                          f"got also {_short(sorted(map(str, extra)))}")
    actual = zlib.crc32(payload) & 0xFFFFFFFF
    if actual != crc:
        raise FormatError(f"{what}: checksum mismatch: expected crc32 {crc:#010x}, got {actual:#010x}")
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
    """The payload map of one summary (msgpack-ready; see docs/FORMAT.md).

    Picks the smallest layout that keeps the summary's guarantee: lossless
    arrays where possible, float32 rank bounds rounded outward (with the
    bound widened by :data:`F4_ROUNDING_SLACK`) only for the ``bounds`` layout.
    """
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
    if np.array_equal(lo + w, hi) and _lossless_f4(lo) and _lossless_f4(w):
        # every entry has exact ranks and they fit float32 exactly (e.g. counts < 2**24)
        out.update(layout="ranked", bound=bound, rank_type="<f4",
                   rmin=lo.astype("<f4").tobytes(), w=w.astype("<f4").tobytes())
        return out
    if hi.size and float(hi.max()) < _F4_MAX * 0.5 and s.total_weight >= _F4_MIN_TOTAL:
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
           "ranked": {"rank_type": str, "rmin": bytes, "w": bytes},
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
        raise FormatError(f"{what}: expected {tkey} '<f8' or '<f4', got {_short(t)}")
    dt = _DTYPES[t]
    b = p[key]
    if len(b) != n * dt.itemsize:
        raise FormatError(f"{what}: expected {n * dt.itemsize} bytes for {key!r} ({n} x {t}), got {len(b)}")
    with np.errstate(invalid="ignore"):  # a signalling NaN in float32 bytes is caught below, not warned
        return np.frombuffer(b, dtype=dt).astype(np.float64)


def _finite_nonneg(a: np.ndarray) -> bool:
    return bool(np.all(np.isfinite(a)) and np.all(a >= 0.0))


def summary_from_payload(p, what: str = "summary") -> Summary:
    """Validate a payload map and build the Summary it describes."""
    if not isinstance(p, dict):
        raise FormatError(f"{what}: expected a map, got {type(p).__name__}")
    v = {k: _field(p, k, t, what) for k, t in _COMMON.items()}
    layout = v["layout"]
    if layout not in _LAYOUT:
        raise FormatError(f"{what}: expected layout 'xw', 'ranked' or 'bounds', got {_short(layout)}")
    for k, t in _LAYOUT[layout].items():
        _field(p, k, t, what)
    extra = set(p) - set(_COMMON) - set(_LAYOUT[layout])
    if extra:
        raise FormatError(f"{what}: unexpected fields {_short(sorted(map(str, extra)))}")
    if not _DTYPE_NAME.match(v["dtype"]):
        raise FormatError(f"{what}: expected a numeric dtype name such as 'float64', got {_short(v['dtype'])}")
    n = v["n"]
    if not (0 <= n <= min(v["count"], _MAX_ENTRIES)) or v["missing_count"] < 0:
        raise FormatError(f"{what}: expected 0 <= n <= count and missing_count >= 0, got n={_short(n)}, "
                          f"count={_short(v['count'])}, missing_count={_short(v['missing_count'])}")
    for k in ("total_weight", "missing_weight", "bound"):
        if not (np.isfinite(v[k]) and v[k] >= 0.0):
            raise FormatError(f"{what}: expected finite {k} >= 0, got {v[k]!r}")
    if (n == 0) != (v["count"] == 0) or (n == 0 and v["total_weight"] != 0.0):
        raise FormatError(f"{what}: expected entries exactly when count > 0, got n={n}, "
                          f"count={v['count']}, total_weight={v['total_weight']!r}")
    x = _array(p, "x", "x_type", n, what)
    if np.isnan(x).any() or (n > 1 and not bool(np.all(x[1:] > x[:-1]))):
        raise FormatError(f"{what}: expected strictly increasing entry values, got unsorted or NaN values")
    common = dict(count=v["count"], missing_count=v["missing_count"],
                  missing_weight=v["missing_weight"], dtype=v["dtype"])
    if layout == "xw":
        if not v["exact"] or v["bound"] != 0.0:
            raise FormatError(f"{what}: expected exact=true and bound 0 for layout 'xw', "
                              f"got exact={v['exact']}, bound={v['bound']!r}")
        w = _array(p, "w", "w_type", n, what)
        if not _finite_nonneg(w):
            raise FormatError(f"{what}: expected finite weights >= 0")
        s = Summary._exact_from_entries(x, w, **common)
        if s.total_weight != v["total_weight"]:
            raise FormatError(f"{what}: expected total_weight {s.total_weight!r} from the entries, "
                              f"got {v['total_weight']!r}")
        return s
    if v["exact"]:
        raise FormatError(f"{what}: expected exact=false for layout {layout!r}, got true")
    lo = _array(p, "rmin", "rank_type", n, what)
    w = _array(p, "w", "rank_type", n, what)
    if layout == "ranked":
        if p["rank_type"] != "<f4":
            raise FormatError(f"{what}: expected rank_type '<f4' for layout 'ranked', got {_short(p['rank_type'])}")
        hi = lo + w
    else:
        hi = _array(p, "rmax", "rank_type", n, what)
    total = v["total_weight"]
    if not (_finite_nonneg(lo) and _finite_nonneg(w) and _finite_nonneg(hi) and bool(np.all(lo <= hi))):
        raise FormatError(f"{what}: expected finite rank bounds with 0 <= rmin <= rmax and w >= 0")
    # float32 rounding up may lift rmax above W by less than one float32 ulp (2**-23 W)
    if n and float(hi.max()) > total * (1.0 + 2.0**-20) + _TOLERANCE:
        raise FormatError(f"{what}: expected rank bounds within the total weight {total!r}, "
                          f"got rmax up to {float(hi.max())!r}")
    s = Summary(x, lo, hi, w, total_weight=total, bound=v["bound"], exact=False, **common)
    if s.epsilon > v["bound"] + _TOLERANCE:
        raise FormatError(f"{what}: expected a certified epsilon within the stored bound {v['bound']!r}, "
                          f"got {s.epsilon!r}")
    return s


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
    for k, s in summaries.items():
        if not isinstance(k, str) or not isinstance(s, Summary):
            raise TypeError(f"summary-set must map str to Summary, got {k!r}: {type(s).__name__}")
    body = {"names": list(summaries), "summaries": [summary_to_payload(s) for s in summaries.values()],
            "meta": meta}
    return encode_envelope(KIND_SUMMARY_SET, _pack(body))


def decode_summary_set(blob) -> tuple[dict, dict]:
    """Decode a ``sketchmerge.summary-set`` blob into ``(summaries, meta)``."""
    what = "summary-set blob"
    payload = decode_envelope(blob, KIND_SUMMARY_SET, what)
    body = _unpack(payload, what + " payload", max_map=1 << 12)
    if not isinstance(body, dict) or set(body) != {"names", "summaries", "meta"}:
        got = sorted(map(str, body)) if isinstance(body, dict) else type(body).__name__
        raise FormatError(f"{what}: expected a map with keys names, summaries, meta, got {_short(got)}")
    names, sums, meta = body["names"], body["summaries"], body["meta"]
    if not isinstance(names, list) or not isinstance(sums, list) or len(names) != len(sums):
        raise FormatError(f"{what}: expected equal-length lists of names and summaries")
    if not all(isinstance(n, str) for n in names) or len(set(names)) != len(names):
        raise FormatError(f"{what}: expected distinct string feature names")
    if not isinstance(meta, dict) or not all(isinstance(k, str) and isinstance(v, _META_TYPES)
                                             for k, v in meta.items()):
        raise FormatError(f"{what}: expected meta as a flat map of str to scalars")
    out = {n: summary_from_payload(p, f"{what} feature {_short(n)}") for n, p in zip(names, sums)}
    return out, meta
