"""Cut tables: bin edges per feature, their certified rank error, and the binning of rows.

A cut table is what training jobs load.  It is one immutable msgpack document
(kind ``sketchmerge.cut-table``, specified in docs/FORMAT.md, section "Cut
table") holding per feature the edges, the merged global summary (so other
bin counts can be derived without a rescan), counts and weights, and the
build's lineage.

Edge semantics (the contract with training jobs):

* edges are strictly increasing float64 values;
* bin ``i`` holds ``x`` with ``edges[i-1] < x <= edges[i]`` (bin 0: ``x <= edges[0]``);
* the last edge is the observed maximum; larger values fall into the last bin;
* missing values (NaN) get code ``len(edges)``;
* a feature with at most ``bins`` distinct values gets exactly those values as
  edges (mode ``"distinct"``); otherwise the edges answer the target ranks
  ``i / bins`` (mode ``"quantile"``) and point masses never make duplicates.

This module does not import dask or distributed: loading and binning stay light.

.. caution::
   A cut table holds exact values of the data it was built from (minimum,
   maximum, quantile values, point masses).  It is as sensitive as those
   columns: keep it under the same access rules as its source.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field

import numpy as np

from .blob import (_pack, _unpack, decode_envelope, encode_envelope, summary_from_payload,
                   summary_to_payload)
from .errors import FormatError, InputError
from .summary import Summary

__all__ = ["CutTable", "FeatureCuts", "KIND_TABLE", "compute_edges", "decode_table",
           "encode_table", "load"]

KIND_TABLE = "sketchmerge.cut-table"
#: Format version of the table document.  Its features embed summary payloads of
#: blob format version 1 (layouts xw, ranked and bounds, never packed), so that
#: readers older than blob format 2 keep loading new tables.
TABLE_FORMAT_VERSION = 1
_MAX_BINS = 65535


def default_rank_error(bins: int) -> float:
    """Default bound on an edge's normalised rank error: 1 / (8 * bins)."""
    return 1.0 / (8.0 * bins)


def compute_edges(summary: Summary, bins: int):
    """Edges of one feature from its summary.

    Returns ``(edges, first_target, last_target, mode)``; for ``"quantile"``
    mode edge ``j`` answers the target ranks ``first_target[j] / bins`` to
    ``last_target[j] / bins`` (several when it is a point mass).
    """
    bins = int(bins)
    if not 1 <= bins <= _MAX_BINS:
        raise InputError(f"bins: expected 1 to {_MAX_BINS}, got {bins}")
    none = np.empty(0, np.int32)
    if summary.count == 0:
        return np.empty(0, np.float64), none, none.copy(), "empty"
    if summary.is_exact and len(summary) <= bins:
        return np.array(summary.values, dtype=np.float64), none, none.copy(), "distinct"
    t = np.arange(1, bins + 1, dtype=np.int32)
    vals = summary.quantiles(t / bins)
    vals[-1] = summary.max  # the last edge is the observed maximum
    change = np.flatnonzero(vals[1:] != vals[:-1])
    starts = np.concatenate(([0], change + 1))
    ends = np.concatenate((change, [bins - 1]))
    return vals[starts].astype(np.float64), t[starts], t[ends], "quantile"


@dataclass(frozen=True)
class FeatureCuts:
    """Everything a cut table records about one feature."""

    name: str
    dtype: str
    mode: str
    edges: np.ndarray
    first_target: np.ndarray
    last_target: np.ndarray
    bins: int
    rank_error: float
    target_rank_error: float
    summary: Summary = field(repr=False)

    @property
    def count(self) -> int:
        return self.summary.count

    @property
    def total_weight(self) -> float:
        return self.summary.total_weight

    @property
    def missing_count(self) -> int:
        return self.summary.missing_count

    @property
    def missing_weight(self) -> float:
        return self.summary.missing_weight

    @property
    def missing_share(self) -> float:
        """Share of the weight that is missing (NaN) for this feature."""
        tot = self.summary.total_weight + self.summary.missing_weight
        return self.summary.missing_weight / tot if tot > 0 else 0.0

    def info(self) -> dict:
        """JSON-ready description (edges excluded)."""
        s = self.summary
        return {"name": self.name, "dtype": self.dtype, "mode": self.mode,
                "edges_count": int(self.edges.size), "bins": self.bins,
                "rank_error": self.rank_error, "target_rank_error": self.target_rank_error,
                "epsilon": s.epsilon, "count": s.count, "total_weight": s.total_weight,
                "missing_count": s.missing_count, "missing_weight": s.missing_weight,
                "missing_share": self.missing_share,
                "min": _num(s.min), "max": _num(s.max), "summary_entries": len(s)}


def _num(v: float):
    """A float for JSON: non-finite values become strings ("inf", "-inf", "nan")."""
    v = float(v)
    return v if np.isfinite(v) else str(v)


def feature_cuts(name: str, summary: Summary, bins: int, target_rank_error: float) -> FeatureCuts:
    """Edges and certified rank error of one feature."""
    edges, first, last, mode = compute_edges(summary, bins)
    err = 0.0 if mode in ("distinct", "empty") else summary.epsilon / 2.0
    for a in (edges, first, last):
        a.setflags(write=False)
    return FeatureCuts(name=name, dtype=summary.dtype, mode=mode, edges=edges, first_target=first,
                       last_target=last, bins=int(bins), rank_error=float(err),
                       target_rank_error=float(target_rank_error), summary=summary)


# --------------------------------------------------------------------------- the document
def encode_table(features: list[FeatureCuts], *, version: int, content_extra: dict,
                 record: dict) -> bytes:
    """Encode a cut table document.

    ``content_extra`` (source, options, rows, root, skipped, units) goes into
    the deterministic ``content`` section together with the features;
    ``record`` (version, created, tool, changes...) holds what differs from
    one publish to the next.  The content section's bytes depend only on the
    data and the options, so two builds of the same data are byte-identical
    there whatever the scheduling.
    """
    feats = []
    for f in features:
        feats.append({
            "name": f.name, "dtype": f.dtype, "mode": f.mode, "bins": f.bins,
            "edges": f.edges.astype("<f8").tobytes(),
            "first_target": f.first_target.astype("<i4").tobytes(),
            "last_target": f.last_target.astype("<i4").tobytes(),
            "rank_error": f.rank_error, "target_rank_error": f.target_rank_error,
            "summary": summary_to_payload(f.summary, version=TABLE_FORMAT_VERSION),
        })
    content = dict(content_extra)
    content["features"] = feats
    content_bytes = _pack(content)
    rec = dict(record)
    rec["version"] = int(version)
    payload = {"content": content_bytes,
               "content_sha256": hashlib.sha256(content_bytes).hexdigest(),
               "record": rec}
    return encode_envelope(KIND_TABLE, _pack(payload), version=TABLE_FORMAT_VERSION)


_FEATURE_KEYS = {"name": str, "dtype": str, "mode": str, "bins": int, "edges": bytes,
                 "first_target": bytes, "last_target": bytes, "rank_error": float,
                 "target_rank_error": float, "summary": dict}


def _check(d, key, typ, what):
    if not isinstance(d, dict) or key not in d:
        raise FormatError(f"{what}: expected field {key!r}, got none")
    v = d[key]
    if typ is float and type(v) is int:
        v = float(v)
    if type(v) is not typ:
        raise FormatError(f"{what}: expected {key!r} of type {typ.__name__}, got {type(v).__name__}")
    return v


def _feature_from(d, what) -> FeatureCuts:
    v = {k: _check(d, k, t, what) for k, t in _FEATURE_KEYS.items()}
    extra = set(d) - set(_FEATURE_KEYS)
    if extra:
        raise FormatError(f"{what}: unexpected fields {sorted(extra)}")
    if len(v["edges"]) % 8 or len(v["first_target"]) % 4 or len(v["first_target"]) != len(v["last_target"]):
        raise FormatError(f"{what}: expected edges as <f8 and targets as <i4 arrays, got bad lengths")
    edges = np.frombuffer(v["edges"], "<f8").astype(np.float64)
    first = np.frombuffer(v["first_target"], "<i4").astype(np.int32)
    last = np.frombuffer(v["last_target"], "<i4").astype(np.int32)
    if np.isnan(edges).any() or (edges.size > 1 and not np.all(edges[1:] > edges[:-1])):
        raise FormatError(f"{what}: expected strictly increasing edges")
    if v["mode"] not in ("quantile", "distinct", "empty"):
        raise FormatError(f"{what}: expected mode quantile, distinct or empty, got {v['mode']!r}")
    if v["mode"] == "quantile" and first.size != edges.size:
        raise FormatError(f"{what}: expected one target range per edge, got {first.size} for {edges.size} edges")
    s = summary_from_payload(v["summary"], what + " summary", version=TABLE_FORMAT_VERSION)
    for a in (edges, first, last):
        a.setflags(write=False)
    return FeatureCuts(name=v["name"], dtype=v["dtype"], mode=v["mode"], edges=edges,
                       first_target=first, last_target=last, bins=v["bins"],
                       rank_error=v["rank_error"], target_rank_error=v["target_rank_error"],
                       summary=s)


def decode_table(blob, what: str = "cut table") -> "CutTable":
    """Decode and verify a cut table document; any defect raises FormatError."""
    payload = decode_envelope(blob, KIND_TABLE, what, versions=(TABLE_FORMAT_VERSION,))
    body = _unpack(payload, what, max_map=64)
    if not isinstance(body, dict) or set(body) != {"content", "content_sha256", "record"}:
        raise FormatError(f"{what}: expected keys content, content_sha256, record")
    content_bytes = body["content"]
    if not isinstance(content_bytes, bytes):
        raise FormatError(f"{what}: expected binary content")
    digest = hashlib.sha256(content_bytes).hexdigest()
    if digest != body["content_sha256"]:
        raise FormatError(f"{what}: content checksum mismatch: expected sha256 "
                          f"{body['content_sha256']!r}, got {digest!r}")
    record = body["record"]
    if not isinstance(record, dict) or type(record.get("version")) is not int:
        raise FormatError(f"{what}: expected a record with an integer version")
    content = _unpack(content_bytes, what + " content", max_array=1 << 24, max_map=1 << 16)
    if not isinstance(content, dict) or not isinstance(content.get("features"), list):
        raise FormatError(f"{what}: expected content with a features list")
    feats = [_feature_from(d, f"{what} feature #{i}") for i, d in enumerate(content["features"])]
    names = [f.name for f in feats]
    if len(set(names)) != len(names):
        raise FormatError(f"{what}: expected distinct feature names")
    meta = {k: v for k, v in content.items() if k != "features"}
    return CutTable(feats, record=record, content=meta, content_sha256=digest)


# --------------------------------------------------------------------------- the loader
class CutTable:
    """A loaded cut table: edges per feature and the binning of rows with them.

    Get one with :func:`load`.  Instances are read-only.

    Examples
    --------
    >>> import sketchmerge                                  # doctest: +SKIP
    >>> cuts = sketchmerge.load("s3://bucket/tables/loans")  # doctest: +SKIP
    >>> codes = cuts.bin(frame, features=["income", "age"]) # doctest: +SKIP
    """

    def __init__(self, features: list[FeatureCuts], *, record: dict | None = None,
                 content: dict | None = None, content_sha256: str = ""):
        self._features = {f.name: f for f in features}
        self._order = tuple(f.name for f in features)
        self.record = dict(record or {})
        self.content = dict(content or {})
        self.content_sha256 = content_sha256
        self._indexes: dict = {}  # feature name -> binning.EdgeIndex, built on first use

    # ------------------------------------------------------------ description
    @property
    def features(self) -> tuple[str, ...]:
        """Feature names, in table order."""
        return self._order

    @property
    def version(self) -> int | None:
        return self.record.get("version")

    @property
    def rows(self) -> int:
        return int(self.content.get("rows", 0))

    @property
    def options(self) -> dict:
        return dict(self.content.get("options", {}))

    def feature(self, name: str) -> FeatureCuts:
        """Everything the table records about one feature (InputError when absent)."""
        try:
            return self._features[name]
        except (KeyError, TypeError):
            raise InputError(f"feature {name!r} is not in this cut table "
                             f"(it has {len(self._order)}: {_listing(self._order)})") from None

    def check_features(self, features) -> list[str]:
        """The requested names as a list, or InputError listing every one the table lacks.

        A string is refused (it would be read as a list of one-letter names).
        """
        if isinstance(features, (str, bytes)):
            raise InputError(f"features: expected a list of names, got the string {features!r}")
        names = list(features)
        absent = [n for n in names if n not in self._features]
        if absent:
            raise InputError(f"{len(absent)} requested feature(s) not in this cut table: "
                             f"{', '.join(map(repr, absent))} (it has {len(self._order)}: "
                             f"{_listing(self._order)})")
        dup = sorted({n for n in names if names.count(n) > 1})
        if dup:
            raise InputError(f"features: expected distinct names, got {', '.join(map(repr, dup))} more than once")
        return names

    def select(self, features) -> "CutTable":
        """A table of just ``features``, in that order (the stored table is untouched)."""
        names = self.check_features(features)
        out = CutTable([self._features[n] for n in names], record=self.record, content=self.content,
                       content_sha256=self.content_sha256)
        out._indexes = {n: self._indexes[n] for n in names if n in self._indexes}
        return out

    def edges(self, name: str) -> np.ndarray:
        """The edges of one feature (read-only float64 array)."""
        return self.feature(name).edges

    def rank_error(self, name: str) -> float:
        """Certified bound on the normalised rank error of every edge of one feature."""
        return self.feature(name).rank_error

    def summary(self, name: str) -> Summary:
        """The merged global summary of one feature."""
        return self.feature(name).summary

    def __repr__(self) -> str:
        return (f"CutTable(version={self.version}, features={len(self._order)}, rows={self.rows}, "
                f"source={self.content.get('source', '')!r})")

    # ------------------------------------------------------------ derive
    def rebin(self, bins: int, rank_error: float | None = None) -> "CutTable":
        """Edges for another bin count, derived from the stored summaries (no data read).

        The new edges answer the ranks ``i / bins`` with the certified bound of
        the stored summaries; ``rank_error`` (default ``1/(8*bins)``) is the
        bound the caller needs, and a feature whose summary cannot honour it
        raises InputError naming it.

        A feature with at most ``bins`` distinct values keeps them all as edges
        (mode ``"distinct"``, rank error 0); a feature without values keeps no
        edges.  The derived table records ``rebinned`` (bins, rank error, the
        stored bin counts) in :attr:`record`; nothing is written anywhere.

        Raises
        ------
        InputError
            when ``bins`` is not in 1..65535, or when a stored summary's
            certified error (half its epsilon) exceeds ``rank_error``; the
            message lists every such feature and its certified bound.

        Examples
        --------
        >>> import numpy as np
        >>> from sketchmerge import Summary
        >>> from sketchmerge.cuts import CutTable, feature_cuts
        >>> s = Summary.from_values(np.arange(1000.0))
        >>> t = CutTable([feature_cuts("age", s, 256, 1 / 2048)])
        >>> t.rebin(4).edges("age").tolist()
        [249.0, 499.0, 749.0, 999.0]
        """
        if isinstance(bins, (bool, np.bool_)) or not isinstance(bins, (int, np.integer)) \
                or not 1 <= bins <= _MAX_BINS:
            raise InputError(f"rebin bins: expected an integer from 1 to {_MAX_BINS}, got {bins!r}")
        bins = int(bins)
        need = default_rank_error(bins) if rank_error is None else float(rank_error)
        if not 0.0 < need < 0.5:
            raise InputError(f"rebin rank_error: expected a number in (0, 0.5), got {rank_error!r}")
        out, bad = [], []
        for name in self._order:
            f = feature_cuts(name, self._features[name].summary, bins, need)
            if f.rank_error > need:
                bad.append(f"{name} (certified {f.rank_error:.3g})")
            out.append(f)
        if bad:
            raise InputError(f"rebin to {bins} bins: the stored summaries cannot honour a rank error of "
                             f"{need:.3g} for {', '.join(bad)}; rebuild the table with --bins {bins}")
        rec = dict(self.record)
        rec["rebinned"] = {"bins": int(bins), "rank_error": need,
                           "from_bins": sorted({self._features[n].bins for n in self._order})}
        return CutTable(out, record=rec, content=self.content, content_sha256=self.content_sha256)

    # ------------------------------------------------------------ binning
    def code_dtype(self, features=None) -> np.dtype:
        """uint8 when every code (missing included) fits, else uint16."""
        names = self._order if features is None else self.check_features(features)
        top = max((self._features[n].edges.size for n in names), default=0)
        return np.dtype(np.uint8) if top <= 255 else np.dtype(np.uint16)

    def _index(self, name: str):
        from .binning import EdgeIndex

        ix = self._indexes.get(name)
        if ix is None:  # a race builds it twice, harmlessly
            ix = self._indexes[name] = EdgeIndex(self._features[name].edges)
        return ix

    def bin(self, data, features=None, out=None, threads=None) -> np.ndarray:
        """Bin rows with the table's edges.

        Parameters
        ----------
        data : 2-D numpy array, dict of 1-D arrays, pyarrow Table / RecordBatch or pandas DataFrame
            For a 2-D array (C- or F-ordered), column ``j`` is feature
            ``features[j]``; other inputs are looked up by name and may hold
            more columns.  float64, float32, float16, integer and boolean
            values are accepted; float64 and float32 are read in place (no
            converted copy), Arrow nulls and NaN are missing.
        features : list of str, optional
            The features to bin, in the job's order (default: all, table order).
            Every name the table lacks is listed in the error.
        out : numpy array, optional
            A writable ``(rows, len(features))`` uint8/uint16 array (any memory
            layout, e.g. a view into a larger buffer) to fill instead of
            allocating.
        threads : int, optional
            Worker threads for large inputs (default: the CPUs this process may
            use; 1 keeps everything on the calling thread).

        Returns
        -------
        numpy.ndarray
            Codes of shape ``(rows, len(features))``: bin ``i`` holds
            ``edges[i-1] < x <= edges[i]``, values above the last edge go to
            the last bin, missing values get ``len(edges)``, a feature without
            edges codes every row 0.  uint8 when every feature has at most 255
            edges, else uint16 (or ``out``).

        Examples
        --------
        >>> import numpy as np
        >>> from sketchmerge import Summary
        >>> from sketchmerge.cuts import CutTable, feature_cuts
        >>> s = Summary.from_values(np.array([1.0, 2.0, 3.0]))
        >>> t = CutTable([feature_cuts("rooms", s, 4, 1 / 32)])
        >>> t.bin({"rooms": np.array([0.5, 2.0, 2.5, 7.0, np.nan])}).ravel().tolist()
        [0, 1, 2, 2, 3]
        """
        from .binning import bin_columns

        names = list(self._order) if features is None else self.check_features(features)
        return bin_columns(data, names, [self._index(n) for n in names], self.code_dtype(names),
                           out=out, threads=threads)


def _listing(names, limit: int = 20) -> str:
    head = ", ".join(names[:limit])
    return head + (f", ... ({len(names) - limit} more)" if len(names) > limit else "")


def load(table: str, version: int | None = None, storage_options: dict | None = None,
         bins: int | None = None, cache_dir=None, features=None) -> CutTable:
    """Load the current (or a pinned) version of a cut table.

    Parameters
    ----------
    table : str
        The table's location: a local path or an fsspec URL.
    version : int, optional
        Pin a version (default: the current one).  Published versions never
        change, so a pinned version gives the same edges on every load.
    storage_options : dict, optional
        Passed to fsspec (credentials, endpoint).
    bins : int, optional
        Derive edges for another bin count from the stored summaries (see :meth:`CutTable.rebin`).
    cache_dir : str or os.PathLike, optional
        Keep downloaded documents in this local folder, keyed by table,
        version and sha256, shared safely by every process on the host (see
        :mod:`sketchmerge.tablecache`).  Default: the ``SKETCHMERGE_CACHE_DIR``
        environment variable, else no cache; ``""`` turns the cache off.
    features : list of str, optional
        Keep only these features, in this order (see :meth:`CutTable.select`).

    Raises
    ------
    NoInputError
        when nothing (or not that version) is published.
    FormatError
        when the document is corrupt, does not match its recorded checksum,
        or differs from the copy cached earlier for the same version.

    Examples
    --------
    >>> import sketchmerge                                          # doctest: +SKIP
    >>> cuts = sketchmerge.load("s3://bucket/tables/loans", version=7,
    ...                         cache_dir="/var/cache/sketchmerge")  # doctest: +SKIP
    """
    from .store import TableStore
    from .tablecache import read_document, resolve_cache_dir

    store = TableStore(table, storage_options=storage_options)
    where = resolve_cache_dir(cache_dir)
    if where is None:
        v, data = store.read_version(version)
    else:
        v, data, _ = read_document(store, version, where)
    cuts = decode_table(data, what=f"cut table {store.url} version {v}")
    if cuts.version != v:
        raise FormatError(f"cut table {store.url}: expected version {v} inside the document, got {cuts.version}")
    if features is not None:
        cuts = cuts.select(features)
    return cuts if bins is None else cuts.rebin(bins)
