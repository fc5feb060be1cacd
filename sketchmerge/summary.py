"""The sketch core: a mergeable weighted quantile summary with a certified rank bound.

This module is pure: it imports numpy only, does no I/O and knows nothing of
dask or pyarrow.  Serialization lives in :mod:`sketchmerge.blob` (format in
``docs/FORMAT.md``); :meth:`Summary.to_bytes` defers to it.

The summary is the weighted quantile summary of Chen & Guestrin, "XGBoost: A
Scalable Tree Boosting System", KDD 2016, Appendix A.  It holds entries
``(x, r-, r+, w)`` with ``x`` strictly increasing, where for every entry

* ``r-(x)`` is a lower bound on the weight of values strictly below ``x``,
* ``r+(x)`` is an upper bound on the weight of values at or below ``x``,
* ``w(x)`` is a lower bound on the weight of values equal to ``x``,

and the first and last entries sit at the exact minimum and maximum.  Bounds
extend to any point ``y`` between entries ``x_i < y < x_{i+1}`` as
``r-(y) = r-(x_i) + w(x_i)``, ``r+(y) = r+(x_{i+1}) - w(x_{i+1})`` (Definition
A.1 / equation 13 of the paper).  Merge adds the extended bounds of its inputs
over the union of their points; prune keeps the entries answering the rank
queries ``i * W / b``, which adds ``1/b`` to the error.

Missing values are NaN: they are counted in ``missing_count`` and
``missing_weight`` and never ranked.  ``-0.0`` and ``+0.0`` are one value.
``+inf`` and ``-inf`` are ranked as the extreme values they are.
"""

from __future__ import annotations

import numpy as np

from .errors import InputError

__all__ = ["Summary", "exact_entries", "check_values", "check_weights"]

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
    ok = w >= 0.0  # False for NaN and negatives
    ok &= w < np.inf
    if not ok.all():
        i = int(np.argmin(ok))
        raise InputError(
            f"{name}: weight {w[i]!r} at position {i} is not allowed; "
            "weights must be finite and >= 0"
        )
    return w


def exact_entries(x: np.ndarray, w: np.ndarray | None):
    """Distinct sorted values and their weight sums of NaN-free float64 ``x``.

    This is the hot path of the whole product.  Candidates were measured
    (benchmarks/README.md); this picks per input the fastest exact method:
    a plain sort when unweighted, an argsort otherwise.
    """
    n = x.shape[0]
    if n == 0:
        return np.empty(0, _F8), np.empty(0, _F8)
    if w is None:
        xs = np.sort(x)
        starts = np.flatnonzero(np.concatenate(([True], xs[1:] != xs[:-1])))
        counts = np.diff(np.append(starts, n)).astype(_F8)
        return xs[starts], counts
    order = np.argsort(x)
    xs = x[order]
    ws = w[order]
    starts = np.flatnonzero(np.concatenate(([True], xs[1:] != xs[:-1])))
    return xs[starts], np.add.reduceat(ws, starts)


def _extended(x, rmin, rmax, w, total, z):
    """Rank bounds (r-, r+, w) of a summary at sorted points ``z`` (eq. 13)."""
    k = x.shape[0]
    if k == 0:
        zero = np.zeros(z.shape[0], _F8)
        return zero, zero.copy(), zero.copy()
    idx = np.searchsorted(x, z, side="left")
    hit = idx < k
    hit[hit] = x[idx[hit]] == z[hit]
    lo = np.empty(z.shape[0], _F8)
    hi = np.empty(z.shape[0], _F8)
    wz = np.zeros(z.shape[0], _F8)
    lo[hit] = rmin[idx[hit]]
    hi[hit] = rmax[idx[hit]]
    wz[hit] = w[idx[hit]]
    miss = ~hit
    below = miss & (idx == 0)
    above = miss & (idx == k)
    mid = miss & ~below & ~above
    lo[below] = 0.0
    hi[below] = 0.0
    lo[above] = total
    hi[above] = total
    j = idx[mid]
    lo[mid] = rmin[j - 1] + w[j - 1]
    hi[mid] = rmax[j] - w[j]
    return lo, hi, wz


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
    def from_values(cls, values, weights=None) -> "Summary":
        """Exact summary (``epsilon == 0``) of a 1-D array.

        Parameters
        ----------
        values : array_like
            float64, float32, integer or boolean values.  NaN is missing.
        weights : array_like, optional
            Row weights, finite and >= 0 (default 1 per row).  Zero-weight rows
            are kept as points but carry no rank mass.

        Raises
        ------
        InputError
            For a non-1-D or non-numeric array, an integer beyond +-2**53, or a
            NaN, infinite or negative weight (the message names its position).
        """
        raw = np.asarray(values)
        dtype = raw.dtype.name
        x = check_values(raw)
        w = None if weights is None else check_weights(weights, x.shape[0])
        return cls._from_checked(x, w, dtype)

    @classmethod
    def _from_checked(cls, x, w, dtype="float64") -> "Summary":
        nan = np.isnan(x)
        missing_count = int(np.count_nonzero(nan))
        if missing_count:
            missing_weight = float(missing_count if w is None else w[nan].sum())
            keep = ~nan
            x = x[keep]
            w = None if w is None else w[keep]
        else:
            missing_weight = 0.0
        count = x.shape[0]
        x = x + 0.0  # -0.0 + 0.0 == +0.0: one value for both zeros
        xu, wu = exact_entries(x, w)
        return cls._exact_from_entries(xu, wu, count=count, missing_count=missing_count,
                                       missing_weight=missing_weight, dtype=dtype)

    @classmethod
    def _exact_from_entries(cls, xu, wu, *, count, missing_count=0, missing_weight=0.0,
                            dtype="float64") -> "Summary":
        """Exact summary from distinct sorted values and their weight sums.

        Ranks are computed canonically (a cumulative sum), so an exact summary
        is fully determined by ``(x, w)``: the blob format stores only those.
        """
        rmax = np.cumsum(wu)
        rmin = np.empty_like(rmax)
        if rmax.size:
            rmin[0] = 0.0
            rmin[1:] = rmax[:-1]
        total = float(rmax[-1]) if rmax.size else 0.0
        return cls(xu, rmin, rmax, wu, total_weight=total, count=count,
                   missing_count=missing_count, missing_weight=missing_weight,
                   bound=0.0, exact=True, dtype=dtype)

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
        z = np.unique(np.concatenate([p._x for p in nonempty]))
        lo = np.zeros(z.shape[0], _F8)
        hi = np.zeros(z.shape[0], _F8)
        wz = np.zeros(z.shape[0], _F8)
        for p in nonempty:  # loop over inputs (fan-in), not over entries
            a, b, c = _extended(p._x, p._rmin, p._rmax, p._w, p._total, z)
            lo += a
            hi += b
            wz += c
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
        capacity = int(capacity)
        if capacity < 1:
            raise ValueError(f"capacity must be >= 1, got {capacity}")
        k = self._x.size
        if k <= capacity + 1:
            return self
        d = np.arange(capacity + 1, dtype=_F8) * (self._total / capacity)
        idx = self._query_index(d)
        keep = np.zeros(k, dtype=bool)
        keep[idx] = True
        keep[0] = keep[-1] = True
        return Summary(self._x[keep], self._rmin[keep], self._rmax[keep], self._w[keep],
                       total_weight=self._total, count=self._count,
                       missing_count=self._missing_count, missing_weight=self._missing_weight,
                       bound=self._bound + 1.0 / capacity, exact=False, dtype=self._dtype)

    def _query_index(self, d: np.ndarray) -> np.ndarray:
        """Entry index answering each absolute target rank in ``d`` (Appendix A query)."""
        lo, hi, w = self._rmin, self._rmax, self._w
        k = lo.size
        mid = (lo + hi) * 0.5
        i = np.searchsorted(mid, d, side="right") - 1
        out = np.empty(d.shape[0], dtype=np.int64)
        first = i < 0
        last = i >= k - 1
        inner = ~first & ~last
        out[first] = 0
        out[last] = k - 1
        j = i[inner]
        dj = d[inner]
        left = 2.0 * dj < (lo[j] + w[j]) + (hi[j + 1] - w[j + 1])
        out[inner] = np.where(left, j, j + 1)
        return out

    def quantiles(self, q) -> np.ndarray:
        """Values at normalised target ranks ``q`` in [0, 1].

        Each returned value's exact rank interval lies within ``epsilon / 2``
        of its target.  An empty summary answers NaN.
        """
        q = np.asarray(q, dtype=_F8)
        scalar = q.ndim == 0
        qa = np.atleast_1d(q).ravel()
        if np.any(~((qa >= 0.0) & (qa <= 1.0))):
            raise ValueError("quantile targets must lie in [0, 1]")
        if self._x.size == 0:
            out = np.full(qa.shape, np.nan)
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
            raise ValueError("rank_bounds: points must not be NaN")
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


def _common_dtype(names):
    """Source dtype of a merge, for reporting only (values are float64 inside)."""
    first = names[0]
    return first if all(n == first for n in names) else "float64"
