"""The version history of a cut table: one row per published version.

Each row comes from the version's own document (its ``record`` and
``content`` sections, docs/FORMAT.md), so the history needs nothing but the
table: no data is read and nothing is written.  Versions that gc removed are
gone from the history too; a version whose document cannot be decoded is
listed with the reason instead of stopping the listing.
"""

from __future__ import annotations

from .cuts import decode_table
from .errors import FormatError, NoInputError

__all__ = ["describe_weights", "format_history", "history"]


def describe_weights(options: dict) -> str:
    """How the build weighted rows, in words (``"none"`` when every row weighs 1)."""
    parts = []
    if options.get("weight_column"):
        parts.append(f"column {options['weight_column']!r}")
    if options.get("hessian"):
        h = f"{options['hessian']} hessian"
        if options.get("prediction_column"):
            h += f" at {options['prediction_column']!r}"
        if options.get("prediction_scale"):
            h += f" ({options['prediction_scale']})"
        parts.append(h)
    return " x ".join(parts) if parts else "none"


def _row(v: int, cuts, current: int | None) -> dict:
    rec, con = cuts.record, cuts.content
    opts = con.get("options", {}) or {}
    ch = rec.get("changes", {}) or {}
    units = con.get("units", {}) or {}
    return {
        "version": v,
        "current": v == current,
        "created": rec.get("created"),
        "tool": rec.get("tool"),
        "previous_version": rec.get("previous_version"),
        "source": con.get("source"),
        "rows": int(con.get("rows", 0)),
        "features": len(cuts.features),
        "units": len(units.get("address", []) or []),
        "units_added": ch.get("units_added"),
        "units_removed": ch.get("units_removed"),
        "units_changed": ch.get("units_changed"),
        "bins": opts.get("bins"),
        "rank_error": opts.get("rank_error"),
        "weights": describe_weights(opts),
        "weight_column": opts.get("weight_column"),
        "hessian": opts.get("hessian"),
        "prediction_column": opts.get("prediction_column"),
    }


def history(table: str, storage_options: dict | None = None) -> list[dict]:
    """Every published version of ``table``, newest first.

    Parameters
    ----------
    table : str
        The table's location: a local path or an fsspec URL.
    storage_options : dict, optional
        Passed to fsspec.

    Returns
    -------
    list of dict
        Per version: ``version``, ``current`` (True for the current one),
        ``created``, ``tool``, ``previous_version``, ``source``, ``rows``,
        ``features`` (count), ``units`` (total), ``units_added`` /
        ``units_removed`` / ``units_changed`` (against the version it was
        built on), ``bins``, ``rank_error``, ``weights`` (in words) and the
        raw ``weight_column``, ``hessian``, ``prediction_column``.  A version
        that cannot be decoded has only ``version``, ``current`` and ``error``.

    Raises
    ------
    NoInputError
        When nothing is published at ``table``.

    Examples
    --------
    >>> from sketchmerge.history import format_history, history   # doctest: +SKIP
    >>> print(format_history(history("tables/orchard")))             # doctest: +SKIP
    """
    from .store import TableStore

    store = TableStore(table, storage_options=storage_options)
    current = store.current()
    published = store.versions()
    if current is None or not published:
        raise NoInputError(f"table {store.url}: expected a published version, got none")
    rows = []
    for v in sorted(published, reverse=True):
        try:
            _, data = store.read_version(v)
        except NoInputError:
            continue  # removed by a gc between the listing and the read
        try:
            cuts = decode_table(data, what=f"cut table {store.url} version {v}")
        except FormatError as e:
            rows.append({"version": v, "current": v == current, "error": str(e)})
            continue
        rows.append(_row(v, cuts, current))
    return rows


def _cell(v, fmt: str = "") -> str:
    if v is None:
        return "-"
    return format(v, fmt) if fmt else str(v)


def format_history(rows: list[dict]) -> str:
    """A terminal table of :func:`history` rows; ``*`` marks the current version."""
    hdr = (f"  {'version':>7}  {'created':<20} {'rows':>14} {'feat':>5} {'units':>6} "
           f"{'+':>5} {'-':>5} {'~':>5} {'bins':>5} {'rank err':>9}  weights")
    out = [hdr, "-" * len(hdr)]
    for r in rows:
        mark = "*" if r.get("current") else " "
        if "error" in r:
            out.append(f"{mark} {r['version']:>7}  unreadable: {r['error']}")
            continue
        out.append(f"{mark} {r['version']:>7}  {_cell(r.get('created')):<20} {r['rows']:>14,} "
                   f"{r['features']:>5} {r['units']:>6} {_cell(r.get('units_added')):>5} "
                   f"{_cell(r.get('units_removed')):>5} {_cell(r.get('units_changed')):>5} "
                   f"{_cell(r.get('bins')):>5} {_cell(r.get('rank_error'), '.3g'):>9}  {r['weights']}")
    if not rows:
        out.append("(no versions)")
    out += ["", "current version marked *; units: + added, - removed, ~ changed since the version it was built on"]
    return "\n".join(out)
