"""Binning rows with a cut table's edges (the training side's hot path).

The contract (kept exactly, see :mod:`sketchmerge.cuts`): with ``k`` strictly
increasing edges, bin ``i`` holds ``x`` with ``edges[i-1] < x <= edges[i]``,
values above the last edge fall in bin ``k - 1``, NaN gets code ``k``, a
feature without edges codes everything 0, and ``-0.0 == 0.0``.  In other
words the code of a non-missing ``x`` is ``min(#{edges < x}, k - 1)``, the
answer of a left binary search clipped to the last bin.

How it is fast without a compiled extension
-------------------------------------------
A binary search over 256 edges is eight dependent, unpredictable branches
per value.  Instead each feature gets a small index (:class:`EdgeIndex`):

* a *cell function* ``cell(x)``, monotone non-decreasing in ``x``, mapping the
  clipped value range onto 4096 cells (up to 65536 when edges crowd), and
  computed with a handful of whole-array numpy operations.  Two kinds exist and the one with
  the fewer edges per cell is chosen per feature: a uniform grid over the
  values (``(x - lo) * scale``, good for bounded features) and a uniform grid
  over the order-preserving integer image of the float bits (roughly
  logarithmic, good for heavy tails and for infinite edges);
* a table ``start[c]`` = number of edges whose cell is below ``c``;
* a branchless search of ``p = ceil(log2(m + 1))`` steps over the at most
  ``m`` edges that share a cell.

Because ``cell`` is monotone, every edge in a lower cell is below ``x`` and
every edge in a higher cell is above it, so ``start[cell(x)]`` plus the
in-cell count is exactly ``#{edges < x}``, whatever rounding ``cell`` does:
the edges' own cells are computed by the very same operations.  Values are
clipped to ``[edges[0], edges[-1]]`` first, which gives the clip to the last
bin for free (the edges, or float32 thresholds below, are strictly
increasing, so a value clipped to the last edge counts ``k - 1`` edges below
it); NaN is patched afterwards.  Typical features need one search
step, so a value costs about ten cache-resident vector passes instead of a
binary search.

Rows are processed in cache-sized chunks written straight into the output
columns, and chunks of different row blocks run on a thread pool (numpy
releases the GIL inside these kernels).

float32 inputs are compared in float32, without an upcast copy.  For a float64
edge ``e`` let ``t`` be the largest float32 ``<= e``.  For every float32 ``x``:
``x > e`` implies ``x > t``; and ``x > t`` means ``x`` is at least the next
float32 after ``t``, which is ``> e`` by the choice of ``t``.  So ``x > e`` iff
``x > t``.  When two edges round down to the same ``t`` (they lie within one
float32 step), that feature's float32 chunks are upcast to float64 instead.

Imports numpy only at module level; pyarrow and pandas inputs are recognised
by duck typing so neither is imported unless the caller passed one.
"""

from __future__ import annotations

import os
import threading
from concurrent.futures import ThreadPoolExecutor

import numpy as np

from .errors import InputError

__all__ = ["EdgeIndex", "bin_columns", "default_threads", "reference_codes"]

#: rows per chunk: a chunk's temporaries (a few arrays of 8-byte elements) stay in L2
CHUNK_ROWS = 1 << 14
#: rows per thread-pool task (a few dozen tasks for a few million rows)
BLOCK_ROWS = 1 << 18
#: inputs with fewer values than this are binned on the calling thread
_THREAD_MIN_VALUES = 1 << 20
#: bytes of a transposed block of a row-major 2-D input (see ``_rowmajor_block``)
_BLOCK_BYTES = 1 << 22
#: cell counts tried per feature; the start table of the largest is 512 KiB
_CELL_CHOICES = (1 << 12, 1 << 14, 1 << 16)

_I64_SIGN = np.int64(-(2**63))
_I32_SIGN = np.int32(-(2**31))

_tls = threading.local()


class _Work:
    """Per-thread scratch arrays of one chunk (reused: fresh pages cost more than the arithmetic)."""

    def __init__(self, n: int):
        self.n = n
        self.f = [np.empty(n, np.float64) for _ in range(2)]
        self.i = [np.empty(n, np.int64) for _ in range(3)]
        self.b = [np.empty(n, np.bool_) for _ in range(2)]
        self.x = np.empty(n, np.float64)
        self.block = None

    def floats(self, j: int, n: int, ftype) -> np.ndarray:
        a = self.f[j]
        return a[:n] if ftype is np.float64 else a.view(np.float32)[:n]

    def ints(self, j: int, n: int, bits: int = 64) -> np.ndarray:
        a = self.i[j]
        return a[:n] if bits == 64 else a.view(np.int32)[:n]


def _work() -> _Work:
    w = getattr(_tls, "work", None)
    if w is None:
        w = _tls.work = _Work(CHUNK_ROWS)
    return w


def default_threads() -> int:
    """Threads used by :func:`bin_columns` when not told: the CPUs this process may use (at most 16)."""
    try:
        n = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):  # not on Linux
        n = os.cpu_count() or 1
    return max(1, min(n, 16))


# --------------------------------------------------------------------------- the index
def _keys(a: np.ndarray, bits: int, out: np.ndarray) -> np.ndarray:
    """Order-preserving unsigned image of float bits, written into the signed array ``out``.

    Non-negative floats get their sign bit set, negative floats get every bit
    flipped; unsigned order of the result is float order (``-0.0`` just below
    ``+0.0``, positive NaN above ``+inf``, negative NaN below ``-inf``).
    """
    it, sign, ut = ((np.int64, _I64_SIGN, np.uint64) if bits == 64 else (np.int32, _I32_SIGN, np.uint32))
    b = a.view(it)
    np.right_shift(b, bits - 1, out=out)  # 0 for non-negative, all ones for negative
    np.bitwise_or(out, sign, out=out)
    np.bitwise_xor(out, b, out=out)
    return out.view(ut)


class _Grid:
    """One domain's (float64 or float32) cell function, start table and padded edges.

    ``kind`` is ``"value"`` (cell = trunc((clip(x) - lo) * scale) in ``ftype``
    arithmetic) or ``"key"`` (cell = (clip(key(x)) - lo) >> shift in unsigned
    ``bits``-bit integers).  ``padded`` holds the edges (or their keys)
    followed by ``2**steps`` sentinels that compare above every clipped value.
    """

    __slots__ = ("kind", "ftype", "bits", "lo", "hi", "scale", "shift", "start", "padded", "steps")

    def __init__(self, kind, ftype, bits, lo, hi, scale=None, shift=0):
        self.kind, self.ftype, self.bits = kind, ftype, bits
        self.lo, self.hi, self.scale, self.shift = lo, hi, scale, shift
        self.start = self.padded = None
        self.steps = 0

    def cells(self, v: np.ndarray, tmp: np.ndarray, out: np.ndarray) -> np.ndarray:
        """Cells of already clipped values (keys for ``"key"``) ``v``, into the intp array ``out``."""
        if self.kind == "value":
            np.subtract(v, self.lo, out=tmp)
            np.multiply(tmp, self.scale, out=tmp)
            np.copyto(out, tmp, casting="unsafe")  # truncation is floor here: tmp >= 0
        else:
            ut = tmp.dtype.type
            np.subtract(v, self.lo, out=tmp)
            np.right_shift(tmp, ut(self.shift), out=out, casting="unsafe")
        return out


def _value_grid(t: np.ndarray, ftype, cells: int):
    """Uniform grid over ``[t[0], t[-1]]`` in ``ftype`` arithmetic, or None when the range is unusable."""
    lo, hi = ftype(t[0]), ftype(t[-1])
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        width = ftype(hi - lo)
        scale = ftype(ftype(cells) / width) if width > 0 else ftype(np.inf)
        top = ftype(width * scale)
    if not all(np.isfinite(v) for v in (lo, hi, width, scale, top)) or not (width > 0 and scale > 0):
        return None
    g = _Grid("value", ftype, 0, lo, hi, scale=scale)
    return g, g.cells(t, np.empty(t.size, ftype), np.empty(t.size, np.intp)), t


def _key_grid(t: np.ndarray, bits: int, cells: int):
    it, ut = (np.int64, np.uint64) if bits == 64 else (np.int32, np.uint32)
    ke = _keys(np.ascontiguousarray(t), bits, np.empty(t.size, it)).copy()
    lo, hi = ut(ke[0]), ut(ke[-1])
    shift = max(0, (int(hi) - int(lo)).bit_length() - (cells - 1).bit_length())
    g = _Grid("key", None, bits, lo, hi, shift=shift)
    return g, g.cells(ke, np.empty(t.size, ut), np.empty(t.size, np.intp)), ke


def _steps(ce: np.ndarray) -> int:
    """Search steps for the most edges sharing one cell, ``m``: ``ceil(log2(m + 1))``."""
    return int(np.bincount(ce).max()).bit_length()


def _best_grid(t: np.ndarray, ftype, bits: int) -> _Grid:
    """The grid needing the fewest search steps; ties go to fewer cells, then to the value grid."""
    best = None
    for cells in _CELL_CHOICES:
        for rank, make in ((0, lambda: _value_grid(t, ftype, cells)), (1, lambda: _key_grid(t, bits, cells))):
            got = make()
            if got is None:
                continue
            cand = (_steps(got[1]), cells, rank)
            if best is None or cand < best[0]:
                best = (cand, got)
        if best is not None and best[0][0] <= 1:
            break  # one step is the least there is
    (steps, _, _), (g, ce, vals) = best
    g.steps = steps
    g.start = np.searchsorted(ce, np.arange(int(ce[-1]) + 1), side="left").astype(np.intp)
    sentinel = np.inf if g.kind == "value" else np.iinfo(vals.dtype).max
    g.padded = np.concatenate([vals, np.full(1 << steps, sentinel, dtype=vals.dtype)])
    return g


def _round_down_f32(edges: np.ndarray) -> np.ndarray:
    """Largest float32 ``<= e`` for every float64 edge (see the module docstring)."""
    with np.errstate(over="ignore"):
        t = edges.astype(np.float32)
    up = t.astype(np.float64) > edges
    t[up] = np.nextafter(t[up], np.float32(-np.inf))
    return t + np.float32(0.0)  # -0.0 -> +0.0


class EdgeIndex:
    """The compiled lookup of one feature's edges; build once, bin many arrays.

    Parameters
    ----------
    edges : array_like
        Strictly increasing float64 edges (may be empty).

    Examples
    --------
    >>> import numpy as np
    >>> ix = EdgeIndex(np.array([1.0, 2.0, 4.0]))
    >>> out = np.empty(6, np.uint8)
    >>> ix.bin(np.array([0.5, 1.0, 1.5, 4.0, 9.0, np.nan]), out).tolist()
    [0, 0, 1, 2, 2, 3]
    """

    def __init__(self, edges):
        e = np.asarray(edges, dtype=np.float64).ravel() + 0.0  # -0.0 -> +0.0
        if np.isnan(e).any() or (e.size > 1 and not np.all(e[1:] > e[:-1])):
            raise InputError("edges: expected strictly increasing values without NaN")
        e.setflags(write=False)
        self.edges = e
        self.k = int(e.size)
        self._g64 = _best_grid(e, np.float64, 64) if self.k > 1 else None
        self._g32 = None
        self._g32_done = self.k <= 1
        self._lock = threading.Lock()

    def _grid32(self) -> _Grid | None:
        """The float32 grid, or None when two edges share a float32 rounding (then upcast)."""
        if not self._g32_done:
            with self._lock:
                if not self._g32_done:
                    t = _round_down_f32(self.edges)
                    if np.all(t[1:] > t[:-1]):
                        self._g32 = _best_grid(t, np.float32, 32)
                    self._g32_done = True
        return self._g32

    def describe(self) -> dict:
        """Which grid each domain uses: kind, cells and search steps (for benchmarks and tests)."""
        out: dict = {"edges": self.k}
        for name, g in (("float64", self._g64), ("float32", self._grid32())):
            if g is not None:
                out[name] = {"kind": g.kind, "cells": int(g.start.size), "steps": g.steps}
        return out

    def bin(self, x, out: np.ndarray | None = None) -> np.ndarray:
        """Codes of the 1-D numeric array ``x`` (into ``out``, any integer array, when given)."""
        x = np.asarray(x)
        if x.ndim != 1:
            raise InputError(f"expected a 1-D array, got shape {x.shape}")
        if out is None:
            out = np.empty(x.shape[0], np.uint8 if self.k <= 255 else np.uint16)
        w = _work()
        for r0 in range(0, x.shape[0], CHUNK_ROWS):
            r1 = min(x.shape[0], r0 + CHUNK_ROWS)
            self._chunk(x[r0:r1], out[r0:r1], None, w)
        return out

    # ------------------------------------------------------------ the kernel
    def _chunk(self, x: np.ndarray, out: np.ndarray, nulls, w: _Work) -> None:
        """Codes of at most ``w.n`` values ``x`` into ``out``; ``nulls`` marks Arrow nulls."""
        n, k = x.shape[0], self.k
        kind, size = x.dtype.kind, x.dtype.itemsize
        if kind not in "fiub" or (kind == "f" and size > 8):
            raise InputError(f"expected numeric or boolean values, got dtype {x.dtype}")
        if k <= 1:
            out[...] = 0
        else:
            if kind == "f" and size == 8 and x.dtype.isnative:
                g = self._g64
            elif kind == "f" and size <= 4 and (g := self._grid32()) is not None:
                if size < 4 or not x.dtype.isnative:
                    x = _cast(x, w.x.view(np.float32)[:n])
            else:
                g = self._g64
                x = _cast(x, w.x[:n])
            self._search(g, x, out, w)
        if k >= 1:
            if kind == "f":
                nan = np.isnan(x, out=w.b[1][:n])
                if nan.any():
                    np.copyto(out, k, where=nan)
            if nulls is not None:
                np.copyto(out, k, where=nulls)

    @staticmethod
    def _search(g: _Grid, x: np.ndarray, out: np.ndarray, w: _Work) -> None:
        n = x.shape[0]
        cell, pos, idx = w.i[0][:n], w.i[1][:n], w.i[2][:n]
        if g.kind == "value":
            v, tmp = w.floats(0, n, g.ftype), w.floats(1, n, g.ftype)
            np.fmax(x, g.lo, out=v)  # NaN -> lo (patched by the caller)
            np.fmin(v, g.hi, out=v)  # above the last edge counts as the last edge
        else:
            v = _keys(x, g.bits, out=w.ints(2, n, g.bits))
            np.clip(v, g.lo, g.hi, out=v)
            tmp = w.f[1].view(v.dtype)[:n]
        g.cells(v, tmp, cell)
        np.take(g.start, cell, out=pos, mode="clip")
        got = w.f[1].view(g.padded.dtype)[:n]
        gt = w.b[0][:n]
        step = 1 << (g.steps - 1)
        while step:  # branchless search over the few edges that share a cell
            if step == 1:
                np.take(g.padded, pos, out=got, mode="clip")
                np.greater(v, got, out=gt)
                np.add(pos, gt, out=pos)
            else:
                np.add(pos, step - 1, out=cell)
                np.take(g.padded, cell, out=got, mode="clip")
                np.greater(v, got, out=gt)
                np.multiply(gt, step, out=cell)
                np.add(pos, cell, out=pos)
            step >>= 1
        np.copyto(out, pos, casting="unsafe")


def _cast(x: np.ndarray, buf: np.ndarray) -> np.ndarray:
    np.copyto(buf, x, casting="unsafe")
    return buf


def reference_codes(x, edges) -> np.ndarray:
    """The contract as a plain ``np.searchsorted`` (the benchmark baseline and the test oracle)."""
    e = np.asarray(edges, np.float64)
    xf = np.asarray(x).astype(np.float64)
    if e.size == 0:
        return np.zeros(xf.shape, np.int64)
    code = np.searchsorted(e, xf, side="left")
    np.minimum(code, e.size - 1, out=code)
    code[np.isnan(xf)] = e.size
    return code


# --------------------------------------------------------------------------- inputs
class _Column:
    """One input column as numpy pieces (contiguous or strided) covering its rows in order.

    A piece is ``(row_start, row_stop, values, bitmap)``: ``values`` is a numpy
    array or a :class:`_BoolBits`; ``bitmap`` is ``(uint8 array, bit offset)``
    of an Arrow validity bitmap, or None.
    """

    __slots__ = ("name", "pieces")

    def __init__(self, name, pieces):
        self.name = name
        self.pieces = pieces

    @property
    def rows(self) -> int:
        return self.pieces[-1][1] if self.pieces else 0

    def slices(self, r0: int, r1: int):
        """Yield ``(a, b, values, nulls)`` covering the rows ``[a, b)`` of ``[r0, r1)``."""
        for s, e, vals, bitmap in self.pieces:
            if e <= r0 or s >= r1:
                continue
            a, b = max(s, r0), min(e, r1)
            v = vals[a - s:b - s]
            if isinstance(v, _BoolBits):
                v = v()
            yield a, b, v, None if bitmap is None else _nulls_from_bitmap(bitmap, a - s, b - s)


def _nulls_from_bitmap(bitmap, a: int, b: int) -> np.ndarray:
    """Null flags of rows ``[a, b)`` from an Arrow validity bitmap ``(uint8 array, bit offset)``."""
    bits, off = bitmap
    lo, n = off + a, b - a
    valid = np.unpackbits(bits[lo >> 3:(lo + n + 7) >> 3], bitorder="little")[lo & 7:(lo & 7) + n]
    return valid == 0


class _BoolBits:
    """The 0/1 values of (a slice of) a bit-packed Arrow boolean array, unpacked on demand."""

    __slots__ = ("bits", "off", "a", "b")

    def __init__(self, bits, off, a=0, b=None):
        self.bits, self.off, self.a, self.b = bits, off, a, b

    def __getitem__(self, sl):
        return _BoolBits(self.bits, self.off, self.a + sl.start, self.a + sl.stop)

    def __call__(self) -> np.ndarray:
        lo, n = self.off + self.a, self.b - self.a
        return np.unpackbits(self.bits[lo >> 3:(lo + n + 7) >> 3], bitorder="little")[lo & 7:(lo & 7) + n]


def _numeric(dtype) -> bool:
    return dtype.kind in "iub" or (dtype.kind == "f" and dtype.itemsize <= 8)


def _numpy_column(a, name: str) -> _Column:
    a = np.asarray(a)
    if a.ndim != 1:
        raise InputError(f"column {name!r}: expected a 1-D array, got shape {a.shape}")
    if not _numeric(a.dtype):
        raise InputError(f"column {name!r}: expected numeric or boolean values, got dtype {a.dtype}")
    return _Column(name, [(0, a.shape[0], a, None)])


def _arrow_column(col, name: str) -> _Column:
    """Zero-copy views of an Arrow column's chunks (values buffer plus validity bitmap)."""
    import pyarrow as pa

    chunks = col.chunks if isinstance(col, pa.ChunkedArray) else [col]
    pieces, start = [], 0
    for ch in chunks:
        n = len(ch)
        if n == 0:
            continue
        t = ch.type
        if pa.types.is_dictionary(t):
            ch = ch.dictionary_decode()
            t = ch.type
        if pa.types.is_null(t):
            pieces.append((start, start + n, np.full(n, np.nan), None))
            start += n
            continue
        if pa.types.is_decimal(t):
            ch = ch.cast(pa.float64())  # no numeric view of decimals exists: converted once
            t = ch.type
        if not (pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_boolean(t)):
            raise InputError(f"column {name!r}: expected numeric or boolean values, got Arrow type {t}")
        bufs = ch.buffers()
        off = ch.offset
        bitmap = (np.frombuffer(bufs[0], np.uint8), off) if ch.null_count and bufs[0] is not None else None
        if pa.types.is_boolean(t):
            vals = _BoolBits(np.frombuffer(bufs[1], np.uint8), off)
        else:
            vals = np.frombuffer(bufs[1], dtype=np.dtype(t.to_pandas_dtype()), count=off + n)[off:]
        pieces.append((start, start + n, vals, bitmap))
        start += n
    return _Column(name, pieces)


def _pandas_column(s, name: str) -> _Column:
    dt = s.dtype
    if isinstance(dt, np.dtype):
        return _numpy_column(s.to_numpy(copy=False), name)  # a view of the frame's block
    arr = s.array
    if type(dt).__name__ == "ArrowDtype" and hasattr(arr, "__arrow_array__"):
        return _arrow_column(arr.__arrow_array__(), name)  # zero-copy Arrow chunks
    try:  # nullable extension dtypes: one float64 copy with NaN for NA
        vals = s.to_numpy(dtype=np.float64, na_value=np.nan)
    except (TypeError, ValueError) as e:
        raise InputError(f"column {name!r}: expected numeric or boolean values, got dtype {dt}") from e
    return _numpy_column(vals, name)


def _any_column(v, name: str) -> _Column:
    if isinstance(v, np.ndarray):
        return _numpy_column(v, name)
    mod = type(v).__module__
    if mod.startswith("pyarrow"):
        return _arrow_column(v, name)
    if mod.startswith("pandas"):
        return _pandas_column(v, name)
    return _numpy_column(np.asarray(v), name)


def _lacks(have, names) -> None:
    absent = [n for n in names if n not in have]
    if absent:
        raise InputError(f"data lacks {len(absent)} of the requested columns: {', '.join(map(repr, absent))}")


def _columns(data, names) -> tuple[int, list[_Column]]:
    """``(rows, one _Column per name)`` for a dict, an Arrow table/batch or a pandas frame."""
    if isinstance(data, dict):
        _lacks(data, names)
        cols = [_any_column(data[n], n) for n in names]
    elif hasattr(data, "column_names") and hasattr(data, "column") and hasattr(data, "num_rows"):
        _lacks(set(data.column_names), names)  # pyarrow Table / RecordBatch
        cols = [_arrow_column(data.column(n), n) for n in names]
    elif hasattr(data, "columns") and hasattr(data, "iloc"):  # pandas DataFrame
        _lacks(set(data.columns), names)
        cols = [_pandas_column(data[n], n) for n in names]
    else:
        raise InputError(f"expected a 2-D numpy array, a dict of 1-D arrays, a pyarrow Table or "
                         f"a pandas DataFrame, got {type(data).__name__}")
    lengths = {c.name: c.rows for c in cols}
    if len(set(lengths.values())) > 1:
        raise InputError(f"expected columns of one length, got lengths {lengths}")
    return (next(iter(lengths.values())) if lengths else 0), cols


# --------------------------------------------------------------------------- driver
def bin_columns(data, names, indexes, dtype, out=None, threads=None) -> np.ndarray:
    """Codes for ``data`` (see :meth:`sketchmerge.cuts.CutTable.bin`).

    Parameters
    ----------
    data : 2-D numpy array, dict of 1-D arrays, pyarrow Table / RecordBatch or pandas DataFrame
    names : list of str
        Column names (for a 2-D array: the features of its columns, in order).
    indexes : list of EdgeIndex or of edge arrays
        One per name.
    dtype : numpy dtype
        Code dtype of a freshly allocated result (uint8 or uint16).
    out : numpy array, optional
        A writable ``(rows, len(names))`` uint8/uint16 array (any memory layout) to fill.
    threads : int, optional
        Worker threads (default :func:`default_threads`; 1 bins on the calling thread).
    """
    names = list(names)
    indexes = [ix if isinstance(ix, EdgeIndex) else EdgeIndex(ix) for ix in indexes]
    if len(indexes) != len(names):
        raise InputError(f"expected one edge index per name, got {len(indexes)} for {len(names)} names")
    matrix = isinstance(data, np.ndarray)
    if matrix:
        if data.ndim != 2 or data.shape[1] != len(names):
            raise InputError(f"expected a 2-D array with {len(names)} columns (one per feature), "
                             f"got shape {data.shape}")
        if not _numeric(data.dtype):
            raise InputError(f"expected numeric or boolean values, got dtype {data.dtype}")
        rows, cols = data.shape[0], None
    else:
        rows, cols = _columns(data, names)
    dtype = np.dtype(dtype)
    shape = (rows, len(names))
    if out is None:
        out = np.empty(shape, dtype=dtype)
    elif (not isinstance(out, np.ndarray) or out.shape != shape or out.dtype not in (np.uint8, np.uint16)
          or out.dtype.itemsize < dtype.itemsize or not out.flags.writeable):
        got = f"{out.dtype} {out.shape}" if isinstance(out, np.ndarray) else type(out).__name__
        wider = " or uint16" if dtype == np.uint8 else ""
        raise InputError(f"out: expected a writable {dtype.name}{wider} array of shape {shape}, got {got}")
    if rows == 0 or not names:
        return out
    if threads is None:
        nthreads = default_threads()
    elif isinstance(threads, (bool, np.bool_)) or not isinstance(threads, (int, np.integer)) or threads < 1:
        raise InputError(f"threads: expected an integer >= 1, got {threads!r}")
    else:
        nthreads = int(threads)
    rowmajor = matrix and data.strides[0] != data.itemsize and data.shape[1] > 1
    step = CHUNK_ROWS
    if rowmajor:  # transposed blocks: keep a block of all columns within a few MiB
        step = max(256, min(CHUNK_ROWS, _BLOCK_BYTES // (8 * data.shape[1])))

    def run(r0: int, r1: int) -> None:
        w = _work()
        # chunk-major inside a block: a chunk's output rows stay in cache while
        # each of its columns is binned
        for c0 in range(r0, r1, step):
            c1 = min(r1, c0 + step)
            if matrix:
                block = _rowmajor_block(data, c0, c1, w) if rowmajor else None
                for j, ix in enumerate(indexes):
                    x = block[j, :c1 - c0] if rowmajor else data[c0:c1, j]
                    _guard(ix, x, out[c0:c1, j], None, w, names[j])
            else:
                for j, (col, ix) in enumerate(zip(cols, indexes)):
                    for a, b, vals, nulls in col.slices(c0, c1):
                        _guard(ix, vals, out[a:b, j], nulls, w, col.name)

    blocks = [(r0, min(rows, r0 + BLOCK_ROWS)) for r0 in range(0, rows, BLOCK_ROWS)]
    if nthreads == 1 or len(blocks) == 1 or rows * len(names) < _THREAD_MIN_VALUES:
        for blk in blocks:
            run(*blk)
    else:
        with ThreadPoolExecutor(max_workers=min(nthreads, len(blocks))) as pool:
            for f in [pool.submit(run, *blk) for blk in blocks]:
                f.result()
    return out


def _guard(ix: EdgeIndex, x, out, nulls, w: _Work, name: str) -> None:
    try:
        ix._chunk(x, out, nulls, w)
    except InputError as e:
        raise InputError(f"column {name!r}: {e}") from None


def _rowmajor_block(data: np.ndarray, c0: int, c1: int, w: _Work) -> np.ndarray:
    """Rows ``[c0, c1)`` of a row-major 2-D array copied column-contiguous (shape ``(cols, step)``).

    Binning strided columns one by one re-reads every cache line of the block
    once per column; one transposing copy into a reused buffer is cheaper.
    float32 stays float32; every other dtype is kept as is when it is a float
    of the native byte order, else converted to float64 on the way.
    """
    f = data.shape[1]
    keep = data.dtype.kind == "f" and data.dtype.isnative and data.dtype.itemsize in (4, 8)
    bdt = data.dtype if keep else np.dtype(np.float64)
    step = c1 - c0
    blk = w.block
    if blk is None or blk.dtype != bdt or blk.shape[0] != f or blk.shape[1] < step:
        blk = w.block = np.empty((f, max(step, 256)), bdt)
    sub = 2048  # transposing in narrow slabs keeps both sides of the copy in cache
    for s0 in range(0, step, sub):
        s1 = min(step, s0 + sub)
        np.copyto(blk[:, s0:s1], data[c0 + s0:c0 + s1].T, casting="unsafe")
    return blk
