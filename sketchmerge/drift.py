"""Drift between two versions of a cut table, computed from the stored summaries alone.

For every feature present in both versions this module reports

* the population stability index (PSI) of the new distribution over the OLD
  bins (the old edges, plus missing values as a bin of their own);
* a certified interval around that PSI, from the summaries' rank bounds;
* the largest edge shift: where the old summary places each new edge,
  minus the rank that edge targets, in old-rank units;
* the change in missing share and the ratio of total weights.

No data is read: both versions carry their merged global summaries, and a
summary bounds the weight at or below any point.  The definitions, the share
floor and the error analysis are in docs/DRIFT.md; change both together.

This module imports neither dask nor matplotlib at import time: the build
calls :func:`drift_between` after publishing, and :func:`plot_drift` imports
matplotlib only when asked for a picture.
"""

from __future__ import annotations

import math

import numpy as np

from .cuts import CutTable, FeatureCuts, decode_table
from .errors import FormatError, InputError, NoInputError
from .summary import Summary

__all__ = ["LEVELS", "SHARE_FLOOR", "diff", "drift_between", "feature_drift", "format_diff", "level",
           "plot_drift", "psi", "psi_interval", "shares_at_edges"]

#: shares below this are raised to it before the PSI's logarithms (docs/DRIFT.md)
SHARE_FLOOR = 1e-4

#: customary reading of a PSI (common practice): below 0.1 little change,
#: 0.1 to 0.25 moderate, above 0.25 large
LEVELS = ((0.1, "little"), (0.25, "moderate"), (math.inf, "large"))

_F8 = np.float64


# --------------------------------------------------------------------------- rank bounds
def _cdf_bounds(s: Summary, points: np.ndarray):
    """Bounds and estimates of the normalised weight below and at-or-below each point.

    Returns ``(lt_lo, lt_hi, le_lo, le_hi, lt_est, le_est)`` with
    ``lt_lo <= weight(x < p) / W <= lt_hi`` and ``le_lo <= weight(x <= p) / W <= le_hi``.
    The bounds follow from the entry invariants of the summary (see
    :mod:`sketchmerge.summary`): at an entry ``x_i`` the weight below lies in
    ``[r-_i, r+_i - w_i]`` and the weight at or below in ``[r-_i + w_i, r+_i]``;
    strictly between ``x_i`` and ``x_{i+1}`` both lie in
    ``[r-_i + w_i, r+_{i+1} - w_{i+1}]``.  An empty summary gives zeros.

    The estimates are the midpoint of the bounds at an entry and, between two
    entries, the bounds interpolated linearly in the value: a pruned summary
    keeps few entries, and for continuous data the weight grows with the value
    between them, so interpolating is far closer than the midpoint (the
    estimate stays inside the certified bounds either way).
    """
    p = np.asarray(points, dtype=_F8) + 0.0  # fold -0.0 like the summary does
    n = p.shape[0]
    total = s.total_weight
    x = s.values
    k = x.shape[0]
    if total <= 0.0 or k == 0:
        return tuple(np.zeros(n, _F8) for _ in range(6))
    lo, hi, w = s.rmin, s.rmax, s.weights
    idx = np.searchsorted(x, p, side="left")
    hit = idx < k
    hit[hit] = x[idx[hit]] == p[hit]
    above = idx == k
    mid = ~hit & ~above & (idx > 0)
    out = np.zeros((6, n), _F8)  # one block, so the final scaling is one operation
    lt_lo, lt_hi, le_lo, le_hi, lt_est, le_est = out
    i = idx[hit]
    lt_lo[hit] = lo[i]
    lt_hi[hit] = hi[i] - w[i]
    le_lo[hit] = lo[i] + w[i]
    le_hi[hit] = hi[i]
    lt_est[hit] = 0.5 * (lt_lo[hit] + lt_hi[hit])
    le_est[hit] = 0.5 * (le_lo[hit] + le_hi[hit])
    j = idx[mid]
    a = lo[j - 1] + w[j - 1]
    b = np.maximum(hi[j] - w[j], a)
    lt_lo[mid] = le_lo[mid] = a
    lt_hi[mid] = le_hi[mid] = b
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        frac = (p[mid] - x[j - 1]) / (x[j] - x[j - 1])
    frac = np.where(np.isfinite(frac), np.clip(frac, 0.0, 1.0), 0.5)  # infinite entries: midpoint
    lt_est[mid] = le_est[mid] = a + frac * (b - a)
    out[:, above] = total
    np.clip(out, 0.0, total, out=out)
    out /= total
    # float rounding of stored bounds may cross by an ulp: keep every interval ordered
    np.maximum(lt_hi, lt_lo, out=lt_hi)
    np.maximum(le_hi, le_lo, out=le_hi)
    return lt_lo, lt_hi, le_lo, le_hi, lt_est, le_est


def shares_at_edges(s: Summary, edges: np.ndarray):
    """Shares of the total weight (missing included) in the bins of ``edges``.

    Bin ``i`` holds ``edges[i-1] < x <= edges[i]`` (bin 0: ``x <= edges[0]``);
    values above the last edge fall into the last bin, as when rows are binned;
    the final entry is the missing (NaN) share.  With no edges every ranked
    value is in one bin.

    Returns
    -------
    (estimate, low, high) : three float64 arrays of length ``len(edges) + 1``
        ``estimate`` uses the estimated cumulative weights (see ``_cdf_bounds``); ``low`` and
        ``high`` bound every share (each cumulative bound is certified, so the
        true share lies in ``[low, high]``).
    """
    e = np.asarray(edges, dtype=_F8)
    k = max(e.shape[0], 1)
    ranked = s.total_weight
    whole = ranked + s.missing_weight
    est = np.zeros(k + 1, _F8)
    low = np.zeros(k + 1, _F8)
    high = np.zeros(k + 1, _F8)
    if whole <= 0.0:
        return est, low, high
    scale = ranked / whole
    # cumulative weight at or below each bin's upper edge; the last bin is open above
    _, _, c_lo, c_hi, _, c_mid = _cdf_bounds(s, e[:-1])
    c_lo = np.concatenate(([0.0], c_lo, [1.0]))
    c_hi = np.concatenate(([0.0], c_hi, [1.0]))
    c_mid = np.concatenate(([0.0], c_mid, [1.0]))
    est[:k] = np.diff(c_mid) * scale
    low[:k] = np.maximum(c_lo[1:] - c_hi[:-1], 0.0) * scale
    high[:k] = np.minimum(c_hi[1:] - c_lo[:-1], 1.0) * scale
    np.maximum(est, 0.0, out=est)
    m = s.missing_weight / whole  # counted exactly: no rank uncertainty
    est[k] = low[k] = high[k] = m
    return est, low, high


# --------------------------------------------------------------------------- the PSI
def _psi_terms(a: np.ndarray, e: np.ndarray, floor: float) -> np.ndarray:
    a = np.maximum(a, floor)
    e = np.maximum(e, floor)
    return (a - e) * np.log(a / e)


def psi(actual, expected, floor: float = SHARE_FLOOR) -> float:
    """Population stability index ``sum_i (a_i - e_i) ln(a_i / e_i)``.

    ``expected`` are the old (reference) shares, ``actual`` the new ones;
    both are raised to ``floor`` first so empty bins keep the logarithm finite.

    Examples
    --------
    >>> round(psi([0.5, 0.5], [0.5, 0.5]), 12)
    0.0
    >>> round(psi([0.6, 0.4], [0.5, 0.5]), 6)   # 0.1 ln 1.2 - 0.1 ln 0.8
    0.040547
    """
    a = np.asarray(actual, dtype=_F8)
    e = np.asarray(expected, dtype=_F8)
    if a.shape != e.shape:
        raise InputError(f"psi: expected share arrays of one shape, got {a.shape} and {e.shape}")
    return float(np.sum(_psi_terms(a, e, floor)))


def psi_interval(a_low, a_high, e_low, e_high, floor: float = SHARE_FLOOR) -> tuple[float, float]:
    """Smallest and largest PSI over all shares within the given per-bin bounds.

    Each term ``f(a, e) = (a - e) ln(a / e)`` is jointly convex and zero on
    ``a == e``, increasing in ``|a - e|`` along either coordinate, so over a box
    its largest value is at a corner and its smallest is 0 when the two
    intervals overlap, else at the two nearest ends.  Summing term by term
    ignores that shares sum to one, so the interval is conservative.
    """
    al, ah = np.maximum(np.asarray(a_low, _F8), floor), np.maximum(np.asarray(a_high, _F8), floor)
    el, eh = np.maximum(np.asarray(e_low, _F8), floor), np.maximum(np.asarray(e_high, _F8), floor)
    corners = np.stack([_psi_terms(x, y, 0.0) for x in (al, ah) for y in (el, eh)])
    hi = corners.max(axis=0)
    lo = np.zeros_like(hi)
    up = al > eh  # new share surely above the old one
    lo[up] = _psi_terms(al[up], eh[up], 0.0)
    down = ah < el
    lo[down] = _psi_terms(ah[down], el[down], 0.0)
    return float(lo.sum()), float(hi.sum())


def level(value: float) -> str:
    """The customary reading of a PSI value (common practice)."""
    for bound, name in LEVELS:
        if value < bound:
            return name
    return LEVELS[-1][1]


# --------------------------------------------------------------------------- per feature
def _targets(f: FeatureCuts):
    """Target rank range ``[lo, hi]`` of each of a feature's edges, normalised."""
    if f.mode == "quantile" and f.first_target.size == f.edges.size:
        return f.first_target / float(f.bins), f.last_target / float(f.bins)
    # distinct values: each edge's target is its own exact rank interval in the new data
    *_, lt_est, le_est = _cdf_bounds(f.summary, f.edges)
    return lt_est, le_est


def _whole(f: FeatureCuts) -> float:
    return f.summary.total_weight + f.summary.missing_weight


def feature_drift(old: FeatureCuts, new: FeatureCuts, floor: float = SHARE_FLOOR) -> dict:
    """Drift of one feature from ``old`` to ``new`` (both of the same name).

    Returns a JSON-ready dict; see docs/DRIFT.md for every field.
    """
    so, sn = old.summary, new.summary
    e_est, e_lo, e_hi = shares_at_edges(so, old.edges)
    a_est, a_lo, a_hi = shares_at_edges(sn, old.edges)
    value = psi(a_est, e_est, floor)
    p_lo, p_hi = psi_interval(a_lo, a_hi, e_lo, e_hi, floor)
    # the estimate is inside the certified interval by construction; clamp float noise
    value = min(max(value, p_lo), p_hi)

    shift, at = 0.0, -1
    if new.edges.size and so.total_weight > 0.0:
        *_, r_lo, r_hi = _cdf_bounds(so, new.edges)
        t_lo, t_hi = _targets(new)
        # signed distance between the old-rank interval of the edge and its target range
        d = np.where(r_lo > t_hi, r_lo - t_hi, np.where(r_hi < t_lo, r_hi - t_lo, 0.0))
        at = int(np.argmax(np.abs(d)))
        shift = float(d[at])
    ms_old = so.missing_weight / _whole(old) if _whole(old) > 0 else 0.0
    ms_new = sn.missing_weight / _whole(new) if _whole(new) > 0 else 0.0
    w_old, w_new = _whole(old), _whole(new)
    ratio = w_new / w_old if w_old > 0 else (1.0 if w_new == 0 else math.inf)
    return {
        "name": new.name,
        "psi": value,
        "psi_low": p_lo,
        "psi_high": p_hi,
        "level": level(value),
        "bins": int(max(old.edges.size, 1) + 1),
        "edge_shift": shift,
        "edge_shift_error": float(so.epsilon / 2.0 + new.rank_error),
        "edge_shift_index": at,
        "edge_shift_value": float(new.edges[at]) if at >= 0 else None,
        "missing_share_from": float(ms_old),
        "missing_share_to": float(ms_new),
        "missing_share_change": float(ms_new - ms_old),
        "total_weight_from": float(w_old),
        "total_weight_to": float(w_new),
        "total_weight_ratio": float(ratio),
        "count_from": int(so.count + so.missing_count),
        "count_to": int(sn.count + sn.missing_count),
        "epsilon_from": float(so.epsilon),
        "epsilon_to": float(sn.epsilon),
        "mode_from": old.mode,
        "mode_to": new.mode,
    }


def drift_between(previous: CutTable, new: CutTable, floor: float = SHARE_FLOOR) -> dict:
    """Drift of every feature from ``previous`` to ``new``, most drifted first.

    Returns
    -------
    dict
        ``from_version``, ``to_version``, ``share_floor``, ``features`` (one dict
        per feature in both tables, sorted by PSI, then by the size of the edge
        shift), ``added`` and ``removed`` (names present in only one table),
        ``max_psi``.
    """
    old_names = set(previous.features)
    rows = [feature_drift(previous.feature(n), new.feature(n), floor)
            for n in new.features if n in old_names]
    rows.sort(key=lambda r: (-r["psi"], -abs(r["edge_shift"]), r["name"]))
    new_names = set(new.features)
    return {
        "from_version": previous.version,
        "to_version": new.version,
        "share_floor": floor,
        "features": rows,
        "added": [n for n in new.features if n not in old_names],
        "removed": [n for n in previous.features if n not in new_names],
        "max_psi": max((r["psi"] for r in rows), default=0.0),
    }


# --------------------------------------------------------------------------- a table's versions
def _list_versions(published: list[int], limit: int = 20) -> str:
    if not published:
        return "nothing is published"
    shown = ", ".join(str(v) for v in published[-limit:])
    more = f"{len(published) - limit} older, then " if len(published) > limit else ""
    return f"published versions: {more}{shown}"


def _check_version(v, what: str) -> int:
    if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or int(v) < 1:
        raise InputError(f"{what}: expected a version number >= 1, got {v!r}")
    return int(v)


def diff(table: str, from_version: int | None = None, to_version: int | None = None,
         storage_options: dict | None = None, floor: float = SHARE_FLOOR) -> dict:
    """How far the cuts of ``table`` moved between two versions.

    Parameters
    ----------
    table : str
        The table's location: a local path or an fsspec URL.
    from_version : int, optional
        The old (reference) version; default: the published version just before ``to_version``.
    to_version : int, optional
        The new version; default: the current one.
    storage_options : dict, optional
        Passed to fsspec.

    Returns
    -------
    dict
        What :func:`drift_between` returns, plus ``table`` and the two versions'
        ``from_created`` / ``to_created`` and ``from_rows`` / ``to_rows``.

    Raises
    ------
    NoInputError
        When a version does not exist (the message names the table and lists
        the published versions), or when there is no version to compare with.
    """
    from .store import TableStore

    store = TableStore(table, storage_options=storage_options)
    published = store.versions()
    if to_version is None:
        to_v = store.current()
        if to_v is None:
            raise NoInputError(f"table {store.url}: expected a published version, got none")
    else:
        to_v = _check_version(to_version, "--to")
    if to_v not in published:
        raise NoInputError(f"table {store.url}: expected version {to_v} to exist, got none "
                           f"({_list_versions(published)})")
    if from_version is None:
        before = [v for v in published if v < to_v]
        if not before:
            raise NoInputError(f"table {store.url}: expected a version before {to_v} to compare with, "
                               f"got none ({_list_versions(published)}); give --from")
        from_v = before[-1]
    else:
        from_v = _check_version(from_version, "--from")
        if from_v not in published:
            raise NoInputError(f"table {store.url}: expected version {from_v} to exist, got none "
                               f"({_list_versions(published)})")
    old = _read(store, from_v)
    new = _read(store, to_v)
    rep = {"table": store.url}
    rep.update(drift_between(old, new, floor))
    rep.update(from_created=old.record.get("created"), to_created=new.record.get("created"),
               from_rows=old.rows, to_rows=new.rows)
    return rep


def _read(store, v: int) -> CutTable:
    v, data = store.read_version(v)
    cuts = decode_table(data, what=f"cut table {store.url} version {v}")
    if cuts.version != v:
        raise FormatError(f"cut table {store.url}: expected version {v} inside the document, "
                          f"got {cuts.version}")
    return cuts


# --------------------------------------------------------------------------- text
def _pct_points(x: float) -> str:
    return f"{100.0 * x:+.2f}"


def format_diff(rep: dict) -> str:
    """A terminal report of :func:`diff` (or :func:`drift_between`) output."""
    where = f" of {rep['table']}" if rep.get("table") else ""
    head = f"drift{where}: version {rep.get('from_version')}"
    if rep.get("from_created"):
        head += f" ({rep['from_created']})"
    head += f" -> {rep.get('to_version')}"
    if rep.get("to_created"):
        head += f" ({rep['to_created']})"
    out = [head]
    if "from_rows" in rep:
        out.append(f"rows: {rep['from_rows']:,} -> {rep['to_rows']:,}")
    out.append("PSI of the new distribution over the old bins (missing is a bin; shares floored at "
               f"{rep.get('share_floor', SHARE_FLOOR):g}); edge shift in old-rank units")
    out.append("")
    feats = rep.get("features", [])
    hdr = (f"{'feature':<24} {'PSI':>8} {'certified range':>17} {'level':<8} {'bins':>5} "
           f"{'edge shift':>10} {'missing pp':>10} {'weight ratio':>12}")
    out += [hdr, "-" * len(hdr)]
    for f in feats:
        rng = f"{f['psi_low']:.3g}-{f['psi_high']:.3g}"
        out.append(f"{f['name'][:24]:<24} {f['psi']:>8.4f} {rng:>17} {f['level']:<8} {f['bins']:>5} "
                   f"{f['edge_shift']:>+10.4f} {_pct_points(f['missing_share_change']):>10} "
                   f"{f['total_weight_ratio']:>12.4g}")
    if not feats:
        out.append("(no feature in both versions)")
    if rep.get("added"):
        out.append(f"added: {', '.join(rep['added'])}")
    if rep.get("removed"):
        out.append(f"removed: {', '.join(rep['removed'])}")
    over = rep.get("over_threshold")
    if over:
        out.append(f"over --fail-above: {', '.join(over)}")
    out += ["", "reading (common practice): PSI below 0.1 little change, 0.1-0.25 moderate, "
                "above 0.25 large"]
    return "\n".join(out)


# --------------------------------------------------------------------------- picture
_COLOURS = {"little": "#4c9a5f", "moderate": "#e0a030", "large": "#c8423b"}


def plot_drift(rep: dict, path, top: int = 40) -> None:
    """Draw the PSI of each feature as horizontal bars, most drifted on top, into a PNG.

    Bars are coloured by the customary reading, whiskers show the certified
    range, and dashed lines mark 0.1 and 0.25.  At most ``top`` features are
    drawn (the most drifted); the title says how many were left out.
    """
    try:
        import matplotlib
    except ImportError as e:
        raise ImportError("plot_drift needs matplotlib: pip install 'sketchmerge[plot]'") from e
    matplotlib.use("Agg", force=True)  # files only: never open a window or need a display
    import matplotlib.pyplot as plt

    feats = list(rep.get("features", []))[:max(int(top), 1)]
    left_out = len(rep.get("features", [])) - len(feats)
    n = max(len(feats), 1)
    fig, ax = plt.subplots(figsize=(8.0, 1.4 + 0.32 * n), dpi=110)
    try:
        names = [f["name"] if len(f["name"]) <= 28 else f["name"][:27] + "…" for f in feats]
        vals = np.array([f["psi"] for f in feats], dtype=_F8)
        lo = np.array([f["psi_low"] for f in feats], dtype=_F8)
        hi = np.array([f["psi_high"] for f in feats], dtype=_F8)
        y = np.arange(len(feats))[::-1]  # the first (most drifted) feature on top
        colours = [_COLOURS.get(f.get("level", level(f["psi"])), "#777777") for f in feats]
        if feats:
            xerr = np.vstack([np.maximum(vals - lo, 0.0), np.maximum(hi - vals, 0.0)])
            ax.barh(y, vals, color=colours, height=0.7, xerr=xerr,
                    error_kw={"ecolor": "#333333", "elinewidth": 0.8, "capsize": 2})
            ax.set_yticks(y, names, fontsize=9)
            right = float(max(np.max(hi), np.max(vals), 0.3))
            for yi, v, h in zip(y, vals, hi):
                # the value sits past the whisker so neither hides the other
                ax.text(max(v, h) + right * 0.012, yi, f"{v:.3g}", va="center", fontsize=8,
                        color="#222222")
        else:
            right = 0.3
            ax.set_yticks([])
            ax.text(0.5, 0.5, "no feature in both versions", transform=ax.transAxes,
                    ha="center", va="center")
        for x in (0.1, 0.25):
            ax.axvline(x, color="#555555", linestyle="--", linewidth=0.9, zorder=0)
            ax.text(x, 1.0, f"{x:g}", transform=ax.get_xaxis_transform(), fontsize=8,
                    va="bottom", ha="center", color="#555555")
        from matplotlib.patches import Patch

        ax.legend(handles=[Patch(color=_COLOURS[k], label=lab) for k, lab in
                           (("little", "little (< 0.1)"), ("moderate", "moderate (0.1-0.25)"),
                            ("large", "large (> 0.25)"))],
                  loc="lower right", bbox_to_anchor=(1.0, 1.05), ncol=3, fontsize=8,
                  frameon=False, handlelength=1.2, columnspacing=1.0)
        ax.set_xlim(0.0, right * 1.15)
        ax.set_ylim(-0.6, n - 0.4)
        ax.set_xlabel("PSI of the new distribution over the old bins (whiskers: certified range)")
        title = f"PSI drift v{rep.get('from_version')} \u2192 v{rep.get('to_version')}"
        if left_out > 0:
            title += f"  (top {len(feats)}; {left_out} more not shown)"
        where = str(rep.get("table") or "")
        if where:
            title += "\n" + (where if len(where) <= 48 else "\u2026" + where[-47:])
        ax.set_title(title, fontsize=9, loc="left", pad=16)
        ax.spines[["top", "right"]].set_visible(False)
        fig.tight_layout()
        fig.savefig(path, format="png")
    finally:
        plt.close(fig)
