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
``packed``   (format version 2) any non-exact summary, and exact summaries with
             integer weights: values as order-preserving integer keys coded by
             second-order prediction, rank fields on an integer grid, every
             stream bit-packed in blocks of 32.

Arrays of the first three layouts are little-endian ``<f8``, or ``<f4`` when
that is lossless.  The rank fields of a ``bounds`` payload may also be rounded
to ``<f4`` in the safe direction (``rmin`` and ``w`` down, ``rmax`` up); then
the stored a-priori bound grows by :data:`F4_ROUNDING_SLACK`, so a decoded
summary's certified epsilon still stays within its bound.  A ``packed`` payload
rounds its rank fields the same way, to multiples of a power of two at most
``2**-23 * W``, with the same slack; its values are always lossless.

Format version 2 adds ``packed`` and nothing else: the writer uses it where it
applies, the decoder reads blobs of versions 1 and 2, and
``encode_summary(s, version=1)`` still writes the bytes of version 1 (cut
tables embed version-1 payloads, so that readers predating version 2 keep
loading them).
"""

from __future__ import annotations

import math
import re
import zlib

import msgpack
import numpy as np

from .errors import FormatError
from . import summary as _core
from .summary import Summary, float_keys, key_values

__all__ = [
    "F4_ROUNDING_SLACK",
    "FORMAT_VERSION",
    "KIND_SUMMARY",
    "KIND_SUMMARY_SET",
    "READ_VERSIONS",
    "decode_envelope",
    "decode_summary",
    "decode_summary_set",
    "open_summary_set",
    "encode_envelope",
    "encode_summary",
    "encode_summary_set",
    "summary_from_payload",
    "summary_to_payload",
]

#: the format version blobs are written in
FORMAT_VERSION = 2
#: the format versions the blob decoder reads
READ_VERSIONS = (1, 2)
KIND_SUMMARY = "sketchmerge.summary"
KIND_SUMMARY_SET = "sketchmerge.summary-set"

#: Added to the a-priori bound when a payload's rank fields are rounded
#: outward: to float32 in a ``bounds`` payload, to the grid of a ``packed``
#: one.  Each rounded field moves by less than ``2**-23 * W`` (one float32
#: ulp, or one grid step; every rank field lies in ``[0, W]``), and the
#: certified epsilon combines at most four fields, so it moves by less than
#: ``4 * 2**-23 = 2**-21`` (about 4.8e-7) in normalised rank.
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
#: rmax may exceed W by less than one rounding step (2**-23 W); the check allows 2**-20 W
_RMAX_OVER = 1.0 + 2.0**-20

# the packed layout (docs/FORMAT.md, "Layout packed")
_BLOCK = 32                  # values per block of a bit-packed stream (one width byte each)
_CHUNK_BLOCKS = 1 << 9       # blocks unpacked at a time: bounds the temporaries
_MAX_FIELD = 1 << 62         # largest quantized rank field
_EXACT_INT = 2.0**53         # float64 holds every integer below this
_F8_MIN_NORMAL = float(np.finfo(np.float64).tiny)
_MASKS = np.array([(1 << b) - 1 for b in range(65)], dtype=np.uint64)
_U1, _U63 = np.uint64(1), np.uint64(63)


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


def encode_envelope(kind: str, payload: bytes, version: int = FORMAT_VERSION) -> bytes:
    """Wrap a payload: kind, format version, payload bytes and their CRC-32 (zlib's)."""
    return _pack({"kind": kind, "format": version, "payload": payload,
                  "crc32": zlib.crc32(payload) & 0xFFFFFFFF})


def _versions_text(versions) -> str:
    v = [str(x) for x in versions]
    return v[0] if len(v) == 1 else ", ".join(v[:-1]) + " or " + v[-1]


_BIN_HEADS = {0xC4: 2, 0xC5: 3, 0xC6: 5}  # msgpack bin 8/16/32: bytes before the data


def _envelope_map(blob: bytes) -> dict | None:
    """The envelope map with its payload as a memoryview into ``blob`` (no copy of what may
    be megabytes), or None when the bytes are not a plain well-formed envelope."""
    n = len(blob)
    try:
        up = msgpack.Unpacker(None, raw=False, strict_map_key=True, use_list=True,
                              max_buffer_size=max(n, 1), max_str_len=min(n, 1 << 20), max_bin_len=n,
                              max_array_len=16, max_map_len=16, max_ext_len=0)
        up.feed(blob)
        env = {}
        for _ in range(up.read_map_header()):
            key = up.unpack()
            if not isinstance(key, str) or key in env:
                return None
            start = up.tell()
            if key == "payload" and blob[start] in _BIN_HEADS:
                up.skip()
                env[key] = memoryview(blob)[start + _BIN_HEADS[blob[start]]:up.tell()]
            else:
                env[key] = up.unpack()
        if up.tell() != n:
            return None
    except Exception:  # noqa: BLE001 - malformed: the plain decoder reports it
        return None
    return env


def _open_envelope(blob, kind: str, what: str, versions) -> tuple[int, bytes]:
    """Check an envelope's kind, version and checksum; return ``(version, payload)``
    (the payload may be a memoryview into the blob)."""
    if not isinstance(blob, (bytes, bytearray, memoryview)):
        raise FormatError(f"{what}: expected bytes, got {type(blob).__name__}")
    blob = bytes(blob)
    if len(blob) > _MAX_BLOB:
        raise FormatError(f"{what}: expected at most {_MAX_BLOB} bytes, got {len(blob)}")
    env = _envelope_map(blob)
    if env is None:  # anything unusual: the plain decoder says what is wrong
        env = _unpack(blob, what, max_array=16, max_map=16)
    if not isinstance(env, dict):
        raise FormatError(f"{what}: expected a msgpack map envelope, got {type(env).__name__}")
    got_kind = env.get("kind")
    if got_kind != kind:
        raise FormatError(f"{what}: expected kind {kind!r}, got {_short(got_kind)}")
    version = env.get("format")
    if type(version) is not int:
        raise FormatError(f"{what}: expected an integer format version, got {_short(version)}")
    if version not in versions:
        hint = "newer" if version > max(versions) else "older"
        raise FormatError(f"{what}: expected format version {_versions_text(versions)}, got {version} "
                          f"(written by a {hint} sketchmerge?)")
    payload = env.get("payload")
    crc = env.get("crc32")
    if not isinstance(payload, (bytes, memoryview)):
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
    return version, payload


def decode_envelope(blob, kind: str, what: str = "blob", versions=READ_VERSIONS) -> bytes:
    """Check an envelope's kind, version (one of ``versions``) and checksum; return the payload bytes."""
    return bytes(_open_envelope(blob, kind, what, tuple(versions))[1])


# --------------------------------------------------------------------------- packed streams
def _zigzag(r: np.ndarray) -> np.ndarray:
    """uint64 two's-complement residuals to uint64 codes: 0, -1, 1, -2 ... -> 0, 1, 2, 3 ..."""
    return (r << _U1) ^ np.negative(r >> _U63)


def _unzigzag(z: np.ndarray) -> np.ndarray:
    return (z >> _U1) ^ np.negative(z & _U1)


def _delta(a: np.ndarray) -> np.ndarray:
    """First differences of a uint64 sequence modulo 2**64, with ``a[-1] := 0``."""
    d = a.copy()
    d[1:] -= a[:-1]
    return d


def _predict(a: np.ndarray) -> tuple[int, int, np.ndarray]:
    """Second-order prediction of a uint64 sequence, modulo 2**64.

    Returns ``(a[0], shift, codes)``: ``shift`` is the number of trailing zero
    bits common to the differences ``d[i] = a[i] - a[i-1]``, and ``codes`` the
    zigzag codes of ``e[i] - e[i-1]`` with ``e = d >> shift`` (``e[0] := 0``),
    ``len(a) - 1`` of them.
    """
    d = a[1:] - a[:-1]
    t = int(np.bitwise_or.reduce(d)) if d.size else 0
    shift = (t & -t).bit_length() - 1 if t else 0
    if shift:
        d >>= np.uint64(shift)
    r = d.copy()
    r[1:] -= d[:-1]
    return int(a[0]), shift, _zigzag(r)


def _unpredict(start: int, shift: int, codes: np.ndarray) -> np.ndarray:
    """Inverse of :func:`_predict` (uint64 cumulative sums, wrapping modulo 2**64)."""
    out = np.empty(codes.size + 1, np.uint64)
    out[0] = start
    d = np.cumsum(_unzigzag(codes), dtype=np.uint64)
    if shift:
        d <<= np.uint64(shift)
    np.cumsum(d, dtype=np.uint64, out=out[1:])
    out[1:] += np.uint64(start)
    return out


def _bit_lengths(v: np.ndarray) -> np.ndarray:
    """Bits of each uint64 (0 for 0), as int64."""
    e = np.frexp(v.astype(np.float64))[1].astype(np.int64)   # exact below 2**53, may round up above
    np.minimum(e, 64, out=e)
    # a value rounded up to the next power of two has one bit less: then v >> (e - 1) == 0
    e -= ((v >> np.maximum(e - 1, 0).astype(np.uint64)) == 0) & (e > 0)
    return e


def _blocks(counts: list[int], widths: list[np.ndarray]):
    """Per block of the streams laid end to end (each stream's data starting on a byte): its
    width, its number of values and its first bit; and each stream's data bytes."""
    nbs = [ws.size for ws in widths]
    w = np.concatenate(widths).astype(np.int64)
    cnt = np.full(w.size, _BLOCK, np.int64)
    lasts = np.cumsum(nbs) - 1
    for m, nb, last in zip(counts, nbs, lasts):
        if nb:
            cnt[last] = m - _BLOCK * (nb - 1)   # the last block holds the rest
    bits = w * cnt
    end = np.cumsum(bits)
    nbytes, shift, done, base = [], [], 0, 0
    for nb, last in zip(nbs, lasts):
        total = int(end[last]) - done if nb else 0
        nbytes.append((total + 7) // 8)
        shift.append(base - done)          # from the running bit count to the stream's own start
        done += total
        base += 8 * nbytes[-1]
    first = end - bits + np.repeat(np.array(shift, np.int64), nbs)
    return w, cnt, first, nbytes


def _slot_bits(w, cnt, first):
    """First bit of every slot of the blocks (32 per block); a block's unused slots sit at its end."""
    slot = np.minimum(np.arange(_BLOCK, dtype=np.int64), cnt[:, None])
    return (first[:, None] + slot * w[:, None]).reshape(-1)


def _pack_streams(streams: list[np.ndarray]) -> list[bytes]:
    """Bit-pack uint64 streams: each as one width byte per block of 32 values, then every
    block's values in that many bits, least significant bit first (docs/FORMAT.md).
    The compiled kernel writes the same bytes in one pass."""
    if _core._K is not None:
        out = []
        for a in streams:
            a = np.ascontiguousarray(a, dtype=np.uint64)
            buf = np.empty(-(-a.size // _BLOCK) + 8 * a.size + 8, np.uint8)
            out.append(buf[:_core._K.bitpack(a, _BLOCK, buf)].tobytes())
        return out
    counts = [a.size for a in streams]
    nbs = [-(-m // _BLOCK) for m in counts]
    v = np.zeros(sum(nbs) * _BLOCK, np.uint64)
    k = 0
    for a, nb in zip(streams, nbs):
        v[k:k + a.size] = a
        k += nb * _BLOCK
    w_all = _bit_lengths(np.bitwise_or.reduce(v.reshape(-1, _BLOCK), axis=1))
    widths = np.split(w_all, np.cumsum(nbs)[:-1])
    w, cnt, first, nbytes = _blocks(counts, widths)
    # value i takes bits off[i] .. off[i] + width - 1: the high part of 64-bit little-endian
    # word off[i] >> 6 and, past its end, the low part of the next.  Values share no bits,
    # so adding the parts into their words assembles them
    off = _slot_bits(w, cnt, first)
    word = off >> 6
    sh = (off & 63).astype(np.uint64)
    words = np.zeros(int(word[-1]) + 2 if word.size else 1, "<u8")
    np.add.at(words, word, v << sh)
    np.add.at(words, word + 1, (v >> (_U63 - sh)) >> _U1)   # v >> (64 - sh), 0 if sh == 0
    data = words.view(np.uint8)
    out, pos = [], 0
    for ws, nbyte in zip(widths, nbytes):
        out.append(ws.astype(np.uint8).tobytes() + data[pos:pos + nbyte].tobytes())
        pos += nbyte
    return out


def _pack_bits(v: np.ndarray) -> bytes:
    """One bit-packed stream (see :func:`_pack_streams`)."""
    return _pack_streams([np.asarray(v, dtype=np.uint64)])[0]


def _check_bits(b: bytes, m: int, key: str, what: str) -> np.ndarray:
    """Validate a bit-packed stream of ``m`` values without allocating for them; return its widths."""
    nb = -(-m // _BLOCK)
    if len(b) < nb:
        raise FormatError(f"{what}: expected {nb} width bytes at the start of {key!r} ({m} values in "
                          f"blocks of {_BLOCK}), got {len(b)} bytes")
    widths = np.frombuffer(b, np.uint8, count=nb)
    if nb and int(widths.max()) > 64:
        raise FormatError(f"{what}: expected block widths 0 to 64 in {key!r}, got {int(widths.max())}")
    bits = int(widths.sum(dtype=np.int64)) * _BLOCK
    if nb:
        bits -= int(widths[-1]) * (nb * _BLOCK - m)   # the last block holds the rest
    need = nb + (bits + 7) // 8
    if len(b) != need:
        raise FormatError(f"{what}: expected {need} bytes for {key!r} ({nb} width bytes and {bits} bits "
                          f"of {m} values), got {len(b)}")
    if bits % 8 and b[-1] >> (bits % 8):
        raise FormatError(f"{what}: expected zero padding bits at the end of {key!r}, "
                          f"got last byte {b[-1]:#04x}")
    return widths


def _unpack_streams(bufs: list[bytes], counts: list[int], widths: list[np.ndarray]) -> list[np.ndarray]:
    """The values of streams checked by :func:`_check_bits`."""
    if _core._K is not None:
        out = []
        for b, m in zip(bufs, counts):
            v = np.empty(m, np.uint64)
            _core._K.bitunpack(b, m, _BLOCK, v)
            out.append(v)
        return out
    nbs = [ws.size for ws in widths]
    data = b"".join(b[nb:] for b, nb in zip(bufs, nbs))
    words = np.zeros(len(data) // 8 + 2, "<u8")   # a zero word past the end for the last spill
    words.view(np.uint8)[:len(data)] = np.frombuffer(data, np.uint8)
    w, cnt, first, _ = _blocks(counts, widths)
    v = np.empty(w.size * _BLOCK, np.uint64)
    for k in range(0, w.size, _CHUNK_BLOCKS):   # bounded temporaries for large inputs
        blk = slice(k, k + _CHUNK_BLOCKS)
        off = _slot_bits(w[blk], cnt[blk], first[blk])
        word = off >> 6
        sh = (off & 63).astype(np.uint64)
        part = (words[word] >> sh) | ((words[word + 1] << (_U63 - sh)) << _U1)   # up to 71 bits
        part.reshape(-1, _BLOCK)[...] &= _MASKS[w[blk]][:, None]
        v[k * _BLOCK:k * _BLOCK + part.size] = part
    out, k = [], 0
    for m, nb in zip(counts, nbs):
        out.append(v[k:k + m])
        k += nb * _BLOCK
    return out


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


def _integral(a: np.ndarray) -> bool:
    return bool(np.all(np.floor(a) == a))


def _quantum(total: float) -> float:
    """The rank grid step of a summary of total weight ``W`` (normal, > 0): 2**(floor(log2 W) - 23)."""
    return math.ldexp(1.0, math.frexp(total)[1] - 24)


def _packed_fields(s: Summary) -> dict | None:
    """The ``packed`` layout's fields of ``s`` (with ``bound``), or None where it does not apply."""
    x, total = s.values, s.total_weight
    if x.size == 0 or bool(np.any((x == 0.0) & np.signbit(x))):
        return None   # an empty summary has nothing to pack; -0.0 would come back as +0.0
    if s.is_exact:
        w = s.weights
        if not (total < _EXACT_INT and _integral(w) and bool(np.all(w >= 0.0))):
            return None   # float weights: xw keeps them exactly
        q, bound = 1.0, 0.0
        ranks = {"w_bits": w.astype(np.uint64)}
    else:
        lo, hi, w = s.rmin, s.rmax, s.weights
        if total < _EXACT_INT and _integral(lo) and _integral(hi) and _integral(w):
            q = 1.0    # counts and integer weights: lossless
        elif math.isfinite(total) and total >= _F8_MIN_NORMAL:
            q = _quantum(total)
        else:
            return None
        with np.errstate(all="ignore"):
            lo_q, hi_q, w_q = np.floor(lo / q), np.ceil(hi / q), np.floor(w / q)
        for a in (lo_q, hi_q, w_q):
            if not (bool(np.all(a >= 0.0)) and float(a.max()) <= _MAX_FIELD):   # NaN fails too
                return None
        if float(hi_q.max()) * q > total * _RMAX_OVER:
            return None   # the decoder would reject it
        lo_u, hi_u, w_u = lo_q.astype(np.uint64), hi_q.astype(np.uint64), w_q.astype(np.uint64)
        if bool(np.any(hi_u < lo_u + w_u)):
            return None
        bound = s.bound
        if not (np.array_equal(lo_q * q, lo) and np.array_equal(hi_q * q, hi) and np.array_equal(w_q * q, w)):
            bound += F4_ROUNDING_SLACK
        r0, rs, rc = _predict(lo_u)
        ranks = {"rmin_start": r0, "rmin_shift": rs, "rmin_bits": rc,
                 "w_bits": w_u, "u_bits": _zigzag(_delta(hi_u - lo_u - w_u))}
    x0, xs, xc = _predict(float_keys(x))
    fields = {"bound": bound, "quantum": q, "x_start": x0, "x_shift": xs, "x_bits": xc, **ranks}
    keys = [k for k in fields if k.endswith("_bits")]
    fields.update(zip(keys, _pack_streams([fields[k] for k in keys])))
    return fields


def summary_to_payload(s: Summary, version: int = FORMAT_VERSION) -> dict:
    """The payload map of one summary (msgpack-ready; see docs/FORMAT.md).

    Picks the smallest layout of format ``version`` that keeps the summary's
    guarantee: ``packed`` (version 2) where it applies, else lossless arrays
    where possible, float32 rank bounds rounded outward (with the bound
    widened by :data:`F4_ROUNDING_SLACK`) only for the ``bounds`` layout.
    """
    if version not in READ_VERSIONS:
        raise ValueError(f"summary payload: expected format version {_versions_text(READ_VERSIONS)}, "
                         f"got {version!r}")
    head = {
        "dtype": s.dtype,
        "count": s.count,
        "missing_count": s.missing_count,
        "total_weight": s.total_weight,
        "missing_weight": s.missing_weight,
        "exact": s.is_exact,
        "n": len(s),
    }
    if version >= 2:
        packed = _packed_fields(s)
        if packed is not None:
            return {**head, "layout": "packed", **packed}
    x = s.values
    xt, xb = _arr(x, _lossless_f4(x))
    out = dict(head, x_type=xt, x=xb)
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
           "missing_weight": float, "exact": bool, "n": int, "layout": str, "bound": float}
_VALUES = {"x_type": str, "x": bytes}
_LAYOUT = {"xw": {**_VALUES, "w_type": str, "w": bytes},
           "ranked": {**_VALUES, "rank_type": str, "rmin": bytes, "w": bytes},
           "bounds": {**_VALUES, "rank_type": str, "rmin": bytes, "rmax": bytes, "w": bytes}}
_PACKED = {"quantum": float, "x_start": int, "x_shift": int, "x_bits": bytes, "w_bits": bytes}
_PACKED_RANKS = {"rmin_start": int, "rmin_shift": int, "rmin_bits": bytes, "u_bits": bytes}
_LAYOUTS = {1: ("xw", "ranked", "bounds"), 2: ("xw", "ranked", "bounds", "packed")}


def _layout_fields(layout: str, exact: bool) -> dict:
    if layout != "packed":
        return _LAYOUT[layout]
    return _PACKED if exact else {**_PACKED, **_PACKED_RANKS}


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


def _unpack_packed(p: dict, v: dict, what: str):
    """Values and quantized rank fields of a ``packed`` payload (all checks before any allocation)."""
    n, total, exact = v["n"], v["total_weight"], v["exact"]
    if n < 1:
        raise FormatError(f"{what}: expected n >= 1 for layout 'packed', got {n}")
    q = float(p["quantum"])
    if exact:
        if q != 1.0 or v["bound"] != 0.0 or not total < _EXACT_INT:
            raise FormatError(f"{what}: expected quantum 1, bound 0 and total_weight below 2**53 for an exact "
                              f"'packed' payload, got quantum {q!r}, bound {v['bound']!r}, total_weight {total!r}")
    elif not ((q == 1.0 and total < _EXACT_INT)
              or (total >= _F8_MIN_NORMAL and q == _quantum(total))):
        want = "1 (total_weight below 2**53)" if total < _F8_MIN_NORMAL else \
            f"1 or {_quantum(total)!r} (2**(floor(log2 total_weight) - 23))"
        raise FormatError(f"{what}: expected quantum {want}, got {q!r}")
    starts = {"x_start": 1 << 64} if exact else {"x_start": 1 << 64, "rmin_start": _MAX_FIELD + 1}
    for key, limit in starts.items():
        if not 0 <= p[key] < limit:
            raise FormatError(f"{what}: expected {key!r} in [0, {limit - 1}], got {_short(p[key])}")
    for key in ("x_shift",) if exact else ("x_shift", "rmin_shift"):
        if not 0 <= p[key] <= 63:
            raise FormatError(f"{what}: expected {key!r} in [0, 63], got {_short(p[key])}")
    counts = {"x_bits": n - 1, "w_bits": n} if exact else \
        {"x_bits": n - 1, "rmin_bits": n - 1, "w_bits": n, "u_bits": n}
    if _core._K is not None and all(len(p[key]) >= -(-m // _BLOCK) for key, m in counts.items()):
        # the compiled decoder: the same checks and numbers in one pass; on any complaint
        # the numpy route below runs to raise its own message.  (Each stream holds at
        # least its width bytes, so n is bounded by the blob's length before allocating.)
        x, w = np.empty(n), np.empty(n)
        lo, hi = (None, None) if exact else (np.empty(n), np.empty(n))
        code = _core._K.unpack_packed(p["x_bits"], None if exact else p["rmin_bits"], p["w_bits"],
                                      None if exact else p["u_bits"], n, _BLOCK, p["x_start"],
                                      p["x_shift"], 0 if exact else p["rmin_start"],
                                      0 if exact else p["rmin_shift"], q, x, lo, hi, w)
        if code == 0:
            return "floats", x, lo, hi, w
    widths = [_check_bits(p[key], m, key, what) for key, m in counts.items()]
    streams = dict(zip(counts, _unpack_streams([p[k] for k in counts], list(counts.values()), widths)))
    x = key_values(_unpredict(p["x_start"], p["x_shift"], streams["x_bits"]))
    if exact:
        return "ints", x, q, None, streams["w_bits"], None
    lo = _unpredict(p["rmin_start"], p["rmin_shift"], streams["rmin_bits"])
    w, u = streams["w_bits"], np.cumsum(_unzigzag(streams["u_bits"]), dtype=np.uint64)
    for key, a in (("rmin", lo), ("w", w), ("u", u)):
        if bool(np.any(a > np.uint64(_MAX_FIELD))):
            raise FormatError(f"{what}: expected quantized {key} values at most 2**62, got {int(a.max())}")
    return "ints", x, q, lo, w, u


def summary_from_payload(p, what: str = "summary", version: int = FORMAT_VERSION) -> Summary:
    """Validate a payload map of format ``version`` and build the Summary it describes."""
    if not isinstance(p, dict):
        raise FormatError(f"{what}: expected a map, got {type(p).__name__}")
    v = {k: _field(p, k, t, what) for k, t in _COMMON.items()}
    layout = v["layout"]
    allowed = _LAYOUTS.get(version)
    if allowed is None:
        raise ValueError(f"{what}: expected format version {_versions_text(READ_VERSIONS)}, got {version!r}")
    if layout not in allowed:
        names = ", ".join(repr(a) for a in allowed[:-1]) + f" or {allowed[-1]!r}"
        raise FormatError(f"{what}: expected layout {names} (format version {version}), got {_short(layout)}")
    fields = _layout_fields(layout, v["exact"])
    for k, t in fields.items():
        _field(p, k, t, what)
    extra = set(p) - set(_COMMON) - set(fields)
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
    fast = None
    if layout == "packed":
        got = _unpack_packed(p, v, what)
        if got[0] == "floats":
            x, fast = got[1], got[2:]
        else:
            x, q, lo_q, w_q, u_q = got[1:]
    else:
        x = _array(p, "x", "x_type", n, what)
    if fast is None and (np.isnan(x).any() or (n > 1 and not bool(np.all(x[1:] > x[:-1])))):  # (the kernel checked)
        raise FormatError(f"{what}: expected strictly increasing entry values, got unsorted or NaN values")
    common = dict(count=v["count"], missing_count=v["missing_count"],
                  missing_weight=v["missing_weight"], dtype=v["dtype"])
    if layout == "packed" and v["exact"] and fast is not None:
        s = Summary._exact_from_entries(x, fast[2], **common)
        if s.total_weight != v["total_weight"]:
            raise FormatError(f"{what}: expected total_weight {s.total_weight!r} from the entries, "
                              f"got {v['total_weight']!r}")
        return s
    if layout == "packed" and v["exact"]:
        if bool(np.any(w_q >= np.uint64(2**53))):
            raise FormatError(f"{what}: expected integer weights below 2**53 in an exact 'packed' payload, "
                              f"got up to {int(w_q.max())}")
        s = Summary._exact_from_entries(x, w_q.astype(np.float64), **common)
        if s.total_weight != v["total_weight"]:
            raise FormatError(f"{what}: expected total_weight {s.total_weight!r} from the entries, "
                              f"got {v['total_weight']!r}")
        return s
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
    if fast is not None:
        lo, hi, w = fast
    elif layout == "packed":
        with np.errstate(over="ignore"):
            lo = lo_q.astype(np.float64) * q
            w = w_q.astype(np.float64) * q
            hi = (lo_q + w_q + u_q).astype(np.float64) * q
    else:
        lo = _array(p, "rmin", "rank_type", n, what)
        w = _array(p, "w", "rank_type", n, what)
        if layout == "ranked":
            if p["rank_type"] != "<f4":
                raise FormatError(f"{what}: expected rank_type '<f4' for layout 'ranked', "
                                  f"got {_short(p['rank_type'])}")
            hi = lo + w
        else:
            hi = _array(p, "rmax", "rank_type", n, what)
    total = v["total_weight"]
    # the kernel checked finiteness; its fields are >= 0 and ordered by construction
    if fast is None and not (_finite_nonneg(lo) and _finite_nonneg(w) and _finite_nonneg(hi)
                             and bool(np.all(lo <= hi))):
        raise FormatError(f"{what}: expected finite rank bounds with 0 <= rmin <= rmax and w >= 0")
    # outward rounding may lift rmax above W by less than one step (2**-23 W)
    if n and float(hi.max()) > total * _RMAX_OVER + _TOLERANCE:
        raise FormatError(f"{what}: expected rank bounds within the total weight {total!r}, "
                          f"got rmax up to {float(hi.max())!r}")
    s = Summary._own(x, lo, hi, w, total_weight=total, bound=v["bound"], exact=False, **common)
    if s.epsilon > v["bound"] + _TOLERANCE:
        raise FormatError(f"{what}: expected a certified epsilon within the stored bound {v['bound']!r}, "
                          f"got {s.epsilon!r}")
    return s


# --------------------------------------------------------------------------- public codecs
def encode_summary(s: Summary, version: int = FORMAT_VERSION) -> bytes:
    """One summary as a blob of kind ``sketchmerge.summary`` (format ``version``: 2, or 1 for old readers)."""
    return encode_envelope(KIND_SUMMARY, _pack(summary_to_payload(s, version)), version)


def decode_summary(blob) -> Summary:
    """Decode a ``sketchmerge.summary`` blob of any readable version; any defect raises FormatError."""
    version, payload = _open_envelope(blob, KIND_SUMMARY, "summary blob", READ_VERSIONS)
    return summary_from_payload(_unpack(payload, "summary blob payload", max_map=64), "summary blob", version)


_META_TYPES = (str, int, float, bool, type(None))


def encode_summary_set(summaries: dict, meta: dict | None = None, version: int = FORMAT_VERSION) -> bytes:
    """The summaries of several features (one work unit or one merge node) in one blob.

    ``summaries`` maps feature name to :class:`Summary`, in the order to keep;
    ``meta`` is a flat map of str to str/int/float/bool/None; ``version`` the
    format version to write (2, or 1 for old readers).
    """
    meta = dict(meta or {})
    for k, v in meta.items():
        if not isinstance(k, str) or not isinstance(v, _META_TYPES):
            raise TypeError(f"summary-set meta must map str to scalars, got {k!r}: {type(v).__name__}")
    for k, s in summaries.items():
        if not isinstance(k, str) or not isinstance(s, Summary):
            raise TypeError(f"summary-set must map str to Summary, got {k!r}: {type(s).__name__}")
    body = {"names": list(summaries), "summaries": [summary_to_payload(s, version) for s in summaries.values()],
            "meta": meta}
    return encode_envelope(KIND_SUMMARY_SET, _pack(body), version)


def decode_summary_set(blob) -> tuple[dict, dict]:
    """Decode a ``sketchmerge.summary-set`` blob (any readable version) into ``(summaries, meta)``."""
    opened = open_summary_set(blob)
    return {n: opened.summary(i) for i, n in enumerate(opened.names)}, opened.meta


class OpenSummarySet:
    """A checked summary-set blob whose summaries are decoded one at a time (:meth:`summary`),
    so that a merge holds one feature's decoded summaries, not every feature's."""

    def __init__(self, names: list, payloads, meta: dict, version: int, what: str):
        self.names, self.meta, self._payloads, self._version, self._what = names, meta, payloads, version, what

    def summary(self, i: int) -> Summary:
        p = self._payloads[i]
        what = f"{self._what} feature {_short(self.names[i])}"
        if isinstance(p, memoryview):  # a lazily indexed payload: unpack it now
            p = _unpack(p, what)
        return summary_from_payload(p, what, self._version)


def _index_summary_set(payload: bytes):
    """``(names, [memoryview of each summary's msgpack], meta)`` without unpacking the
    summaries, or None when the payload is anything but a well-formed set (the full
    decoder then says what is wrong)."""
    n = len(payload)
    try:
        up = msgpack.Unpacker(None, raw=False, strict_map_key=True, use_list=True,
                              max_buffer_size=max(n, 1), max_str_len=min(n, 1 << 20), max_bin_len=n,
                              max_array_len=min(n, 1 << 20), max_map_len=min(n, 1 << 12), max_ext_len=0)
        up.feed(payload)
        if up.read_map_header() != 3:
            return None
        got = {}
        for _ in range(3):
            key = up.unpack()
            if key in got or key not in ("names", "summaries", "meta"):
                return None
            if key == "summaries":
                spans, start = [], None
                for _ in range(up.read_array_header()):
                    start = up.tell()
                    up.skip()
                    spans.append((start, up.tell()))
                got[key] = spans
            else:
                got[key] = up.unpack()
        if up.tell() != n:
            return None
    except Exception:  # noqa: BLE001 - malformed: the full decoder reports it
        return None
    view = memoryview(payload)
    return got["names"], [view[a:b] for a, b in got["summaries"]], got["meta"]


def open_summary_set(blob) -> OpenSummarySet:
    """Check a summary-set blob's envelope and structure; decode no summary yet."""
    what = "summary-set blob"
    version, payload = _open_envelope(blob, KIND_SUMMARY_SET, what, READ_VERSIONS)
    idx = _index_summary_set(payload)
    if idx is not None:
        names, sums, meta = idx
    else:
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
    return OpenSummarySet(names, sums, meta, version, what)
