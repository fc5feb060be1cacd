"""Exact references the examples compare a shared cut table with.

Everything here is plain numpy over all rows, independent of sketchmerge:

* :func:`exact_edges`: edges from exact weighted quantiles,
  ``numpy.quantile(x, i / bins, weights=w, method="inverted_cdf")`` for
  ``i = 1..bins`` (inverted CDF is Hyndman & Fan 1996 definition 1, the only
  numpy method that takes weights), deduplicated, the last one set to the
  maximum;
* :func:`bin_with_edges`: the cut-table bin semantics written out again
  (bin ``i`` holds ``edges[i-1] < x <= edges[i]``, above the maximum goes to
  the last bin, NaN gets code ``len(edges)``);
* :func:`rank_deviation`: how far each edge's exact weighted rank interval is
  from the target ranks it answers.
"""

from __future__ import annotations

import numpy as np

__all__ = ["bin_matrix", "bin_with_edges", "exact_edges", "rank_deviation"]


def _present(x, w):
    x = np.asarray(x, dtype=np.float64)
    w = np.ones_like(x) if w is None else np.asarray(w, dtype=np.float64)
    ok = ~np.isnan(x)
    return x[ok], w[ok]


def exact_edges(x, w, bins: int) -> np.ndarray:
    """Deduplicated exact weighted quantile edges of ``x`` (NaN rows left out)."""
    x, w = _present(x, w)
    if x.size == 0:
        return np.empty(0)
    q = np.arange(1, bins + 1) / bins
    e = np.quantile(x, q, weights=w, method="inverted_cdf")
    e[-1] = x.max()
    return np.unique(e)


def bin_with_edges(x, edges: np.ndarray) -> np.ndarray:
    """Codes of one column for ``edges`` (int64)."""
    x = np.asarray(x, dtype=np.float64)
    k = edges.size
    if k == 0:
        return np.zeros(x.shape, dtype=np.int64)
    code = np.minimum(np.searchsorted(edges, x, side="left"), k - 1)
    code[np.isnan(x)] = k
    return code


def bin_matrix(columns: list, edges_list: list) -> np.ndarray:
    """Codes of several columns, shape ``(rows, len(columns))``, uint8 or uint16."""
    top = max(e.size for e in edges_list)
    out = np.empty((len(columns[0]), len(columns)), dtype=np.uint8 if top <= 255 else np.uint16)
    for j, (x, e) in enumerate(zip(columns, edges_list)):
        out[:, j] = bin_with_edges(x, e)
    return out


def rank_deviation(x, w, edges, first_target, last_target, bins: int) -> float:
    """Largest distance between an edge's exact weighted rank interval and its targets.

    Edge ``j`` answers target ranks ``first_target[j] / bins`` to
    ``last_target[j] / bins``; its exact interval is ``[W(x < e), W(x <= e)] / W``.
    Zero means every target lies inside its edge's interval.
    """
    x, w = _present(x, w)
    order = np.argsort(x, kind="stable")
    xs, cw = x[order], np.cumsum(w[order])
    W = cw[-1]
    lo_i = np.searchsorted(xs, edges, side="left")
    hi_i = np.searchsorted(xs, edges, side="right")
    lo = np.where(lo_i > 0, cw[np.maximum(lo_i - 1, 0)], 0.0) / W
    hi = np.where(hi_i > 0, cw[np.maximum(hi_i - 1, 0)], 0.0) / W
    err = np.maximum(0.0, np.maximum(lo - np.asarray(first_target) / bins,
                                     np.asarray(last_target) / bins - hi))
    return float(err.max(initial=0.0))
