"""The sketch core: a mergeable weighted quantile summary with a certified rank bound.

This module is pure: it imports numpy only (and, when built, the optional C
kernels of :mod:`sketchmerge._kernels`, which fuse its row passes with the same
arithmetic and give bit-identical summaries), does no I/O and knows nothing of
dask or pyarrow.  Serialization lives in :mod:`sketchmerge.blob` (format in
``docs/FORMAT.md``); :meth:`Summary.to_bytes` defers to it.

The summary is the weighted quantile summary of Chen & Guestrin (KDD 2016,
Appendix A).  It holds entries ``(x, r-, r+, w)`` with ``x`` strictly
increasing, where for every entry

* ``r-(x)`` is a lower bound on the weight of values strictly below ``x``,
* ``r+(x)`` is an upper bound on the weight of values at or below ``x``,
* ``w(x)`` is a lower bound on the weight of values equal to ``x``,

and the first and last entries sit at the exact minimum and maximum.  Bounds
extend to any point ``y`` between entries ``x_i < y < x_{i+1}`` as
``r-(y) = r-(x_i) + w(x_i)``, ``r+(y) = r+(x_{i+1}) - w(x_{i+1})`` (the
paper's extension of the rank functions).  Merge adds the extended bounds of
its inputs over the union of their points and keeps the larger error; prune
keeps the entries answering the rank queries ``i * W / b``, which adds
``1/b``.  The certified error of a summary is computed from its entries
(:attr:`Summary.epsilon`); the a-priori :attr:`Summary.bound` tracks the
worst case and is never exceeded by it.

Input policy
------------
* NaN is missing: counted in ``missing_count`` and ``missing_weight``, never ranked.
* ``-0.0`` and ``+0.0`` are one value (reported as ``+0.0``).
* ``+inf`` and ``-inf`` are ranked as the extreme values they are (they may be
  the minimum or maximum entry).
* float64, float32 (and float16), integer and boolean arrays are accepted and
  ranked as float64.  Integers beyond ``+-2**53`` raise :class:`InputError`:
  float64 cannot hold them exactly, so neighbouring integers would merge and
  their ranks would be wrong; cast to float64 yourself if that is acceptable.
* Weights must be finite and ``>= 0``; a NaN, infinite or negative weight
  raises :class:`InputError` naming its position.  Zero-weight rows are kept
  as points (an exact summary lists their values) but carry no rank mass.

Construction is the hot path of the whole product: see :func:`exact_entries`
and :func:`pruned_entries`, and benchmarks/README.md for the measurements.
"""

from __future__ import annotations

import os
import threading

import numpy as np

from .errors import InputError

# The optional C kernels (sketchmerge/_kernels.c): one pass where the numpy code below
# takes several, same results bit for bit.  SKETCHMERGE_KERNELS=0 turns them off.
_K = None
if os.environ.get("SKETCHMERGE_KERNELS", "1") != "0":
    try:
        from . import _kernels as _K
    except ImportError:  # not built (no C compiler at install time): numpy paths
        _K = None


def kernels_available() -> bool:
    """True when construction uses the compiled kernels (see DEVELOPERS.md)."""
    return _K is not None

__all__ = ["Summary", "check_values", "check_weights", "exact_entries", "kernels_available",
           "pruned_entries", "release_scratch"]

_F8 = np.float64
_MAX_EXACT_INT = 2**53


def check_values(values, name: str = "values") -> np.ndarray:
    """Validate a 1-D value array and return it as float64 (a view when possible).

    Booleans become 0.0 / 1.0; integers must lie within +-2**53, the range in
    which float64 holds every integer exactly (a larger magnitude raises
    :class:`InputError` instead of silently merging neighbouring integers).
    """
    a = np.asarray(values)
    if a.ndim != 1:
        raise InputError(f"{name}: expected a 1-D array, got shape {a.shape}")
    kind = a.dtype.kind
    if kind == "f":
        if a.dtype.itemsize > 8:
            raise InputError(f"{name}: expected float64 or narrower, got {a.dtype}")
        return a.astype(_F8, copy=False)
    if kind == "b":
        return a.astype(_F8)
    if kind in "iu":
        if a.size and a.dtype.itemsize >= 8:
            big = a > _MAX_EXACT_INT
            if kind == "i":
                big |= a < -_MAX_EXACT_INT
            if big.any():
                bad = int(np.argmax(big))
                raise InputError(
                    f"{name}: integer {int(a[bad])} at position {bad} is beyond +-2**53; "
                    "float64 cannot hold it exactly, so its rank would be wrong. "
                    "Cast the column to float64 yourself if approximate values are acceptable."
                )
        return a.astype(_F8)
    raise InputError(f"{name}: expected a numeric or boolean array, got dtype {a.dtype}")


def check_weights(weights, n: int, name: str = "weights") -> np.ndarray:
    """Validate weights: float64, length ``n``, finite and >= 0.

    Raises :class:`InputError` naming the first offending position.
    """
    w = np.asarray(weights)
    if w.ndim != 1 or w.shape[0] != n:
        raise InputError(f"{name}: expected a 1-D array of length {n}, got shape {w.shape}")
    if w.dtype.kind not in "fiub":
        raise InputError(f"{name}: expected numeric weights, got dtype {w.dtype}")
    w = w.astype(_F8, copy=False)
    if _K is not None and w.flags.c_contiguous:
        i = _K.weights_ok(w)
    else:
        ok = w >= 0.0  # False for NaN and negatives
        ok &= w < np.inf
        i = -1 if ok.all() else int(np.argmin(ok))
    if i >= 0:
        raise InputError(
            f"{name}: weight {float(w[i])!r} at position {i} is not allowed; "
            "weights must be finite and >= 0"
        )
    return w


# ---------------------------------------------------------------------------
# Construction.  Inputs are NaN-free float64 arrays; negative zeros may remain
# (they compare equal to +0.0, and float_keys folds them into +0.0's key).
#
# Measured on the reference machine (benchmarks/README.md), fresh memory is
# a dominant cost at work-unit sizes: the first touch of every 4 KiB page of
# a new array faults, which can cost more than the arithmetic on it.  So the
# per-row temporaries live in per-thread scratch buffers reused from call to
# call (up to about 80 bytes per row of the largest input seen, at most 2**20
# rows per buffer, larger inputs allocate; release_scratch() frees them), and
# only arrays a summary keeps are allocated fresh.
# ---------------------------------------------------------------------------
_SIGN = np.int64(-(2**63))
_LOW63 = np.int64(2**63 - 1)
_U64_MAX = np.uint64(2**64 - 1)
_SAMPLE = 2048          # strided sample that shapes the first-level map
_FINISH_ROWS = 8192     # rows left in refined cells: sort them instead of bucketing again
_SORT_DIV = 4           # targets' cells hold at most 1/_SORT_DIV of the rows: sort them at once
_FIRST_BITS = 16        # at most 2**16 first-level cells
_DIRECT_ROWS = 24       # direct pruned construction from this many rows per unit of capacity
_SCRATCH_MAX = 1 << 20  # scratch buffers up to this many float64 rows are kept per thread
_SCRATCH_BYTES = 8 * _SCRATCH_MAX
EXACT_METHODS = ("auto", "sort", "count", "radix", "buckets")

_tls = threading.local()


def release_scratch() -> None:
    """Free the calling thread's construction scratch buffers.

    Construction keeps per-thread scratch buffers between calls (up to about
    80 bytes per row of the largest input seen, at most 2**20 rows per
    buffer) because fresh memory costs page faults on every call; a thread
    that is done building summaries can give that memory back.
    """
    _tls.bufs = {}


def _scratch(slot: str, n: int, dtype) -> np.ndarray:
    """A per-thread scratch array of ``n`` elements (garbage contents); never return one."""
    dt = np.dtype(dtype)
    need = n * dt.itemsize
    if need > _SCRATCH_BYTES:  # the cap is in bytes: a byte-typed work area counts as its rows
        return np.empty(n, dt)
    bufs = getattr(_tls, "bufs", None)
    if bufs is None:
        bufs = _tls.bufs = {}
    buf = bufs.get(slot)
    if buf is None or buf.nbytes < need:
        # a quarter of headroom: row counts differ a little from unit to unit (NaNs,
        # flagged rows), and replacing a buffer for a few more rows faults it in again
        size = min(max(need + need // 4, 1 << 16), max(need, _SCRATCH_BYTES))
        buf = bufs[slot] = np.empty(size, np.uint8)
    return buf[:need].view(dt)


def float_keys(x, out: np.ndarray | None = None) -> np.ndarray:
    """Order-preserving uint64 image of float64 bits; ``-0.0`` and ``+0.0`` get one key.

    With ``i`` the bits as a signed integer and ``m`` its 63 magnitude bits, a
    non-negative float maps to ``m`` and a negative one to ``-m``; flipping the
    top bit then makes unsigned order float order.  ``-0.0`` (``m = 0``) lands
    on ``+0.0``'s key.  Written into ``out`` (a uint64 array of the same length)
    when given; one scratch temporary.
    """
    i = np.ascontiguousarray(x, dtype=_F8).view(np.int64)
    s = np.right_shift(i, 63, out=_scratch("sign", i.shape[0], np.int64))
    k = np.bitwise_and(i, _LOW63, out=None if out is None else out.view(np.int64))
    np.bitwise_xor(k, s, out=k)
    np.subtract(k, s, out=k)  # conditional negation: (m ^ -1) + 1 == -m
    np.bitwise_xor(k, _SIGN, out=k)
    return k.view(np.uint64)


def key_values(k) -> np.ndarray:
    """Inverse of :func:`float_keys` (a new float64 array shaped like ``k``)."""
    a = np.asarray(k, dtype=np.uint64)
    i = np.bitwise_xor(a.reshape(-1).view(np.int64), _SIGN)
    s = np.right_shift(i, 63)
    np.bitwise_xor(i, s, out=i)
    np.subtract(i, s, out=i)          # magnitude bits
    np.bitwise_and(s, _SIGN, out=s)
    np.bitwise_or(i, s, out=i)        # sign bit back on for negatives
    return i.view(_F8).reshape(a.shape)


def _reduce_keys(k: np.ndarray):
    """In place, ``k -= k.min()`` and then ``k >>= tz``, the trailing zero bits every
    difference shares.  Returns ``(kmin, tz, bits)`` with ``bits`` the bit length of
    the largest reduced key (0 when all keys are equal)."""
    kmin = k.min()
    span = int(k.max()) - int(kmin)
    k -= kmin
    if span == 0:
        return kmin, 0, 0
    orv = int(np.bitwise_or.reduce(k))
    tz = (orv & -orv).bit_length() - 1
    if tz:
        np.right_shift(k, np.uint64(tz), out=k)
    return kmin, tz, (span >> tz).bit_length()


def _run_starts(s: np.ndarray) -> np.ndarray | None:
    """Start of every run of equal values in sorted ``s``; None when all are distinct."""
    n = s.shape[0]
    change = _scratch("runs", n, bool)
    change[0] = True
    np.not_equal(s[1:], s[:-1], out=change[1:])
    if change.all():
        return None
    return np.flatnonzero(change)


def _run_lengths(starts: np.ndarray, n: int) -> np.ndarray:
    """Lengths of the runs starting at ``starts`` (int64: integer cumulative sums are fast)."""
    out = np.empty(starts.shape[0], np.int64)
    np.subtract(starts[1:], starts[:-1], out=out[:-1])
    out[-1] = n - starts[-1]
    return out


def _distinct(s: np.ndarray, ws: np.ndarray | None):
    """Distinct values of sorted ``s`` and their weights (None: one per row, all distinct)."""
    starts = _run_starts(s)
    if starts is None:
        return s, ws
    if ws is None:
        return s[starts], _run_lengths(starts, s.shape[0])
    return s[starts], np.add.reduceat(ws, starts)


def _fold_zero(xu: np.ndarray) -> np.ndarray:
    """Float comparison sorts may keep -0.0 as a run's representative: make it +0.0."""
    np.add(xu, 0.0, out=xu)
    return xu


def _exact_sort(x, w):
    """Comparison sort: np.sort unweighted; weighted, one sort of packed
    ``(key << index bits) | row`` integers when they fit in 64 bits, else argsort."""
    n = x.shape[0]
    if w is None:
        xs = np.sort(x)
        xu, wu = _distinct(xs, None)
        return _fold_zero(xu), wu
    k = float_keys(x)
    kmin, tz, bits = _reduce_keys(k)
    ib = max(1, (n - 1).bit_length())
    if bits + ib <= 64:
        np.left_shift(k, np.uint64(ib), out=k)
        np.bitwise_or(k, np.arange(n, dtype=np.uint64), out=k)
        k.sort()
        order = np.bitwise_and(k, np.uint64((1 << ib) - 1), out=_scratch("order", n, np.uint64))
        ws = np.take(w, order.view(np.int64))
        np.right_shift(k, np.uint64(ib), out=k)
        ku, wu = _distinct(k, ws)
        if tz:
            ku = np.left_shift(ku, np.uint64(tz), out=ku if ku is k else None)
        ku += kmin
        return key_values(ku), wu
    order = np.argsort(x)
    xu, wu = _distinct(x[order], w[order])
    return _fold_zero(xu), wu


def _reduced_keys(x, slot):
    """Keys minus the smallest key, shifted right by their shared trailing zeros (scratch)."""
    k = float_keys(x, out=_scratch(slot, x.shape[0], np.uint64))
    return (k, *_reduce_keys(k))


def _expand_keys(r, kmin, tz):
    r = r.astype(np.uint64, copy=True)
    if tz:
        np.left_shift(r, np.uint64(tz), out=r)
    r += kmin
    return key_values(r)


def _exact_count(x, w, reduced=None):
    """Counting: one histogram bin per possible reduced key (for keys of few significant bits)."""
    r, kmin, tz, bits = _reduced_keys(x, "keys") if reduced is None else reduced
    r = r.view(np.int64)
    size = 1 << bits
    cnt = np.bincount(r, minlength=size)
    nz = np.flatnonzero(cnt)
    wu = cnt[nz] if w is None else np.bincount(r, weights=w, minlength=size)[nz]
    return _expand_keys(nz, kmin, tz), wu


def _exact_radix(x, w, reduced=None):
    """LSD radix sort of the reduced keys, 16 bits per pass (numpy's stable argsort of
    uint16 is a counting sort)."""
    n = x.shape[0]
    d, kmin, tz, bits = _reduced_keys(x, "keys") if reduced is None else reduced
    other = _scratch("keys2", n, np.uint64)
    dig = _scratch("digit", n, np.uint16)
    tmp = _scratch("digit64", n, np.uint64)
    perm = None
    shift = 0
    while shift < bits:
        step = min(16, bits - shift)
        np.right_shift(d, np.uint64(shift), out=tmp)
        np.copyto(dig, tmp, casting="unsafe")  # keeps the low 16 bits
        if step < 16:
            np.bitwise_and(dig, np.uint16((1 << step) - 1), out=dig)
        o = np.argsort(dig, kind="stable")
        np.take(d, o, out=other, mode="clip")  # indices are valid; "clip" skips out's buffering
        d, other = other, d
        perm = o if perm is None else perm[o]
        shift += step
    ku, wu = _distinct(d, None if w is None else np.take(w, perm))
    return _expand_keys(ku, kmin, tz), wu


def _exact_buckets(x, w):
    """One bucket pass: buckets holding one value are taken as they are; only the
    rows of buckets holding several values are sorted."""
    n = x.shape[0]
    k = float_keys(x, out=_scratch("keys", n, np.uint64))
    cells, m, _ = _first_cells(x, n, *_first_map(x, w, n, float(x.min()), float(x.max()))[:5])
    cnt = np.bincount(cells, minlength=m)
    cmin = np.full(m, _U64_MAX, dtype=np.uint64)
    cmax = np.zeros(m, dtype=np.uint64)
    np.minimum.at(cmin, cells, k)
    np.maximum.at(cmax, cells, k)
    single = (cnt > 0) & (cmin == cmax)
    sk = cmin[single]
    sw = cnt[single].astype(_F8) if w is None else np.bincount(cells, weights=w, minlength=m)[single]
    multi = (cnt > 0) & ~single
    if not multi.any():
        return key_values(sk), sw
    rows = np.flatnonzero(np.take(multi, cells, out=_scratch("flags", n, bool)))
    kr = k[rows]
    o = np.argsort(kr)
    mk, mw = _distinct(kr[o], None if w is None else w[rows][o])
    if mw is None:
        mw = np.ones(mk.shape[0], _F8)
    allk = np.concatenate((sk, mk))
    allw = np.concatenate((sw, mw))
    o = np.argsort(allk)  # the two parts hold disjoint keys
    return key_values(allk[o]), allw[o]


def _sample_stats(x: np.ndarray) -> tuple[bool, float, int]:
    """``(few_distinct, top_share, bits)`` from a strided sample of about 1024 rows:
    mostly repeats (a hint of few distinct values), the share of its most
    frequent value, and its significant key bits, a lower bound on those of
    the data (a wider span or fewer shared trailing zeros only add bits)."""
    sample = np.sort(x[:: max(1, x.shape[0] // 1024)])
    bits = _reduce_keys(float_keys(sample))[2]
    starts = _run_starts(sample)
    if starts is None:
        return False, 1.0 / sample.shape[0], bits
    top = int(_run_lengths(starts, sample.shape[0]).max())
    return starts.shape[0] * 4 <= sample.shape[0], top / sample.shape[0], bits



def _monotone(x: np.ndarray) -> int:
    """1 if ``x`` is sorted ascending, -1 if descending, else 0 (a sample decides
    most inputs; only a sorted-looking sample costs a full pass)."""
    n = x.shape[0]
    if n < 2:
        return 1
    s = x[:: max(1, n // 256)]
    flags = _scratch("runs", n - 1, bool)
    if bool(np.all(s[1:] >= s[:-1])) and bool(np.greater_equal(x[1:], x[:-1], out=flags).all()):
        return 1
    if bool(np.all(s[1:] <= s[:-1])) and bool(np.less_equal(x[1:], x[:-1], out=flags).all()):
        return -1
    return 0


def _exact_sorted(x, w, direction):
    """Exact entries of data already in order (ties are adjacent)."""
    if direction < 0:
        x = x[::-1]
        w = None if w is None else w[::-1]
    xu, wu = _distinct(np.array(x, dtype=_F8), None if w is None else np.array(w, dtype=_F8))
    return _fold_zero(xu), wu


def _exact_entries(x, w, method="auto"):
    """:func:`exact_entries`, with ``None`` weights meaning one row per distinct value."""
    n = x.shape[0]
    if n == 0:
        return np.empty(0, _F8), np.empty(0, _F8)
    if method not in EXACT_METHODS:
        raise ValueError(f"method: expected one of {EXACT_METHODS}, got {method!r}")
    if method == "sort":
        return _exact_sort(x, w)
    if method == "buckets":
        return _exact_buckets(x, w)
    if method == "auto":
        return _exact_auto(x, w)
    reduced = _reduced_keys(x, "keys")
    bits = reduced[3]
    if bits == 0:
        return key_values(reduced[1:2]), np.array([float(n) if w is None else float(w.sum())])
    if method == "count":
        if bits > 26:
            raise ValueError(f"method 'count': expected at most 26 significant key bits, got {bits}")
        return _exact_count(x, w, reduced)
    return _exact_radix(x, w, reduced)


def _exact_auto(x, w):
    """The fastest exact method for the input, chosen from the measurements in
    benchmarks/README.md:

    * data already in order: one pass;
    * keys of few significant bits (small integers, codes, flags): counting;
    * few distinct values spread over many key bits: buckets;
    * keys of at most 40 significant bits (float32 data, rounded values): radix;
    * weighted: one sort of packed (key, row) integers when they fit 64 bits
      and no value is heavy, else radix (argsort is slower, much slower on ties);
    * otherwise np.sort.

    A strided sample decides most of this without touching every row.
    """
    n = x.shape[0]
    direction = _monotone(x)
    if direction:
        return _exact_sorted(x, w, direction)
    few, top, sample_bits = _sample_stats(x)
    heavy = top >= 0.05
    reduced = None
    if sample_bits <= 40 or few or w is not None:
        reduced = _reduced_keys(x, "keys")
        bits = reduced[3]
        if bits == 0:
            return key_values(reduced[1:2]), np.array([float(n) if w is None else float(w.sum())])
        if (1 << bits) <= max(1 << 16, 2 * n):
            return _exact_count(x, w, reduced)
        if few:
            return _exact_buckets(x, w)
        if bits <= 40 or (w is not None and (heavy or bits + max(1, (n - 1).bit_length()) > 64)):
            return _exact_radix(x, w, reduced)
    return _exact_sort(x, w)


def exact_entries(x: np.ndarray, w: np.ndarray | None, method: str = "auto"):
    """Distinct sorted values and their weight sums of NaN-free float64 ``x``.

    This is the hot path of exact construction.  ``method`` picks a candidate;
    all give the same values and, up to the summation order of float weights,
    the same weights:

    ``"sort"``     np.sort (unweighted) or one sort of packed (key, row) integers;
    ``"count"``    one histogram bin per possible value, for values whose keys
                   differ in few significant bits (small integers, codes, flags);
    ``"radix"``    LSD radix sort of the keys, 16 bits per pass;
    ``"buckets"``  one bucket pass; only buckets holding several values are sorted;
    ``"auto"``     (default) picks by the significant key bits, the weights and
                   a sample's repeat rate; the measurements behind the choice
                   are in benchmarks/README.md.
    """
    xu, wu = _exact_entries(x, w, method)
    return xu, (np.ones(xu.shape[0], _F8) if wu is None else wu.astype(_F8, copy=False))


def _first_map(x, w, n, xmin, xmax, capacity=2048):
    """Map every row to a first-level cell by a monotone function of its value.

    The map follows the data's binades (the sign-and-exponent field of the
    key): each binade between the minimum and the maximum gets one cell plus
    cells in proportion to its share of a strided sample's weight, and a row's
    cell within its binade is linear in the top 16 mantissa bits.  Cells hold
    roughly equal weight for light and heavy tails alike (a map linear in the
    value fails on heavy tails, one linear in the key wastes most cells on the
    tiny binades around zero).  A value holding at least 1/20 of the sample (a
    point mass such as zero or a sentinel) gets a cell of its own so its rows
    never need refining.  Any monotone map is correct; the map only decides
    how many rows the later levels see.

    Returns the map's parameters ``(emin, ncell, base, size, heavy, wide)``:
    per binade from ``emin`` its cell count and first cell, the cell count
    before the point mass's split, the point mass's key (or None), and whether
    the first level should also record each cell's key range (the sample's
    repeats suggest at most about ``capacity + 1`` distinct values).
    :func:`_first_level` applies the map with numpy, the compiled kernel in
    one pass.
    """
    m_bits = int(min(_FIRST_BITS, max(8, (max(n // 4, 1) - 1).bit_length())))
    step = max(1, n // _SAMPLE)
    sample = x[::step]
    sk = float_keys(sample)
    sw = None if w is None else w[::step]
    heavy = None
    sorted_k = np.sort(sk)
    starts = _run_starts(sorted_k)
    repeats, s_eff = 0 if starts is None else sorted_k.shape[0] - starts.shape[0], sorted_k.shape[0]
    if starts is not None and starts.shape[0] > 1:
        runs = _run_lengths(starts, sorted_k.shape[0])
        top = int(np.argmax(runs))
        if runs[top] * 20 >= sorted_k.shape[0]:
            heavy = sorted_k[starts[top]]
            keep = sk != heavy
            sk = sk[keep]
            sw = None if sw is None else sw[keep]
            # the point mass gets a cell of its own: judge the other values alone
            repeats -= int(runs[top]) - 1
            s_eff -= int(runs[top])
    # Record the cells' key ranges (wide) only when the values may be few enough for
    # an exact summary: d equally frequent values show s - d (1 - exp(-s / d))
    # repeats in a sample of s, unequal frequencies more; wide from half of what
    # d = capacity + 1 would show.  Otherwise no decision needs the ranges (the
    # pruned entries do not depend on them), and a table of one word per cell
    # stays in cache.
    d = float(capacity + 1)
    wide = s_eff > 0 and repeats >= 0.5 * (s_eff - d * -np.expm1(-s_eff / d))
    emin, emax = (int(e) >> 52 for e in float_keys(np.array([xmin, xmax])))
    se = np.right_shift(sk, np.uint64(52)).view(np.int64)
    share = np.bincount(se, weights=sw, minlength=emax + 1)[emin:emax + 1]
    tot = float(share.sum())
    ncell = np.ones(emax + 1 - emin, np.int64)
    if tot > 0.0:
        ncell += (share / tot * (1 << m_bits)).astype(np.int64)  # (not M / tot: tot may be subnormal)
    np.minimum(ncell, 1 << 16, out=ncell)  # a binade resolves at most 16 mantissa bits here
    base = np.cumsum(ncell) - ncell
    size = int(base[-1] + ncell[-1])
    return emin, ncell, base, size, heavy, wide


def _first_cells(x, n, emin, ncell, base, size, heavy):
    """Apply the map of :func:`_first_map` to every row with numpy.

    Returns ``(cells, M, heavy_cell)``: ``cells`` is a scratch buffer, ``M``
    the cell count, ``heavy_cell`` the index of the point mass's own cell or -1.
    """
    k = float_keys(x, out=_scratch("cells", n, np.uint64))
    e = np.right_shift(k, np.uint64(52), out=_scratch("binade", n, np.uint64)).view(np.int64)
    e -= emin
    g = _scratch("gather", n, np.int64)
    np.right_shift(k, np.uint64(36), out=k)
    np.bitwise_and(k, np.uint64(0xFFFF), out=k)
    cells = k.view(np.int64)
    cells *= np.take(ncell, e, out=g, mode="clip")
    np.right_shift(cells, 16, out=cells)
    cells += np.take(base, e, out=g, mode="clip")
    heavy_cell = -1
    if heavy is not None:
        hv = float(key_values(heavy))
        hcell = _heavy_cell(heavy, emin, ncell, base) - 1
        flag = _scratch("flags", n, bool)
        # the heavy value's cell c splits in three: rows below it stay in c, the value
        # itself gets c + 1, rows above it c + 2; later cells move up by 2
        np.greater(cells, hcell, out=flag)
        np.add(cells, flag, out=cells, casting="unsafe")
        np.add(cells, flag, out=cells, casting="unsafe")
        at = np.flatnonzero(cells == hcell)
        xa = x[at]
        cells[at] += (xa >= hv).astype(np.int64) + (xa > hv)
        heavy_cell = hcell + 1
        size += 2
    return cells, size, heavy_cell


def _first_level(x, w, n, emin, ncell, base, size, heavy_key, wide=True):
    """The first level: every row's cell and, per cell, the weight (summed in
    row order) and, when ``wide``, the row count and the smallest and largest key.

    Returns ``(cells, m, heavy_cell, cnt, hw, kmin, kmax)``.  ``kmin`` and
    ``kmax`` are None unless ``wide``; ``cnt`` is None when neither ``wide``
    nor unweighted (``hw`` is then the only histogram: one word per cell keeps
    the table in cache).  ``cells`` is a scratch buffer (int32 from the
    compiled kernel, which does it all in one pass, int64 from numpy); the
    numpy route computes the same numbers (np.bincount also sums in row order).
    """
    if _K is not None and x.flags.c_contiguous and (w is None or w.flags.c_contiguous):
        m = size + 2 if heavy_key is not None else size
        heavy = _heavy_cell(heavy_key, emin, ncell, base) if heavy_key is not None else -1
        words = 4 if wide else 1
        table = _scratch("table", words * m, np.uint64).reshape(m, words)
        cells = _scratch("cells32", n, np.int32)  # half the bytes of int64: the refine pass reads them
        _K.first_level(x, w, emin, ncell, base, _heavy_arg(heavy_key, heavy), cells,
                       table.reshape(-1), wide)
        # strided views of the scratch table; every later use copies what it keeps
        if wide:  # a cell's count, weight and key range
            cnt, kmin, kmax = table[:, 0].view(np.int64), table[:, 2], table[:, 3]
            hw = None if w is None else table[:, 1].view(_F8)
        else:  # a cell's weight, or its count
            kmin = kmax = None
            cnt = table[:, 0].view(np.int64) if w is None else None
            hw = None if w is None else table[:, 0].view(_F8)
    else:
        cells, m, heavy = _first_cells(x, n, emin, ncell, base, size, heavy_key)
        cnt = np.bincount(cells, minlength=m) if wide or w is None else None
        hw = None if w is None else np.bincount(cells, weights=w, minlength=m)
        kmin = kmax = None
        if wide:
            k = float_keys(x, out=_scratch("binade", n, np.uint64))
            kmin = np.full(m, _U64_MAX, np.uint64)
            kmax = np.zeros(m, np.uint64)
            np.minimum.at(kmin, cells, k)
            np.maximum.at(kmax, cells, k)
    if hw is None:
        hw = cnt.astype(_F8)
    return cells, m, heavy, cnt, hw, kmin, kmax


def _cells_at(v, emin, ncell, base, heavy_key, heavy):
    """First-level cells of a few values ``v`` (the map of :func:`_first_cells`,
    without its scratch buffers)."""
    k = float_keys(v)
    e = np.clip(np.right_shift(k, np.uint64(52)).astype(np.int64) - emin, 0, ncell.shape[0] - 1)
    c = (np.right_shift(k, np.uint64(36)) & np.uint64(0xFFFF)).astype(np.int64)
    c = ((c * ncell[e]) >> 16) + base[e]
    if heavy_key is not None:
        hv, hcell = float(key_values(heavy_key)), heavy - 1
        c = c + np.where(c > hcell, 2, np.where(c == hcell, (v >= hv).astype(np.int64) + (v > hv), 0))
    return c


def _select(cells, pidx, n):
    """The rows (ascending) whose cell is flagged (``pidx[cell] >= 0``); may be scratch."""
    if _K is not None:
        sel_rows = _scratch("select", n, np.int64)
        return sel_rows[:_K.select(cells, (pidx >= 0).view(np.uint8), sel_rows)]
    return np.flatnonzero(np.take(pidx >= 0, cells, out=_scratch("flags", n, bool), mode="clip"))


def _heavy_arg(heavy_key, heavy):
    """The kernels' form of the point mass: None or (value, cell it splits)."""
    return None if heavy_key is None else (float(key_values(heavy_key)), heavy - 1)


def _cell_ranks_numpy(cnt, hw, w, d):
    """Each cell's exclusive cumulative weight (integer counts sum faster and exactly)
    and the cell answering each target rank ``d``."""
    m = hw.shape[0]
    ex = np.empty(m, _F8)
    ex[0] = 0.0
    ex[1:] = np.cumsum(cnt[:-1]) if w is None else np.cumsum(hw[:-1])
    pos = _locate(d, ex + hw, hw, np.zeros(d.shape[0], np.int64), np.full(d.shape[0], m, np.int64))
    return ex, pos


def _cell_ranks(cnt, hw, w, d):
    """:func:`_cell_ranks_numpy` and the number of occupied cells (positive weight, or
    a positive count unweighted): the compiled kernel in one pass, or numpy."""
    h = hw if w is not None else None
    c = cnt if w is None else None
    arr = h if h is not None else c
    if _K is not None and arr.flags.c_contiguous:
        ex = _scratch("cell_ex", arr.shape[0], _F8)
        pos = np.empty(d.shape[0], np.int64)
        nocc = _K.cell_ranks(h, c, d, ex, pos)
        return ex, pos, nocc
    ex, pos = _cell_ranks_numpy(cnt, hw, w, d)
    return ex, pos, int(np.count_nonzero(arr))


def _locate(dv, cend, h, lo, cnt):
    """Cell answering each target rank ``dv``: the first cell with ``cend >= dv``
    (the exact rule of :meth:`Summary._query_index`) and positive weight,
    searched within each target's own range ``[lo, lo + cnt)``."""
    pos = np.searchsorted(cend, dv, side="left")
    np.clip(pos, lo, lo + cnt - 1, out=pos)
    bad = h[pos] <= 0.0
    if bad.any():  # float noise at a range's end: step to the nearest weighted cell in range
        idx = np.arange(h.shape[0])
        prev = np.maximum.accumulate(np.where(h > 0.0, idx, -1))
        nxt = np.minimum.accumulate(np.where(h > 0.0, idx, h.shape[0])[::-1])[::-1]
        pb, lb = pos[bad], lo[bad]
        cand = prev[pb]
        use_next = cand < lb
        cand[use_next] = nxt[pb[use_next]]
        pos[bad] = cand
    return pos


def _sorted_unique(a: np.ndarray) -> np.ndarray:
    """Distinct values of an integer array (np.unique hashes, which is slow on small arrays here)."""
    if a.shape[0] > 1 and not bool(np.all(a[1:] >= a[:-1])):
        a = np.sort(a)
    if a.shape[0] < 2:
        return a
    m = np.empty(a.shape[0], dtype=bool)
    m[0] = True
    np.not_equal(a[1:], a[:-1], out=m[1:])
    return a[m]


def _exclusive_cumsum(a):
    out = np.empty(a.shape[0], _F8)
    if a.shape[0]:
        out[0] = 0.0
        np.cumsum(a[:-1], out=out[1:])
    return out


def pruned_entries(x: np.ndarray, w: np.ndarray | None, capacity: int):
    """Entries of ``exact(x, w).prune(capacity)``, found without sorting every row.

    Returns ``None`` when the caller should build the exact summary instead
    (and prune it): at most ``capacity + 1`` rows, one value, zero total
    weight, data already in order (the exact summary is then one pass), a
    sample that is mostly repeats, or at most ``capacity + 1`` occupied
    first-level cells; the last two mean few distinct values, where the exact
    methods are faster still and the summary may stay exact.  Otherwise returns ``(values, rmin, weight,
    total)`` of the entries: the minimum, the maximum and, for each target
    rank ``d = i * W / capacity`` (``0 < i < capacity``), the first value
    whose weight at or below reaches ``d``, each with its exact rank sums.
    The weight strictly between two neighbours is then below
    ``W / capacity``, so the certified epsilon is at most ``1 / capacity``.

    Method: rows go to first-level cells by a monotone map of their value
    (:func:`_first_level`); one weighted histogram gives every cell's rank
    range.  Only cells holding a target rank are refined: their rows get a
    finer key-linear histogram per cell, repeatedly, until each target's cell
    holds a single value or few enough rows remain to sort them.  Most rows
    see three vectorised passes (map, histogram, membership) and no sort.
    """
    got = _direct(x, w, capacity)
    return None if got is None or got[1] is None else got


def _heavy_cell(heavy, emin, ncell, base) -> int:
    """The point mass's own first-level cell (see :func:`_first_cells`)."""
    he = (int(heavy) >> 52) - emin
    return int(base[he] + ((((int(heavy) >> 36) & 0xFFFF) * int(ncell[he])) >> 16)) + 1


def _direct(x, w, capacity, stats=None):
    """:func:`pruned_entries`, or ``(values, None, weights, total)``: the exact
    entries, when the first level finds every occupied cell holding a single
    value (the caller then prunes the exact summary).  ``stats`` is ``(min,
    max, order)`` of ``x`` when the caller scanned it already."""
    n = x.shape[0]
    b = int(capacity)
    if n <= b + 1:
        return None
    if stats is None and _K is not None and x.flags.c_contiguous:
        stats = _K.scan(x)[1:]
    if stats is not None:
        xmin, xmax, order = stats
    else:
        order = _monotone(x)
        xmin, xmax = float(np.min(x)), float(np.max(x))
    if order or not xmin < xmax:
        return None
    total = float(n) if w is None else float(np.sum(w))
    if not total > 0.0:
        return None
    kmin, kmax = float_keys(np.array([xmin, xmax]))
    emin, ncell, base, size, heavy_key, wide = _first_map(x, w, n, xmin, xmax, b)
    cells, m, heavy, cnt, hw, first_mn, first_mx = _first_level(x, w, n, emin, ncell, base, size,
                                                                heavy_key, wide)
    d = np.arange(1, b, dtype=_F8) * (total / b)
    if first_mn is None:
        # not wide: the cells' cumulative weights, the targets' cells and the number of
        # occupied cells (by weight when weighted) are all that is needed
        ex, pos, nocc = _cell_ranks(cnt, hw, w, d)
        if nocc <= b + 1:
            return None  # few occupied cells, not measured: the exact methods
    else:
        ex = pos = None
        occ = np.flatnonzero(cnt)
        multi = occ[first_mn[occ] != first_mx[occ]]
    if first_mn is not None and multi.shape[0] == 0:
        # every occupied cell holds one value: the histogram is the exact summary
        return key_values(first_mn[occ]), None, (cnt[occ] if w is None else hw[occ]), total
    if first_mn is not None and occ.shape[0] <= b + 1:
        # few occupied cells: few distinct values, and the summary may stay exact. Sort the
        # rows of the cells holding several values (when they are few) for the exact entries.
        nmulti = int(cnt[multi].sum())
        if nmulti * _SORT_DIV > n and nmulti > _FINISH_ROWS:
            return None  # the exact methods
        pidx = np.full(m, -1, np.int32)
        pidx[multi] = np.arange(multi.shape[0])
        dk, dw, _ = _refine(x, w, cells, pidx, _select(cells, pidx, n), multi.shape[0])
        one = occ[first_mn[occ] == first_mx[occ]]
        keys = np.concatenate((first_mn[one], dk))
        wts = np.concatenate(((cnt[one] if w is None else hw[one]).astype(_F8), dw))
        o = np.argsort(keys)  # distinct keys: cells are disjoint key ranges
        return key_values(keys[o]), None, wts[o], total
    # the extremes' cells (by count, the first and last occupied: the map is monotone)
    ends = [int(c) for c in _cells_at(np.array([xmin, xmax]), emin, ncell, base, heavy_key, heavy)]
    if ex is None:
        ex, pos = _cell_ranks_numpy(cnt, hw, w, d)
    t_idx = np.arange(d.shape[0])
    res_k = np.zeros(d.shape[0], np.uint64)
    res_lo = np.zeros(d.shape[0], _F8)
    res_w = np.zeros(d.shape[0], _F8)
    wmin = wmax = None
    if heavy >= 0:  # the point mass's cell holds one value: no refining
        hk = heavy_key
        at = pos == heavy
        res_k[at], res_lo[at], res_w[at] = hk, ex[heavy], hw[heavy]
        t_idx, pos = t_idx[~at], pos[~at]
        if ends[0] == heavy:
            wmin = float(hw[heavy])
        if ends[1] == heavy:
            wmax = float(hw[heavy])
        ends = [c for c in ends if c != heavy]
    # the cells of the minimum and maximum join the first refinement, to weigh those values
    par = _sorted_unique(np.concatenate((pos, np.array(ends, np.int64))))
    pidx = np.full(m, -1, np.int32)
    pidx[par] = np.arange(par.shape[0])
    t_par = pidx[pos]
    par_c, par_h = ex[par], hw[par]
    npar = par.shape[0]
    rows = _select(cells, pidx, n)
    nrows = rows.shape[0]
    if nrows * _SORT_DIV <= n or nrows <= _FINISH_ROWS:
        # usual case: sort the rows of those cells once and read the targets off
        dk, dw, dpar = _refine(x, w, cells, pidx, rows, npar)
        if wmin is None:  # the extremes' cells are the first and last parents
            wmin = float(dw[0])
        if wmax is None:
            wmax = float(dw[-1])
        _answer_targets(dk, dw, dpar, par_c, npar, d, t_idx, t_par, res_k, res_lo, res_w)
        return _entries(kmin, kmax, res_k, res_lo, res_w, wmin, wmax, total)
    # the map left many rows in the targets' cells (values packed into a few
    # mantissa steps): refine those cells by finer histograms, level by level
    if first_mn is not None:
        first_mn, first_mx = first_mn[par], first_mx[par]
    rp = pidx[cells[rows]]
    has_t = np.zeros(par.shape[0], bool)
    has_t[t_par] = True
    first = True
    while True:
        kr = float_keys(x[rows])
        wr = None if w is None else w[rows]
        if first:
            first = False
            if wmin is None:
                at = kr == kmin
                wmin = float(np.count_nonzero(at) if w is None else wr[at].sum())
            if wmax is None:
                at = kr == kmax
                wmax = float(np.count_nonzero(at) if w is None else wr[at].sum())
        npar = par_c.shape[0]
        if rows.shape[0] <= _FINISH_ROWS:
            # few rows left: sort them (parents are disjoint key ranges, in key order)
            if wr is None:  # parents are key ranges in parent order: a plain sort groups them
                ks = np.sort(kr)
                sorted_par = np.repeat(np.arange(npar), np.bincount(rp, minlength=npar))
            else:
                o = np.argsort(kr)
                ks, sorted_par = kr[o], rp[o]
            starts = _run_starts(ks)
            if starts is None:
                starts = np.arange(ks.shape[0])
            dk = ks[starts]
            dw = (_run_lengths(starts, ks.shape[0]).astype(_F8) if wr is None
                  else np.add.reduceat(wr[o], starts))
            dpar = sorted_par[starts]
            _answer_targets(dk, dw, dpar, par_c, npar, d, t_idx, t_par, res_k, res_lo, res_w)
            break
        if first_mn is not None:  # the first level measured the first parents
            pmn, pmx, first_mn = first_mn, first_mx, None
        else:
            pmn = np.full(npar, _U64_MAX, np.uint64)
            pmx = np.zeros(npar, np.uint64)
            np.minimum.at(pmn, rp, kr)
            np.maximum.at(pmx, rp, kr)
        single = pmn == pmx
        ts = single[t_par]
        if ts.any():
            tt, tp = t_idx[ts], t_par[ts]
            res_k[tt], res_lo[tt], res_w[tt] = pmn[tp], par_c[tp], par_h[tp]
            t_idx, t_par = t_idx[~ts], t_par[~ts]
        keep = ~single & has_t
        if not keep.any():
            break
        if not keep.all():
            newi = np.cumsum(keep) - 1
            sel = keep[rp]
            rows, rp, kr = rows[sel], newi[rp[sel]], kr[sel]
            wr = None if wr is None else wr[sel]
            t_par = newi[t_par]
            pmn, pmx, par_c = pmn[keep], pmx[keep], par_c[keep]
            npar = par_c.shape[0]
        # split each parent's key range into about one sub-cell per row
        nsub = np.clip(np.bincount(rp, minlength=npar), 2, 1 << 16)
        scale = nsub / ((pmx - pmn).astype(_F8) + 1.0)
        loc = (kr - pmn[rp]).astype(_F8)
        loc *= scale[rp]
        loc = loc.astype(np.int64)
        np.minimum(loc, nsub[rp] - 1, out=loc)
        base = np.cumsum(nsub) - nsub
        sub = loc + base[rp]
        tot = int(base[-1] + nsub[-1])
        hs = np.bincount(sub, weights=wr, minlength=tot)
        if wr is None:
            hs = hs.astype(_F8)
        subpar = np.repeat(np.arange(npar), nsub)
        sex = _exclusive_cumsum(hs)
        sc = par_c[subpar] + (sex - sex[base][subpar])
        p = _locate(d[t_idx], sc + hs, hs, base[t_par], nsub[t_par])
        newpar = _sorted_unique(p)
        sidx = np.full(tot, -1, np.int64)
        sidx[newpar] = np.arange(newpar.shape[0])
        t_par = sidx[p]
        ps = sidx[sub]
        sel = ps >= 0
        rows, rp = rows[sel], ps[sel]
        par_c, par_h = sc[newpar], hs[newpar]
        has_t = np.ones(newpar.shape[0], bool)
    return _entries(kmin, kmax, res_k, res_lo, res_w, wmin, wmax, total)


def _answer_targets(dk, dw, dpar, par_c, npar, d, t_idx, t_par, res_k, res_lo, res_w):
    """Answer targets ``t_idx`` from the distinct keys ``dk`` (weights ``dw``) of their
    parents ``dpar`` (in key order; parent ``j`` starts at rank ``par_c[j]``): each
    target gets the first key whose weight at or below reaches it, with its exact ranks."""
    dex = _exclusive_cumsum(dw)
    first_d = np.searchsorted(dpar, np.arange(npar))
    nd = np.bincount(dpar, minlength=npar)
    dc = par_c[dpar] + (dex - dex[first_d][dpar])
    if t_idx.shape[0]:
        p = _locate(d[t_idx], dc + dw, dw, first_d[t_par], nd[t_par])
        res_k[t_idx], res_lo[t_idx], res_w[t_idx] = dk[p], dc[p], dw[p]


def _entries(kmin, kmax, res_k, res_lo, res_w, wmin, wmax, total):
    """The pruned entries: the extremes and each target's answer, one per distinct value."""
    keys = np.concatenate(([kmin], res_k, [kmax]))
    lo = np.concatenate(([0.0], res_lo, [total - wmax]))
    ww = np.concatenate(([wmin], res_w, [wmax]))
    if not bool(np.all(keys[1:] >= keys[:-1])):  # float noise reordered two targets
        o = np.argsort(keys, kind="stable")
        keys, lo, ww = keys[o], lo[o], ww[o]
    first_i = np.flatnonzero(np.concatenate(([True], keys[1:] != keys[:-1])))
    return key_values(keys[first_i]), lo[first_i], ww[first_i], total


def _refine(x, w, cells, pidx, rows, npar):
    """Distinct keys, weight sums and parent index of the given rows (ascending,
    each in a flagged cell: ``pidx[cell]`` is its parent, ``0 <= pidx < npar``),
    in key order: the compiled kernel, or numpy with the same order of
    additions (ties in row order, np.bincount).  The results may be scratch."""
    if _K is not None and x.flags.c_contiguous and (w is None or w.flags.c_contiguous):
        k = rows.shape[0]
        dk = _scratch("refine_k", k, np.uint64)
        dw = _scratch("refine_w", k, _F8)
        dpar = _scratch("refine_p", k, np.int64)
        work = _scratch("refine_work", 8 * (npar + 1 + 2 * (2 * k + 1)), np.uint8)
        g = _K.refine(x, w, cells, pidx, np.ascontiguousarray(rows, np.int64), npar, dk, dw, dpar,
                      work)
        return dk[:g], dw[:g], dpar[:g]
    kr = float_keys(x[rows])
    o = np.argsort(kr, kind="stable")  # parents are disjoint key ranges in order
    ks = kr[o]
    change = np.empty(ks.shape[0], bool)
    change[0] = True
    np.not_equal(ks[1:], ks[:-1], out=change[1:])
    starts = np.flatnonzero(change)
    gid = np.cumsum(change) - 1
    dw = np.bincount(gid, weights=None if w is None else w[rows[o]], minlength=starts.shape[0])
    return ks[starts], dw.astype(_F8, copy=False), pidx[cells[rows[o[starts]]]].astype(np.int64)


def _extended(x, rmin, rmax, w, total, z):
    """Rank bounds ``(r-, r+, w)`` of a summary at sorted points ``z``.

    At an entry its own bounds; between entries ``x_{g-1} < y < x_g`` the
    extension ``r-(y) = r-(x_{g-1}) + w(x_{g-1})``, ``r+(y) = r+(x_g) - w(x_g)``;
    below the minimum 0 and above the maximum the total weight (both exact,
    since the end entries are the true extremes).
    """
    k = x.shape[0]
    if k == 0:
        zero = np.zeros(z.shape[0], _F8)
        return zero, zero.copy(), zero.copy()
    g = np.searchsorted(x, z, side="left")  # entries strictly below each point
    j = np.minimum(g, k - 1)
    hit = x[j] == z
    lo_gap = np.empty(k + 1, _F8)
    hi_gap = np.empty(k + 1, _F8)
    lo_gap[0] = hi_gap[0] = 0.0
    lo_gap[k] = hi_gap[k] = total
    np.add(rmin[:-1], w[:-1], out=lo_gap[1:k])
    np.subtract(rmax[1:], w[1:], out=hi_gap[1:k])
    return (np.where(hit, rmin[j], lo_gap[g]), np.where(hit, rmax[j], hi_gap[g]),
            np.where(hit, w[j], 0.0))


def _merged_bounds(parts):
    """Union of the parts' points with the sums of their extended bounds there.

    At each point ``z`` of the union, ``sum_p r-_p(z)``, ``sum_p r+_p(z)`` and
    ``sum_p w_p(z)`` with the extension of :func:`_extended`, added part by
    part in order from 0.0.  Each part's bound at ``z`` is exact (an entry's
    own field, or one addition of two of them), so the sums are within a few
    ulps of the true sums.  The compiled kernel walks the parts once (a k-way
    merge); the numpy route searches each part and adds in the same order, so
    both give the same bits.
    """
    if _K is not None:
        x = np.concatenate([p._x for p in parts])
        n = x.shape[0]
        off = np.zeros(len(parts) + 1, np.int64)
        np.cumsum([p._x.shape[0] for p in parts], out=off[1:])
        out = [np.empty(n, _F8) for _ in range(4)]
        cnt = _K.merge_bounds(x, np.concatenate([p._rmin for p in parts]),
                              np.concatenate([p._rmax for p in parts]),
                              np.concatenate([p._w for p in parts]), off,
                              np.array([p._total for p in parts], _F8), *out)
        # shared points make the union shorter: copy only when that frees much memory
        return tuple(a[:cnt].copy() if 4 * cnt < 3 * n else a[:cnt] for a in out)
    z = np.unique(np.concatenate([p._x for p in parts]))
    lo, hi, wz = np.zeros(z.shape[0], _F8), np.zeros(z.shape[0], _F8), np.zeros(z.shape[0], _F8)
    for p in parts:
        a, b, c = _extended(p._x, p._rmin, p._rmax, p._w, p._total, z)
        lo += a
        hi += b
        wz += c
    return z, lo, hi, wz


class Summary:
    """A weighted quantile summary of one numeric column.

    Build one with :meth:`from_values`, combine with :meth:`merge`, shrink with
    :meth:`prune`, ask it with :meth:`quantiles` and :meth:`rank_bounds`.
    Instances are immutable (their arrays are read-only).

    Examples
    --------
    >>> import numpy as np
    >>> from sketchmerge import Summary
    >>> s = Summary.from_values(np.array([3.0, 1.0, 2.0, np.nan]), weights=[1, 1, 2, 5])
    >>> s.quantiles([0.0, 0.5, 1.0]).tolist()
    [1.0, 2.0, 3.0]
    >>> s.missing_weight, s.epsilon
    (5.0, 0.0)
    """

    __slots__ = (
        "_x", "_rmin", "_rmax", "_w", "_total", "_count", "_missing_count",
        "_missing_weight", "_bound", "_exact", "_dtype",
    )

    def __init__(self, x, rmin, rmax, w, *, total_weight, count, missing_count=0,
                 missing_weight=0.0, bound=0.0, exact=False, dtype="float64"):
        arrs = []
        for a in (x, rmin, rmax, w):
            a = np.array(a, dtype=_F8, copy=True)
            a.setflags(write=False)
            arrs.append(a)
        self._x, self._rmin, self._rmax, self._w = arrs
        self._total = float(total_weight)
        self._count = int(count)
        self._missing_count = int(missing_count)
        self._missing_weight = float(missing_weight)
        self._bound = float(bound)
        self._exact = bool(exact)
        self._dtype = str(dtype)

    # ------------------------------------------------------------------ build
    @classmethod
    def from_values(cls, values, weights=None, *, capacity: int | None = None) -> "Summary":
        """Summary of a 1-D array: exact, or directly pruned to ``capacity``.

        Parameters
        ----------
        values : array_like
            float64, float32, integer or boolean values.  NaN is missing.
        weights : array_like, optional
            Row weights, finite and >= 0 (default 1 per row).  Zero-weight rows
            are kept as points but carry no rank mass.
        capacity : int, optional
            ``None`` (default): the exact summary, ``epsilon == 0``.  An integer
            ``b >= 1``: a summary of at most ``b + 1`` entries with a-priori
            ``bound == 1 / b`` and certified ``epsilon <= bound``, equal (up to
            the summation order of float weights) to
            ``from_values(values, weights).prune(b)`` but built without sorting
            every row.  Data with at most ``b + 1`` distinct values stays exact.

        Raises
        ------
        InputError
            For a non-1-D or non-numeric array, an integer beyond +-2**53, a
            NaN, infinite or negative weight (the message names its position),
            or a capacity that is not a positive integer.

        Examples
        --------
        >>> import numpy as np
        >>> from sketchmerge import Summary
        >>> x = np.arange(100_000.0)
        >>> s = Summary.from_values(x, capacity=100)
        >>> len(s), s.bound, s.epsilon <= s.bound
        (101, 0.01, True)
        """
        raw = np.asarray(values)
        dtype = raw.dtype.name
        x = check_values(raw)
        w = None if weights is None else check_weights(weights, x.shape[0])
        if capacity is not None:
            capacity = _check_capacity(capacity)
        return cls._from_checked(x, w, dtype, capacity)

    @classmethod
    def _from_checked(cls, x, w, dtype="float64", capacity=None, method="auto") -> "Summary":
        stats = None
        if _K is not None and x.flags.c_contiguous:
            n_nan, xmin, xmax, order = _K.scan(x)  # one pass: NaNs, extremes, order
            stats = (xmin, xmax, order)
            has_nan = n_nan > 0
        else:
            nan = np.isnan(x, out=_scratch("nan", x.shape[0], bool))
            has_nan = bool(nan.any())
        if has_nan and stats is not None and (w is None or w.flags.c_contiguous):
            n = x.shape[0]
            xk = _scratch("kept_x", n - n_nan, _F8)
            wk = None if w is None else _scratch("kept_w", n - n_nan, _F8)
            wm = None if w is None else np.empty(n_nan, _F8)
            _K.compact(x, w, xk, wk, wm)
            missing_count = n_nan
            missing_weight = float(missing_count if w is None else np.sum(wm))
            x, w = xk, wk
        elif has_nan:
            if stats is not None:
                nan = np.isnan(x, out=_scratch("nan", x.shape[0], bool))
            missing_count = int(np.count_nonzero(nan))
            missing_weight = float(missing_count if w is None else w[nan].sum())
            keep = ~nan
            x = x[keep]
            w = None if w is None else w[keep]
        else:
            missing_count, missing_weight = 0, 0.0
        # -0.0 and +0.0 compare equal, sort together and get one key: they are one value
        common = dict(count=x.shape[0], missing_count=missing_count,
                      missing_weight=missing_weight, dtype=dtype)
        if capacity is not None and x.shape[0] > capacity + 1:
            # the direct route pays per target rank; it wins once rows outnumber them well
            got = _direct(x, w, capacity, stats) if x.shape[0] >= _DIRECT_ROWS * capacity else None
            if got is None:
                return cls._exact_from_entries(*_exact_entries(x, w, method), **common).prune(capacity)
            xe, lo, we, total = got
            if lo is None:  # the exact entries, found by the first level alone
                return cls._exact_from_entries(xe, we, **common).prune(capacity)
            return cls._own(xe, lo, lo + we, we, total_weight=total, bound=1.0 / capacity,
                            exact=False, **common)
        return cls._exact_from_entries(*_exact_entries(x, w, method), **common)

    @classmethod
    def _exact_from_entries(cls, xu, wu, *, count, missing_count=0, missing_weight=0.0,
                            dtype="float64") -> "Summary":
        """Exact summary from distinct sorted values and their weight sums
        (``wu=None``: one unit of weight each).

        Ranks are computed canonically (a cumulative sum), so an exact summary
        is fully determined by ``(x, w)``: the blob format stores only those.
        ``rmin`` and ``rmax`` are two views of one array of ``len + 1`` sums.
        """
        k = xu.shape[0]
        if wu is None:
            c = np.arange(k + 1, dtype=_F8)
            wu = np.broadcast_to(np.float64(1.0), (k,))
        elif wu.dtype.kind in "iub":
            c = np.empty(k + 1, _F8)
            c[0] = 0.0
            # row counts: an integer cumulative sum is exact and several times faster
            c[1:] = np.cumsum(wu, out=_scratch("cumsum", k, np.int64))
            wu = wu.astype(_F8)
        else:
            c = np.empty(k + 1, _F8)
            c[0] = 0.0
            np.cumsum(wu, out=c[1:])
        return cls._own(xu, c[:-1], c[1:], wu, total_weight=float(c[-1]), count=count,
                        missing_count=missing_count, missing_weight=missing_weight,
                        bound=0.0, exact=True, dtype=dtype)

    @classmethod
    def _own(cls, x, rmin, rmax, w, **kw) -> "Summary":
        """Build from float64 arrays nobody else holds (no copies; they become read-only)."""
        s = cls.__new__(cls)
        for name, a in (("_x", x), ("_rmin", rmin), ("_rmax", rmax), ("_w", w)):
            a = np.asarray(a, dtype=_F8)
            if a.flags.writeable:
                a.flags.writeable = False
            object.__setattr__(s, name, a)
        s._total = float(kw["total_weight"])
        s._count = int(kw["count"])
        s._missing_count = int(kw.get("missing_count", 0))
        s._missing_weight = float(kw.get("missing_weight", 0.0))
        s._bound = float(kw.get("bound", 0.0))
        s._exact = bool(kw.get("exact", False))
        s._dtype = str(kw.get("dtype", "float64"))
        return s

    @classmethod
    def empty(cls, dtype="float64") -> "Summary":
        """A summary of no values."""
        e = np.empty(0, _F8)
        return cls(e, e, e, e, total_weight=0.0, count=0, exact=True, dtype=dtype)

    # ------------------------------------------------------------- properties
    @property
    def values(self) -> np.ndarray:
        """Entry points, strictly increasing (read-only)."""
        return self._x

    @property
    def rmin(self) -> np.ndarray:
        """Lower bounds on the weight strictly below each entry (read-only)."""
        return self._rmin

    @property
    def rmax(self) -> np.ndarray:
        """Upper bounds on the weight at or below each entry (read-only)."""
        return self._rmax

    @property
    def weights(self) -> np.ndarray:
        """Lower bounds on the weight at each entry (read-only)."""
        return self._w

    @property
    def total_weight(self) -> float:
        """Total weight of the ranked (non-missing) values."""
        return self._total

    @property
    def count(self) -> int:
        """Number of ranked (non-missing) rows, zero-weight rows included."""
        return self._count

    @property
    def missing_count(self) -> int:
        return self._missing_count

    @property
    def missing_weight(self) -> float:
        return self._missing_weight

    @property
    def min(self) -> float:
        """Smallest ranked value (NaN for an empty summary)."""
        return float(self._x[0]) if self._x.size else float("nan")

    @property
    def max(self) -> float:
        """Largest ranked value (NaN for an empty summary)."""
        return float(self._x[-1]) if self._x.size else float("nan")

    @property
    def dtype(self) -> str:
        """Name of the numpy dtype of the values the summary was built from."""
        return self._dtype

    @property
    def is_exact(self) -> bool:
        """True while no information has been dropped (every distinct value is an entry)."""
        return self._exact

    @property
    def bound(self) -> float:
        """The a-priori error bound: 0 for exact, +1/b per prune, max over merges."""
        return self._bound

    @property
    def epsilon(self) -> float:
        """Certified normalised rank error computed from the entries (Lemma A.2).

        ``max(max_i(r+_i - r-_i - w_i), max_i(r+_{i+1} - w_{i+1} - r-_i - w_i)) / W``.
        Exact summaries report 0: their ranks are exact sums (float64 rounding
        at the 1e-16 * W level is not counted).
        """
        if self._exact or self._total <= 0.0 or self._x.size == 0:
            return 0.0
        x, lo, hi, w = self._x, self._rmin, self._rmax, self._w
        e = float(np.max(hi - lo - w))
        if x.size > 1:
            e = max(e, float(np.max((hi[1:] - w[1:]) - (lo[:-1] + w[:-1]))))
        return max(e, 0.0) / self._total

    def __len__(self) -> int:
        return int(self._x.size)

    def __repr__(self) -> str:
        return (f"Summary(entries={len(self)}, count={self._count}, total_weight={self._total:g}, "
                f"missing_count={self._missing_count}, epsilon={self.epsilon:.3g}, dtype={self._dtype})")

    def __eq__(self, other) -> bool:
        if not isinstance(other, Summary):
            return NotImplemented
        return (self._count == other._count and self._missing_count == other._missing_count
                and self._total == other._total and self._missing_weight == other._missing_weight
                and self._bound == other._bound and self._exact == other._exact
                and self._dtype == other._dtype
                and all(np.array_equal(a, b) for a, b in zip(
                    (self._x, self._rmin, self._rmax, self._w),
                    (other._x, other._rmin, other._rmax, other._w))))

    __hash__ = None  # mutable-looking value semantics; not hashable

    # ------------------------------------------------------------ operations
    def merge(self, *others: "Summary") -> "Summary":
        """Merge with other summaries (no pruning).

        Bounds at every point of the union are the sums of the inputs' extended
        bounds; the error is the max of the inputs' errors.  Exact inputs give
        an exact result.
        """
        parts = (self,) + others
        for o in others:
            if not isinstance(o, Summary):
                raise TypeError(f"can only merge Summary objects, got {type(o).__name__}")
        count = sum(p._count for p in parts)
        mcount = sum(p._missing_count for p in parts)
        mweight = float(sum(p._missing_weight for p in parts))
        dtype = _common_dtype([p._dtype for p in parts])
        nonempty = [p for p in parts if p._x.size]
        if not nonempty:
            out = Summary.empty(dtype)
            return Summary(out._x, out._rmin, out._rmax, out._w, total_weight=0.0, count=count,
                           missing_count=mcount, missing_weight=mweight, exact=True, dtype=dtype)
        if all(p._exact for p in nonempty):
            xs = np.concatenate([p._x for p in nonempty])
            ws = np.concatenate([p._w for p in nonempty])
            if len(nonempty) > 1:
                order = np.argsort(xs, kind="stable")
                xs, ws = xs[order], ws[order]
                starts = np.flatnonzero(np.concatenate(([True], xs[1:] != xs[:-1])))
                xs, ws = xs[starts], np.add.reduceat(ws, starts)
            return Summary._exact_from_entries(xs, ws, count=count, missing_count=mcount,
                                               missing_weight=mweight, dtype=dtype)
        z, lo, hi, wz = _merged_bounds(nonempty)
        total = float(sum(p._total for p in nonempty))
        bound = max(p._bound for p in nonempty)
        return Summary(z, lo, hi, wz, total_weight=total, count=count, missing_count=mcount,
                       missing_weight=mweight, bound=bound, exact=False, dtype=dtype)

    def prune(self, capacity: int) -> "Summary":
        """Keep at most ``capacity + 1`` entries: those answering ranks ``i*W/capacity``.

        Adds ``1/capacity`` to the a-priori bound.  A no-op (the same object)
        when the summary already has at most ``capacity + 1`` entries, so data
        with few distinct values stays exact.
        """
        capacity = _check_capacity(capacity)
        k = self._x.size
        if k <= capacity + 1:
            return self
        # targets 0 and W are the first and last entries, kept anyway: querying
        # them too could add an entry (a zero-weight minimum answers nothing)
        d = np.arange(1, capacity, dtype=_F8) * (self._total / capacity)
        keep = np.zeros(k, dtype=bool)
        keep[self._query_index(d)] = True
        keep[0] = keep[-1] = True
        return Summary(self._x[keep], self._rmin[keep], self._rmax[keep], self._w[keep],
                       total_weight=self._total, count=self._count,
                       missing_count=self._missing_count, missing_weight=self._missing_weight,
                       bound=self._bound + 1.0 / capacity, exact=False, dtype=self._dtype)

    def _query_index(self, d: np.ndarray) -> np.ndarray:
        """Entry index answering each absolute target rank in ``d``.

        Exact summaries invert the weighted empirical CDF: the first value
        whose weight at or below reaches ``d`` (Hyndman & Fan 1996 definition
        1, numpy's ``method="inverted_cdf"``; :meth:`quantiles` applies the
        same rule in normalised rank and answers ``q = 0`` with the first
        value carrying weight, as numpy does).  Other summaries use the query
        of Chen & Guestrin (2016, Appendix A): between the two entries whose
        rank midpoints bracket ``d``, the one on ``d``'s side of the midpoint
        of the gap between them, ties going to the lower entry as in the exact
        rule.  Either way the answer's rank interval is within ``epsilon / 2``
        of ``d``.
        """
        lo, hi, w = self._rmin, self._rmax, self._w
        k = lo.size
        if self._exact:
            return np.minimum(np.searchsorted(hi, d, side="left"), k - 1)
        mid = (lo + hi) * 0.5
        i = np.searchsorted(mid, d, side="left") - 1
        out = np.empty(d.shape[0], dtype=np.int64)
        first = i < 0
        last = i >= k - 1
        inner = ~first & ~last
        out[first] = 0
        out[last] = k - 1
        j = i[inner]
        dj = d[inner]
        left = 2.0 * dj <= (lo[j] + w[j]) + (hi[j + 1] - w[j + 1])
        out[inner] = np.where(left, j, j + 1)
        return out

    def quantiles(self, q) -> np.ndarray:
        """Values at normalised target ranks ``q`` in [0, 1] (array in, array out).

        Each returned value's exact rank interval ``[weight below, weight at
        or below] / W`` lies within ``epsilon / 2`` of its target.  An exact
        summary answers with the weighted inverse empirical CDF: the first
        value whose normalised weight at or below is ``>= q`` (Hyndman & Fan
        1996 definition 1, the same answers as ``numpy.quantile(x, q,
        weights=w, method="inverted_cdf")``), and ``q = 0`` with the first
        value carrying weight.  An empty summary answers NaN.

        Examples
        --------
        >>> import numpy as np
        >>> from sketchmerge import Summary
        >>> Summary.from_values(np.array([15.0, 20, 35, 40, 50])).quantiles([0.3, 0.4, 0.5]).tolist()
        [20.0, 20.0, 35.0]
        """
        q = np.asarray(q, dtype=_F8)
        scalar = q.ndim == 0
        qa = np.atleast_1d(q).ravel()
        bad = ~((qa >= 0.0) & (qa <= 1.0))
        if bad.any():
            raise InputError(f"quantiles: expected targets in [0, 1], got {qa[bad][0]!r}")
        if self._x.size == 0:
            out = np.full(qa.shape, np.nan)
        elif self._exact and self._total > 0.0:
            # compare in normalised rank, as numpy does, so that boundary cases
            # (q * W landing exactly on a cumulative weight) round the same way
            cdf = self._rmax / self._total
            idx = np.searchsorted(cdf, qa, side="left")
            idx[qa <= 0.0] = np.searchsorted(cdf, 0.0, side="right")
            out = self._x[np.minimum(idx, self._x.size - 1)]
        else:
            out = self._x[self._query_index(qa * self._total)]
        out = out.reshape(np.shape(q))
        return out[()] if scalar else out

    def rank_bounds(self, x):
        """Lower and upper bounds, normalised by the total weight, on the rank of points ``x``.

        ``lower <= weight(values < x) / W`` and ``weight(values <= x) / W <= upper``.
        Returns two arrays shaped like ``x``.
        """
        xa = np.asarray(x, dtype=_F8)
        flat = xa.ravel() + 0.0
        if np.isnan(flat).any():
            raise InputError("rank_bounds: expected points that are not NaN, got NaN")
        if self._total <= 0.0:
            z = np.zeros(flat.shape, _F8)
            return z.reshape(xa.shape), z.copy().reshape(xa.shape)
        lo, hi, _ = _extended(self._x, self._rmin, self._rmax, self._w, self._total, flat)
        return (lo / self._total).reshape(xa.shape), (hi / self._total).reshape(xa.shape)

    # ------------------------------------------------------------ bytes
    def to_bytes(self) -> bytes:
        """Serialize to a self-describing msgpack blob (docs/FORMAT.md)."""
        from .blob import encode_summary

        return encode_summary(self)

    @classmethod
    def from_bytes(cls, blob) -> "Summary":
        """Decode a blob written by :meth:`to_bytes`; raises FormatError on bad bytes."""
        from .blob import decode_summary

        return decode_summary(blob)


def _check_capacity(capacity) -> int:
    if isinstance(capacity, (bool, np.bool_)) or not isinstance(capacity, (int, np.integer)) or capacity < 1:
        raise InputError(f"capacity: expected an integer >= 1, got {capacity!r}")
    return int(capacity)


def _common_dtype(names):
    """Source dtype of a merge, for reporting only (values are float64 inside)."""
    first = names[0]
    return first if all(n == first for n in names) else "float64"
