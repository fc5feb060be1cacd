"""Two training jobs share one cut table with different features and bin counts.

One table is built once from the drone-flight training data (256 bins per
feature, weighted by ``contract_weight``).  Then:

* the **dispatch job** uses four features in an order of its own
  (``cuts.bin(rows, features=[...])``) with the stored 256-bin edges;
* the **fleet job** uses five other features (one shared with the dispatch
  job) at 32 bins, derived from the stored summaries without reading the
  data again (``sketchmerge.load(table, bins=32)``).

Each job's codes are checked against an independent re-binning of its rows
with ``cuts.edges(name)`` (numpy ``searchsorted``, the documented bin
semantics), so both jobs bin with exactly the table's edges; the 32-bin
edges are checked against the exact weighted ranks of all rows.  Each job
then trains a small model on its own features and reports held-out accuracy.

Run::

    python examples/two_jobs_shared_table.py                 # 1,000,000 rows in a temp folder
    python examples/two_jobs_shared_table.py --rows 50000 --dir runs
"""

from __future__ import annotations

import argparse
import os
import sys

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

import numpy as np  # noqa: E402

import hist_boost as hb  # noqa: E402
import reference  # noqa: E402
import scenario  # noqa: E402

DISPATCH = ["wind_gust_ms", "route_km", "battery_pct", "night"]
FLEET = ["payload_kg", "ceiling_m", "rain_mm", "route_km", "hub_tier"]


def parse_args(argv):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--rows", type=int, default=1_000_000, help="rows over train and test (default 1,000,000)")
    ap.add_argument("--dir", default=None, help="parent of the working folder (default: a temp folder)")
    ap.add_argument("--fleet-bins", type=int, default=32, help="bins of the second job (default 32)")
    ap.add_argument("--rounds", type=int, default=40)
    ap.add_argument("--depth", type=int, default=5)
    ap.add_argument("--workers", type=int, default=None, help="threads of the embedded cluster")
    ap.add_argument("--quiet", action="store_true", help="print only the final figures")
    return ap.parse_args(argv)


def run_job(name, cuts, feats, train, test, params, w) -> dict:
    """Bin one job's rows with ``cuts``, check the codes independently, train, evaluate."""
    codes = cuts.bin(train, features=feats)
    codes_test = cuts.bin(test, features=feats)
    # independent re-binning with the table's edges: numpy searchsorted, documented semantics
    ref = reference.bin_matrix([train.column(n).to_numpy().astype(np.float64) for n in feats],
                               [cuts.edges(n) for n in feats])
    same = bool(np.array_equal(codes.astype(np.int64), ref.astype(np.int64)))
    dev = []
    for n in feats:
        f = cuts.feature(n)
        x = train.column(n).to_numpy().astype(np.float64)
        d = 0.0
        if f.mode == "quantile":
            d = reference.rank_deviation(x, w, f.edges, f.first_target, f.last_target, f.bins)
        dev.append({"name": n, "mode": f.mode, "edges": int(f.edges.size), "rank_deviation": d,
                    "certified": f.rank_error, "target": f.target_rank_error})
    n_edges = [cuts.edges(n).size for n in feats]
    x = hb.FeatureMajorCodes.from_codes(codes, n_edges)
    xt = hb.FeatureMajorCodes.from_codes(codes_test, n_edges, x.stride)
    y = train.column(scenario.LABEL).to_numpy().astype(np.float64)
    yt = test.column(scenario.LABEL).to_numpy().astype(np.float64)
    model, _ = hb.train(x, y, w, params)
    prob = model.predict(xt)
    return {"job": name, "features": feats, "bins": int(cuts.feature(feats[0]).bins),
            "code_dtype": str(codes.dtype), "codes_match_edges": same, "per_feature": dev,
            "accuracy": hb.accuracy(yt, prob), "log_loss": hb.log_loss(yt, prob),
            "_codes": codes}


def main(argv=None) -> dict:
    a = parse_args(argv)
    say = (lambda *x: None) if a.quiet else (lambda *x: print(*x, flush=True))
    import sketchmerge

    params = hb.BoostParams(rounds=a.rounds, depth=a.depth)
    with scenario.workspace(a.dir, "two_jobs_shared_table") as root:
        say(f"working folder: {root}")
        lay = scenario.generate(os.path.join(root, "data"), rows=a.rows)
        table = os.path.join(root, "table")
        rep = sketchmerge.build(lay["train"], table, columns=list(scenario.FEATURES),
                                weight_column=scenario.WEIGHT, label_column=scenario.LABEL,
                                workers=a.workers)
        say(f"built the shared table (version {rep['version']}, {rep['rows']:,} rows) in {rep['seconds']:.1f} s")
        train = scenario.read_split(lay["train"])
        test = scenario.read_split(lay["test"])
        w = train.column(scenario.WEIGHT).to_numpy()

        stored = sketchmerge.load(table)
        fleet_cuts = sketchmerge.load(table, bins=a.fleet_bins)
        jobs = [run_job("dispatch", stored, DISPATCH, train, test, params, w),
                run_job("fleet", fleet_cuts, FLEET, train, test, params, w)]

        # the dispatch job's columns are the table-order binning's columns, reordered
        full = stored.bin(train)
        order = [stored.features.index(n) for n in DISPATCH]
        reorder_same = bool(np.array_equal(jobs[0].pop("_codes"), full[:, order]))
        fleet_codes = jobs[1].pop("_codes")
        # load(..., bins=N) is the stored table rebinned: the same edges either way
        rebinned = stored.rebin(a.fleet_bins)
        rebin_same = all(np.array_equal(rebinned.edges(n), fleet_cuts.edges(n)) for n in FLEET)
        # the feature both jobs use: coarser edges, the same bin semantics
        j = FLEET.index("route_km")
        shared_feature = {"name": "route_km", "dispatch_edges": int(stored.edges("route_km").size),
                          "fleet_edges": int(fleet_cuts.edges("route_km").size),
                          "fleet_codes_max": int(fleet_codes[:, j].max())}
        out = {"rows": a.rows, "table_version": rep["version"], "table_bins": int(stored.feature("route_km").bins),
               "jobs": jobs, "dispatch_matches_table_order": reorder_same,
               "fleet_matches_rebin": rebin_same, "shared_feature": shared_feature}
    print(format_figures(out), flush=True)
    return out


def format_figures(r: dict) -> str:
    lines = [f"one table (version {r['table_version']}, {r['table_bins']} bins), two jobs, {r['rows']:,} rows"]
    for j in r["jobs"]:
        lines.append(f"{j['job']:9} {j['bins']:4d} bins, codes {j['code_dtype']}, "
                     f"codes match the table's edges: {j['codes_match_edges']}; "
                     f"accuracy {j['accuracy']:.4f}, log loss {j['log_loss']:.4f}")
        for f in j["per_feature"]:
            lines.append(f"    {f['name']:14} {f['mode']:9} {f['edges']:4d} edges, rank deviation "
                         f"{f['rank_deviation']:.2e} (certified {f['certified']:.2e}, needed {f['target']:.2e})")
    lines.append(f"dispatch codes equal the table-order binning reordered: {r['dispatch_matches_table_order']}")
    lines.append(f"load(table, bins=N) equals rebin(N): {r['fleet_matches_rebin']}")
    s = r["shared_feature"]
    lines.append(f"route_km: {s['dispatch_edges']} edges for dispatch, {s['fleet_edges']} for fleet")
    return "\n".join(lines)


if __name__ == "__main__":
    main(sys.argv[1:])
