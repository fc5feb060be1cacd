"""Binning rows with a cut table's edges (the training side's hot path).

Imports numpy only at module level; pyarrow and pandas inputs are recognised
by duck typing so neither is imported unless the caller passed one.
"""

from __future__ import annotations

import numpy as np

from .errors import InputError

__all__ = ["bin_columns", "column_getter"]


def column_getter(data, names):
    """Return ``(rows, get)`` where ``get(j)`` is column ``names[j]`` as a numeric numpy array."""
    if isinstance(data, np.ndarray):
        if data.ndim != 2 or data.shape[1] != len(names):
            raise InputError(f"expected a 2-D array with {len(names)} columns (one per feature), "
                             f"got shape {data.shape}")
        return data.shape[0], lambda j: data[:, j]
    if isinstance(data, dict):
        absent = [n for n in names if n not in data]
        if absent:
            raise InputError(f"data lacks columns: {', '.join(absent)}")
        cols = [np.asarray(data[n]) for n in names]
        rows = _same_rows(cols, names)
        return rows, lambda j: cols[j]
    if hasattr(data, "column_names") and hasattr(data, "column"):  # pyarrow Table / RecordBatch
        have = set(data.column_names)
        absent = [n for n in names if n not in have]
        if absent:
            raise InputError(f"data lacks columns: {', '.join(absent)}")

        def get_arrow(j):
            import pyarrow as pa
            import pyarrow.compute as pc

            col = data.column(names[j])
            if isinstance(col, pa.ChunkedArray):
                col = col.combine_chunks() if col.num_chunks != 1 else col.chunk(0)
            if pa.types.is_boolean(col.type) or pa.types.is_integer(col.type):
                col = col.cast(pa.float64())
            if col.null_count:
                col = pc.fill_null(col.cast(pa.float64()), np.nan)
            return col.to_numpy(zero_copy_only=False)

        return data.num_rows, get_arrow
    if hasattr(data, "columns") and hasattr(data, "iloc"):  # pandas DataFrame
        have = set(data.columns)
        absent = [n for n in names if n not in have]
        if absent:
            raise InputError(f"data lacks columns: {', '.join(absent)}")

        def get_pandas(j):
            s = data[names[j]]
            return s.to_numpy(dtype=np.float64, na_value=np.nan)

        return len(data), get_pandas
    raise InputError(f"expected a 2-D numpy array, a dict of arrays, a pyarrow Table or a pandas "
                     f"DataFrame, got {type(data).__name__}")


def _same_rows(cols, names):
    rows = {c.shape[0] if c.ndim == 1 else -1 for c in cols}
    if len(rows) > 1 or -1 in rows:
        raise InputError(f"expected 1-D columns of one length, got lengths "
                         f"{dict(zip(names, [c.shape for c in cols]))}")
    return rows.pop() if rows else 0


def _bin_one(x: np.ndarray, edges: np.ndarray, out_col: np.ndarray) -> None:
    k = edges.size
    if x.dtype.kind not in "fiub":
        raise InputError(f"expected numeric values, got dtype {x.dtype}")
    if k == 0:
        out_col[...] = 0
        return
    xf = x if x.dtype == np.float64 else x.astype(np.float64)
    code = np.searchsorted(edges, xf, side="left")  # bin i: edges[i-1] < x <= edges[i]; NaN -> k
    np.minimum(code, k - 1, out=code)  # above the max: last bin
    if xf.dtype.kind == "f":
        nan = np.isnan(xf)
        if nan.any():
            code[nan] = k
    out_col[...] = code


def bin_columns(data, names, edges_list, dtype, out=None) -> np.ndarray:
    """Codes for ``data`` (see :meth:`sketchmerge.cuts.CutTable.bin`)."""
    rows, get = column_getter(data, names)
    shape = (rows, len(names))
    if out is None:
        out = np.empty(shape, dtype=dtype)
    elif out.shape != shape or out.dtype not in (np.uint8, np.uint16) or out.dtype.itemsize < np.dtype(dtype).itemsize:
        raise InputError(f"out: expected a {np.dtype(dtype).name} array of shape {shape}, "
                         f"got {out.dtype} {out.shape}")
    for j, edges in enumerate(edges_list):
        try:
            _bin_one(np.asarray(get(j)), edges, out[:, j])
        except InputError as e:
            raise InputError(f"column {names[j]!r}: {e}") from None
    return out
