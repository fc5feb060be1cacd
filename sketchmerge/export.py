"""``sketchmerge export``: a table's edges for training jobs written in other languages.

Two portable forms, both specified in ``docs/EXPORT.md`` (keep the two in step):

* **JSON**: one UTF-8 document; edges are JSON numbers (shortest round-trip
  decimal form, so every float64 is reproduced exactly), and non-finite
  values are the strings ``"inf"``, ``"-inf"`` and ``"nan"``;
* **Parquet**: one row per feature with a ``list<double>`` column of edges and
  the table-level fields as JSON in the file's key-value metadata under the
  key ``sketchmerge.export``.

Neither form holds the summaries: the export is for binning, not for deriving
other bin counts (``--bins N`` derives them before writing).
"""

from __future__ import annotations

import json
import math
import os
import sys

import numpy as np

from .errors import InputError

__all__ = ["EXPORT_FORMAT", "EXPORT_FORMAT_VERSION", "METADATA_KEY", "export", "export_document"]

EXPORT_FORMAT = "sketchmerge.cut-export"
EXPORT_FORMAT_VERSION = 1
METADATA_KEY = b"sketchmerge.export"
BINNING_RULE = ("bin i holds x with edges[i-1] < x <= edges[i] (bin 0: x <= edges[0]); x above the "
                "last edge: bin len(edges)-1; missing (NaN or null): code len(edges); a feature "
                "without edges: code 0 for every row; -0.0 equals 0.0")


def _num(v) -> float | str:
    v = float(v)
    if math.isfinite(v):
        return v
    return "nan" if math.isnan(v) else ("inf" if v > 0 else "-inf")


def _header(cuts, table_url: str | None) -> dict:
    con = cuts.content
    opts = cuts.options
    reb = cuts.record.get("rebinned")
    return {
        "format": EXPORT_FORMAT,
        "format_version": EXPORT_FORMAT_VERSION,
        "table": table_url,
        "table_version": cuts.version,
        "content_sha256": cuts.content_sha256,
        "created": cuts.record.get("created"),
        "source": con.get("source"),
        "rows": cuts.rows,
        "bins": int(reb["bins"]) if reb else opts.get("bins"),
        "rebinned_from_bins": reb["from_bins"] if reb else None,
        "weights": {"weight_column": opts.get("weight_column"), "hessian": opts.get("hessian"),
                    "prediction_column": opts.get("prediction_column"),
                    "prediction_scale": opts.get("prediction_scale")},
        "code_dtype": cuts.code_dtype().name,
        "binning_rule": BINNING_RULE,
    }


def _feature(f) -> dict:
    s = f.summary
    return {
        "name": f.name,
        "dtype": f.dtype,
        "mode": f.mode,
        "edges": [_num(e) for e in f.edges.tolist()],
        "bins": f.bins,
        "rank_error": f.rank_error,
        "target_rank_error": f.target_rank_error,
        "missing_code": int(f.edges.size),
        "count": s.count,
        "total_weight": s.total_weight,
        "missing_count": s.missing_count,
        "missing_weight": s.missing_weight,
        "min": _num(s.min),
        "max": _num(s.max),
    }


def export_document(cuts, table_url: str | None = None) -> dict:
    """The JSON export of a loaded :class:`~sketchmerge.cuts.CutTable` as a dict.

    Examples
    --------
    >>> import numpy as np
    >>> from sketchmerge import Summary
    >>> from sketchmerge.cuts import CutTable, feature_cuts
    >>> t = CutTable([feature_cuts("floors", Summary.from_values(np.array([1.0, 2.0, np.inf])), 8, 1 / 64)])
    >>> doc = export_document(t)
    >>> doc["features"][0]["edges"], doc["features"][0]["missing_code"]
    ([1.0, 2.0, 'inf'], 3)
    """
    doc = _header(cuts, table_url)
    doc["features"] = [_feature(cuts.feature(n)) for n in cuts.features]
    return doc


def _parquet_table(cuts, table_url: str | None):
    import pyarrow as pa

    feats = [cuts.feature(n) for n in cuts.features]
    schema = pa.schema([
        pa.field("position", pa.int32(), nullable=False),
        pa.field("name", pa.string(), nullable=False),
        pa.field("dtype", pa.string(), nullable=False),
        pa.field("mode", pa.string(), nullable=False),
        pa.field("edges", pa.list_(pa.field("item", pa.float64(), nullable=False)), nullable=False),
        pa.field("bins", pa.int32(), nullable=False),
        pa.field("rank_error", pa.float64(), nullable=False),
        pa.field("target_rank_error", pa.float64(), nullable=False),
        pa.field("missing_code", pa.int32(), nullable=False),
        pa.field("count", pa.int64(), nullable=False),
        pa.field("total_weight", pa.float64(), nullable=False),
        pa.field("missing_count", pa.int64(), nullable=False),
        pa.field("missing_weight", pa.float64(), nullable=False),
        pa.field("min", pa.float64(), nullable=True),
        pa.field("max", pa.float64(), nullable=True),
    ])
    # edges as one flat float64 buffer plus offsets: no per-edge Python objects
    sizes = np.array([f.edges.size for f in feats], dtype=np.int32)
    offsets = np.concatenate([[0], np.cumsum(sizes)]).astype(np.int32)
    flat = np.concatenate([f.edges for f in feats]) if feats else np.empty(0)
    edges = pa.ListArray.from_arrays(pa.array(offsets, pa.int32()), pa.array(flat, pa.float64()),
                                     type=schema.field("edges").type)

    def col(fn, typ):
        return pa.array([fn(f) for f in feats], typ)

    def opt(v):
        return None if math.isnan(v) else v

    arrays = [
        pa.array(np.arange(len(feats), dtype=np.int32)),
        col(lambda f: f.name, pa.string()), col(lambda f: f.dtype, pa.string()),
        col(lambda f: f.mode, pa.string()), edges,
        col(lambda f: f.bins, pa.int32()), col(lambda f: f.rank_error, pa.float64()),
        col(lambda f: f.target_rank_error, pa.float64()), pa.array(sizes, pa.int32()),
        col(lambda f: f.summary.count, pa.int64()), col(lambda f: f.summary.total_weight, pa.float64()),
        col(lambda f: f.summary.missing_count, pa.int64()),
        col(lambda f: f.summary.missing_weight, pa.float64()),
        col(lambda f: opt(f.summary.min), pa.float64()), col(lambda f: opt(f.summary.max), pa.float64()),
    ]
    header = json.dumps(_header(cuts, table_url), allow_nan=False).encode("utf-8")
    return pa.Table.from_arrays(arrays, schema=schema.with_metadata({METADATA_KEY: header}))


def export(table, fmt: str, output=None, bins: int | None = None, version: int | None = None,
           storage_options: dict | None = None, features=None) -> dict:
    """Write a cut table's edges as JSON or Parquet (``docs/EXPORT.md``).

    Parameters
    ----------
    table : str or CutTable
        A table URL (loaded with :func:`sketchmerge.load`) or a loaded table.
    fmt : {"json", "parquet"}
    output : str or os.PathLike, optional
        The file to write (local path or fsspec URL); JSON goes to stdout
        without one.  Parquet needs a file.
    bins : int, optional
        Export edges derived for another bin count (:meth:`CutTable.rebin`).
    version : int, optional
        A pinned version (default: the current one).
    storage_options : dict, optional
        fsspec options for the table and the output.
    features : list of str, optional
        Export only these features, in this order.

    Returns
    -------
    dict
        ``format``, ``output`` (None for stdout), ``table_version``, ``features`` (count).
    """
    if fmt not in ("json", "parquet"):
        raise InputError(f"export format: expected 'json' or 'parquet', got {fmt!r}")
    if fmt == "parquet" and output is None:
        raise InputError("export --to parquet: expected --output FILE (Parquet is not written to stdout), got none")
    url = None
    if isinstance(table, str):
        from .cuts import load
        from .store import redact_url

        cuts = load(table, version=version, storage_options=storage_options, bins=bins, features=features)
        url = redact_url(table)
    else:
        cuts = table
        if features is not None:
            cuts = cuts.select(features)
        if bins is not None:
            cuts = cuts.rebin(bins)
    if fmt == "json":
        text = json.dumps(export_document(cuts, url), allow_nan=False, indent=1) + "\n"
        if output is None:
            sys.stdout.write(text)
        else:
            _write(output, text.encode("utf-8"), storage_options)
    else:
        import io

        import pyarrow.parquet as pq

        buf = io.BytesIO()
        pq.write_table(_parquet_table(cuts, url), buf, compression="zstd")
        _write(output, buf.getvalue(), storage_options)
    return {"format": fmt, "output": None if output is None else os.fspath(output),
            "table_version": cuts.version, "features": len(cuts.features)}


def _write(output, data: bytes, storage_options: dict | None) -> None:
    """Write the whole file at once, via a temporary name for local paths (no torn files)."""
    path = os.fspath(output)
    if "://" not in path:
        tmp = f"{path}.tmp-{os.getpid()}"
        with open(tmp, "wb") as f:
            f.write(data)
        os.replace(tmp, path)
        return
    import fsspec

    with fsspec.open(path, "wb", **(storage_options or {})) as f:
        f.write(data)
