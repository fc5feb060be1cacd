"""Pictures of one feature's cuts: ``sketchmerge show TABLE --feature F --plot out.png``.

matplotlib is an optional extra (``pip install 'sketchmerge[plot]'``); it is
imported only when a plot is drawn, with the non-interactive Agg backend, so
plotting works on headless training hosts.
"""

from __future__ import annotations

import numpy as np

from .errors import SketchmergeError

__all__ = ["bin_shares", "cdf_band", "choose_xscale", "plot_feature"]


def _pyplot():
    try:
        import matplotlib
    except ImportError as e:
        raise SketchmergeError("plotting needs matplotlib: pip install 'sketchmerge[plot]'") from e
    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    return plt


def cdf_band(summary):
    """Bounds on the weighted CDF ``F(x) = weight(values <= x) / W`` at every summary entry.

    Returns ``(x, lower, upper)``: at entry ``x_i`` the summary guarantees
    ``(rmin_i + w_i) / W <= F(x_i) <= rmax_i / W`` (Chen & Guestrin, KDD 2016,
    Appendix A: ``rmin`` bounds the weight strictly below ``x_i``, ``w_i`` the
    weight at it, ``rmax`` the weight at or below it).  Between two entries
    ``F`` lies between the lower bound at the left one and the upper bound at
    the right one.  For an exact summary ``lower == upper`` is the CDF itself.
    """
    W = summary.total_weight
    x = np.asarray(summary.values, dtype=np.float64)
    if W <= 0 or x.size == 0:
        return x, np.zeros(x.shape), np.zeros(x.shape)
    lo = (np.asarray(summary.rmin) + np.asarray(summary.weights)) / W
    hi = np.asarray(summary.rmax) / W
    return x, np.clip(lo, 0.0, 1.0), np.clip(hi, 0.0, 1.0)


def choose_xscale(values: np.ndarray, edges: np.ndarray) -> str:
    """``"log"`` for positive heavy tails, ``"symlog"`` for signed or zero-inflated ones, else ``"linear"``.

    A tail is heavy when, on a linear axis, the middle 80% of the finite edges
    would fill less than a tenth of the axis (a few pixels for most edges).
    """
    e = edges[np.isfinite(edges)]
    v = values[np.isfinite(values)]
    if e.size < 5 or v.size < 2:
        return "linear"
    lo, hi = float(min(v.min(), e.min())), float(max(v.max(), e.max()))
    p10, p90 = np.quantile(e, [0.1, 0.9])
    if hi <= lo or (p90 - p10) / (hi - lo) >= 0.1:
        return "linear"
    return "log" if lo > 0 else "symlog"


def plot_feature(cuts, feature: str, png, *, xscale: str | None = None, dpi: int = 110) -> str:
    """Draw one feature's weighted CDF (from the stored summary) with its edges marked.

    Top panel: the CDF band the summary certifies (shaded; a line for an
    exact summary), each edge drawn as a vertical line and as a dot at the
    target rank it answers.  Bottom panel: each bin's share of the weight as
    far as the summary tells (midpoint of its bounds), against the even share
    ``1 / bins`` a quantile feature aims at.  The title notes the missing
    share, the mode, the certified rank error and the row count.

    Parameters
    ----------
    cuts : CutTable
    feature : str
    png : str or os.PathLike
        The image file to write.
    xscale : {"linear", "log", "symlog"}, optional
        Default: chosen by :func:`choose_xscale` (log axes for heavy tails).

    Returns
    -------
    str
        The scale used for the x axis.
    """
    f = cuts.feature(feature)
    plt = _pyplot()
    s = f.summary
    x, lo, hi = cdf_band(s)
    edges = np.asarray(f.edges, dtype=np.float64)
    scale = xscale or choose_xscale(x, edges)
    if scale not in ("linear", "log", "symlog"):
        raise SketchmergeError(f"xscale: expected linear, log or symlog, got {scale!r}")

    fig, (ax, ax2) = plt.subplots(2, 1, figsize=(9, 6.4), sharex=True,
                                  gridspec_kw={"height_ratios": [3, 1.3], "hspace": 0.08})
    finite = np.isfinite(x)
    inf_note = []
    if x.size and not finite.all():
        # +-inf cannot sit on an axis: report the mass there instead
        W = s.total_weight
        at_neg = float(hi[0]) if np.isneginf(x[0]) else 0.0
        at_pos = float(1.0 - (lo[-2] if x.size > 1 else 0.0)) if np.isposinf(x[-1]) and W > 0 else 0.0
        if at_neg:
            inf_note.append(f"-inf holds up to {at_neg:.1%}")
        if at_pos:
            inf_note.append(f"+inf holds up to {at_pos:.1%}")
    xf, lof, hif = x[finite], lo[finite], hi[finite]
    if xf.size:
        if s.is_exact:
            ax.step(xf, hif, where="post", color="#1f5fa8", lw=1.4, label="weighted CDF (exact)")
        else:
            # F(x) for x between entries i and i+1 lies in [lower_i, upper_{i+1}]
            up_between = np.append(hif[1:], hif[-1])
            width = float(np.max(up_between - lof)) if xf.size else 0.0
            ax.fill_between(xf, lof, up_between, step="post", color="#1f5fa8", alpha=0.28, lw=0,
                            label=f"certified CDF band (widest {width:.2%})")
            ax.step(xf, (lof + hif) / 2, where="post", color="#1f5fa8", lw=1.0,
                    label="band midpoint at entries")
    fe = edges[np.isfinite(edges)]
    if fe.size:
        many = fe.size > 64
        if many:  # a rug: full-height lines for hundreds of edges would hide the curve
            ax.plot(fe, np.full(fe.size, -0.01), "|", ms=9, mew=0.6, color="#c0392b", alpha=0.7)
        else:
            for e in fe:
                ax.axvline(e, color="#c0392b", lw=0.8, alpha=0.5, zorder=0)
        if f.mode == "quantile":
            targets = (f.last_target / f.bins)[np.isfinite(edges)]
            ax.plot(fe, targets, "o", ms=2.5 if many else 4, color="#c0392b",
                    label=f"edges ({edges.size}) at their target ranks")
        else:
            ax.plot([], [], color="#c0392b", lw=1, label=f"edges ({edges.size}, {f.mode})")
    ax.set_ylim(-0.03, 1.02)
    ax.set_ylabel("share of weight at or below x")
    ax.grid(True, alpha=0.25)
    miss = f"missing {f.missing_share:.1%} of weight ({s.missing_count:,} rows, code {edges.size})"
    if ax.get_legend_handles_labels()[0]:
        ax.legend(loc="lower right", fontsize=8, framealpha=0.9,
                  title="; ".join(inf_note) if inf_note else None, title_fontsize=8)
    else:  # nothing ranked: say so instead of an empty frame
        ax.text(0.5, 0.5, "no values: every row is missing", ha="center", va="center",
                transform=ax.transAxes, fontsize=11, color="#555555")
    err = "exact" if f.rank_error == 0 else f"certified edge rank error {f.rank_error:.2g}"
    fig.suptitle(f"{feature}  ({f.dtype}, {f.mode}, {edges.size} edges, {err})", fontsize=11)
    ax.set_title(f"{s.count:,} ranked rows, total weight {s.total_weight:.4g}; {miss}", fontsize=9)

    # bottom panel: each bin's weight share, F(e_i) - F(e_{i-1}), from the CDF band at the edges
    share, bounds = bin_shares(s, edges)
    if share.size:
        ok = np.isfinite(bounds)
        if ok.all():
            how = "exact" if s.is_exact else "band midpoint"
            ax2.stairs(share, bounds, color="#555555", lw=1, label=f"bin weight share ({how})")
        else:
            keep = ok[1:] & ok[:-1]
            ax2.plot(bounds[1:][keep], share[keep], ".", color="#555555", label="bin weight share")
        if f.mode == "quantile":
            ax2.axhline(1.0 / f.bins, color="#c0392b", lw=0.8, ls="--", label=f"1 / bins = {1 / f.bins:.3g}")
        top = float(np.nanmax(share)) if share.size else 1.0
        ax2.set_ylim(0, max(top, 1.0 / f.bins if f.mode == "quantile" else 0) * 1.5 or 1.0)
        ax2.legend(loc="upper right", fontsize=7, framealpha=0.9, ncol=2)
    ax2.set_ylabel("bin share")
    ax2.grid(True, alpha=0.25)
    ax2.set_xlabel(f"{feature}" + ("" if scale == "linear" else f"  ({scale} scale)"))
    if scale == "symlog":
        # linear within the central quarter of edge magnitudes: the decades
        # near zero would otherwise stretch a region that holds few edges
        mags = np.abs(fe[fe != 0]) if fe.size else np.empty(0)
        ax.set_xscale("symlog", linthresh=float(np.quantile(mags, 0.25)) if mags.size else 1.0)
    elif scale == "log":
        ax.set_xscale("log")
    fig.savefig(png, dpi=dpi, bbox_inches="tight")
    plt.close(fig)
    return scale


def bin_shares(summary, edges: np.ndarray):
    """Each bin's share of the ranked weight as far as the summary tells, and the bins' bounds.

    Returns ``(share, bounds)``: ``share[i]`` is the midpoint estimate of
    ``F(edges[i]) - F(edges[i-1])`` (``F(edges[-1]) := 0``), and ``bounds`` is
    ``[min, edges...]`` (``len(edges) + 1`` values) for a step plot.  Exact
    summaries give exact shares.
    """
    edges = np.asarray(edges, dtype=np.float64)
    if edges.size == 0 or summary.total_weight <= 0:
        return np.empty(0), np.empty(0)
    x, lo, hi = cdf_band(summary)
    i = np.clip(np.searchsorted(x, edges), 0, x.size - 1)
    on = x[i] == edges  # edges are summary entries; anything else falls back to rank_bounds
    mid = np.empty(edges.size)
    mid[on] = (lo[i[on]] + hi[i[on]]) / 2
    if not on.all():
        lb, ub = summary.rank_bounds(edges[~on])
        mid[~on] = (lb + ub) / 2
    mid[-1] = 1.0  # the last edge is the maximum: everything ranked is at or below it
    share = np.diff(np.concatenate([[0.0], mid]))
    return share, np.concatenate([[min(summary.min, edges[0])], edges])
