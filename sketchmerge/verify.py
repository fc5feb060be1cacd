"""``sketchmerge verify``: measure every edge's exact weighted rank on the data.

Each work unit returns, per feature, the weight strictly below and at-or-below
every edge (two cumulative histograms over the edges: ``k + 1`` numbers, not
data); the driver adds them up and compares each edge's rank interval with
the target ranks it answers.  With ``sample_rows`` each unit keeps a seeded
Bernoulli sample of its rows and the report states the sampling uncertainty
(three standard errors, with Kish's effective sample size for weighted rows).
"""

from __future__ import annotations

import hashlib
import logging
import math

import numpy as np

from .errors import InputError

__all__ = ["format_verify", "unit_ranks", "verify"]

log = logging.getLogger("sketchmerge")
_TOL = 1e-9  # float64 summation slack on normalised ranks


def unit_ranks(unit, spec, edges: dict, rate: float | None):
    """Worker task: per feature, weight below / at-or-below each edge, totals, sample stats."""
    from .job import _row_weights
    from .sources import read_unit

    arrays, _, rows = read_unit(unit, spec.columns_to_read(), protocol=spec.protocol,
                                storage_options=spec.storage_options or None)
    w = _row_weights(arrays, spec, f"unit {unit.address}", rows)
    keep = None
    if rate is not None and rate < 1.0:
        seed = int.from_bytes(hashlib.sha256(unit.address.encode()).digest()[:8], "little")
        keep = np.random.default_rng(seed).random(rows) < rate
    out = {}
    for name, e in edges.items():
        x = arrays[name]
        ww = np.ones(rows) if w is None else w
        if keep is not None:
            x, ww = x[keep], ww[keep]
        ok = ~np.isnan(x)
        x, ww = x[ok], ww[ok]
        k = e.size
        right = np.searchsorted(e, x, side="right")  # number of edges <= x
        left = np.searchsorted(e, x, side="left")    # number of edges < x
        lt = np.bincount(right, weights=ww, minlength=k + 1)
        le = np.bincount(left, weights=ww, minlength=k + 1)
        off = left == right  # x equals no edge
        out[name] = {"lt": lt, "le": le, "w": float(ww.sum()), "w2": float(np.dot(ww, ww)),
                     "n": int(x.size), "off_edge_count": int(np.count_nonzero(off))}
    return out


def _add(a, b):
    out = {}
    for name in a:
        x, y = a[name], b[name]
        out[name] = {"lt": x["lt"] + y["lt"], "le": x["le"] + y["le"], "w": x["w"] + y["w"],
                     "w2": x["w2"] + y["w2"], "n": x["n"] + y["n"],
                     "off_edge_count": x["off_edge_count"] + y["off_edge_count"]}
    return out


def _sum_all(*parts):
    acc = parts[0]
    for p in parts[1:]:
        acc = _add(acc, p)
    return acc


def verify(table: str, source: str, *, sample_rows: int | None = None, version: int | None = None,
           storage_options: dict | None = None, format: str | None = None, client=None,
           scheduler=None, scheduler_file=None, workers=None) -> dict:
    """Recompute the exact weighted rank of every edge and compare with the certified bound.

    Returns a report with per-feature ``max_rank_error``, ``certified``,
    ``ok``, and an overall ``ok``.
    """
    from .job import BuildSpec, _Cluster
    from .cuts import load
    from .sources import open_dataset, redact

    cuts = load(table, version=version, storage_options=storage_options)
    o = cuts.options
    ds = open_dataset(source, fmt=format or o.get("format"), storage_options=storage_options)
    names = [n for n in cuts.features]
    absent = [n for n in names if n not in ds.columns]
    if absent:
        log.warning("columns absent from %s count as missing: %s", redact(ds.source), ", ".join(absent))
    spec = BuildSpec(features=tuple(n for n in names if n in ds.columns),
                     weight_column=o.get("weight_column"), hessian=o.get("hessian"),
                     prediction_column=o.get("prediction_column"),
                     prediction_scale=o.get("prediction_scale"),
                     missing_weight=o.get("missing_weight", "error"), leaf_capacity=1,
                     protocol=ds.protocol, storage_options=dict(storage_options or {}))
    edges = {n: cuts.edges(n) for n in spec.features}
    units = sorted(ds.units, key=lambda u: u.address)
    total_rows = sum(max(u.rows, 0) for u in units) or cuts.rows
    rate = None
    if sample_rows:
        if sample_rows <= 0:
            raise InputError(f"--sample-rows: expected a positive count, got {sample_rows}")
        rate = min(1.0, sample_rows / max(total_rows, 1))
    changed = sorted(set(zip([u.address for u in units], [u.fingerprint for u in units]))
                     ^ set(zip(cuts.content["units"]["address"], cuts.content["units"]["fingerprint"])))
    if changed:
        log.warning("the source differs from what version %s was built from (%d units differ); "
                    "errors are measured against today's data", cuts.version, len(changed))
    if not units:
        raise InputError(f"verify: {redact(ds.source)} has no data units")
    cl = _Cluster(client, scheduler, scheduler_file, workers)
    try:
        futs = cl.client.map(unit_ranks, units, spec=spec, edges=edges, rate=rate, pure=True)
        while len(futs) > 1:  # tree sum on the workers
            futs = [cl.client.submit(_sum_all, *futs[i:i + 8]) if len(futs[i:i + 8]) > 1 else futs[i]
                    for i in range(0, len(futs), 8)]
        acc = futs[0].result()
    finally:
        cl.close()
    feats = []
    for n in names:
        f = cuts.feature(n)
        rec = {"name": n, "mode": f.mode, "certified": f.rank_error, "edges_count": int(f.edges.size)}
        if n not in acc:
            rec.update(max_rank_error=0.0, ok=True, note="column absent from source")
            feats.append(rec)
            continue
        a = acc[n]
        W = a["w"]
        unc = 0.0
        if rate is not None and rate < 1.0 and a["w2"] > 0:
            n_eff = W * W / a["w2"]
            unc = 3.0 * math.sqrt(0.25 / max(n_eff, 1.0))
        if f.mode == "distinct":
            err = 0.0 if a["off_edge_count"] == 0 else float("inf")
            rec.update(max_rank_error=err, values_not_on_an_edge=a["off_edge_count"])
        elif f.mode == "empty" or W <= 0:
            err = 0.0
            rec.update(max_rank_error=0.0)
        else:
            lt = np.cumsum(a["lt"])[:-1] / W
            le = np.cumsum(a["le"])[:-1] / W
            lo_t = f.first_target / f.bins
            hi_t = f.last_target / f.bins
            per = np.maximum(0.0, np.maximum(lt - lo_t, hi_t - le))
            err = float(per.max()) if per.size else 0.0
            rec.update(max_rank_error=err, worst_edge=int(np.argmax(per)) if per.size else None)
        rec["uncertainty"] = unc
        rec["ok"] = bool(err <= f.rank_error + unc + _TOL)
        rec["sampled_rows"] = a["n"]
        feats.append(rec)
    feats.sort(key=lambda r: -(r["max_rank_error"] - r["certified"]))
    return {"table": table, "version": cuts.version, "source": redact(ds.source),
            "sample_rate": rate, "units": len(units), "source_changed_units": len(changed),
            "features": feats, "ok": all(r["ok"] for r in feats)}


def format_verify(rep: dict) -> str:
    rate = rep["sample_rate"]
    scope = "all rows" if not rate else f"sample rate {rate:.3g}"
    lines = [f"verify version {rep['version']} against {rep['source']} ({scope}, {rep['units']} units)",
             f"{'feature':<24} {'mode':<8} {'measured':>10} {'certified':>10} {'+-3 s.e.':>9}  result"]
    for r in rep["features"]:
        lines.append(f"{r['name'][:24]:<24} {r['mode']:<8} {r['max_rank_error']:>10.3g} "
                     f"{r['certified']:>10.3g} {r.get('uncertainty', 0):>9.2g}  {'ok' if r['ok'] else 'OVER BOUND'}")
    lines.append("all edges within their certified bounds" if rep["ok"]
                 else "SOME EDGES ARE OVER THEIR CERTIFIED BOUND")
    return "\n".join(lines)
