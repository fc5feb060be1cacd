"""Refresh the cut table with the loss's hessian as row weight, and keep training on it.

A second-order boosting step weights each row's part in a split by the
hessian of the loss at the current prediction; for logistic loss that is
``p (1 - p)`` times the sample weight, so rows the model is already sure
about count for little (Chen & Guestrin, KDD 2016, section 3.3).  With a
tight bin budget it can pay to put the few edges where that weight is.

The example:

1. builds the table from the drone-flight training data, weighted by the
   sample weight only (version 1), and also a table with no weights at all;
2. trains a few rounds with 16-bin edges (``sketchmerge.load(table, bins=16)``);
3. writes the model's probabilities into the training data as a new column
   ``p_stage1`` (a new version of every Parquet file);
4. rebuilds the table with ``hessian="logistic", prediction_column="p_stage1"``
   (version 2: every partition changed, so every one is sketched again);
5. continues training from the stage-1 model on each kind of cuts at each
   tight budget and reports held-out accuracy and log loss.

Whichever way the comparison falls, it is printed as measured.

Run::

    python examples/hessian_refresh.py                   # 1,000,000 rows in a temp folder
    python examples/hessian_refresh.py --rows 50000 --dir runs --bins 16 32
"""

from __future__ import annotations

import argparse
import os
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

import numpy as np  # noqa: E402

import hist_boost as hb  # noqa: E402
import reference  # noqa: E402
import scenario  # noqa: E402

PRED = "p_stage1"


def parse_args(argv):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--rows", type=int, default=1_000_000, help="rows over train and test (default 1,000,000)")
    ap.add_argument("--dir", default=None, help="parent of the working folder (default: a temp folder)")
    ap.add_argument("--bins", type=int, nargs="+", default=[16, 32],
                    help="tight bin budgets to compare (default 16 32); stage 1 uses the first")
    ap.add_argument("--stage1-rounds", type=int, default=20)
    ap.add_argument("--stage2-rounds", type=int, default=60)
    ap.add_argument("--depth", type=int, default=6)
    ap.add_argument("--learning-rate", type=float, default=0.2)
    ap.add_argument("--workers", type=int, default=None, help="threads of the embedded cluster")
    ap.add_argument("--quiet", action="store_true", help="print only the final figures")
    return ap.parse_args(argv)


def _codes(cuts, table, feats, stride=None):
    n = [cuts.edges(f).size for f in feats]
    return hb.FeatureMajorCodes.from_codes(cuts.bin(table, features=feats), n, stride)


def write_predictions(files, cuts, feats, model) -> np.ndarray:
    """Add the stage-1 probabilities as column ``PRED`` to every file; return them in file order."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    out = []
    for path in files:
        t = pq.read_table(path)
        if PRED in t.column_names:
            t = t.drop_columns([PRED])
        p = model.predict(_codes(cuts, t, feats))
        t = t.append_column(PRED, pa.array(p, pa.float64()))
        tmp = path + ".tmp"
        # written aside and renamed into place: a reader sees the old file or the new one
        pq.write_table(t, tmp, row_group_size=65_536)
        os.replace(tmp, path)
        out.append(p)
    return np.concatenate(out)


def main(argv=None) -> dict:
    a = parse_args(argv)
    say = (lambda *x: None) if a.quiet else (lambda *x: print(*x, flush=True))
    import sketchmerge

    feats = list(scenario.FEATURES)
    p1 = hb.BoostParams(rounds=a.stage1_rounds, depth=a.depth, learning_rate=a.learning_rate)
    p2 = hb.BoostParams(rounds=a.stage2_rounds, depth=a.depth, learning_rate=a.learning_rate)
    budgets = list(a.bins)
    with scenario.workspace(a.dir, "hessian_refresh") as root:
        say(f"working folder: {root}")
        lay = scenario.generate(os.path.join(root, "data"), rows=a.rows)
        table = os.path.join(root, "table")
        plain_table = os.path.join(root, "table-unweighted")
        common = dict(columns=feats, label_column=scenario.LABEL, workers=a.workers)
        rep1 = sketchmerge.build(lay["train"], table, weight_column=scenario.WEIGHT, **common)
        rep0 = sketchmerge.build(lay["train"], plain_table, **common)
        say(f"version {rep1['version']} (sample weights) built in {rep1['seconds']:.1f} s; "
            f"unweighted table in {rep0['seconds']:.1f} s")

        train = scenario.read_split(lay["train"])
        test = scenario.read_split(lay["test"])
        y = train.column(scenario.LABEL).to_numpy().astype(np.float64)
        w = train.column(scenario.WEIGHT).to_numpy()
        y_test = test.column(scenario.LABEL).to_numpy().astype(np.float64)

        # --- stage 1: a few rounds on the sample-weighted table at the first tight budget
        cuts1 = sketchmerge.load(table, bins=budgets[0])
        x1 = _codes(cuts1, train, feats)
        x1_test = _codes(cuts1, test, feats, x1.stride)
        model1, m_train = hb.train(x1, y, w, p1)
        m_test = model1.margin(x1_test)
        prob1 = hb.sigmoid(m_test)
        stage1 = {"accuracy": hb.accuracy(y_test, prob1), "log_loss": hb.log_loss(y_test, prob1)}
        say(f"stage 1 ({a.stage1_rounds} rounds, {budgets[0]} bins): accuracy {stage1['accuracy']:.4f}, "
            f"log loss {stage1['log_loss']:.4f}")

        # --- write the predictions into the data, then refresh the table with hessian weights
        t = time.perf_counter()
        p_written = write_predictions(scenario.split_files(lay["train"]), cuts1, feats, model1)
        write_s = time.perf_counter() - t
        rep2 = sketchmerge.build(lay["train"], table, weight_column=scenario.WEIGHT, hessian="logistic",
                                 prediction_column=PRED, prediction_scale="probability", **common)
        say(f"wrote column {PRED} in {write_s:.1f} s; version {rep2['version']} (hessian) built in "
            f"{rep2['seconds']:.1f} s, {rep2['partitions_sketched']}/{rep2['partitions_total']} "
            f"partitions sketched")

        hess_w = w * p_written * (1.0 - p_written)
        full_h = sketchmerge.load(table)
        hess_check = []
        for n in feats:
            f = full_h.feature(n)
            x = train.column(n).to_numpy().astype(np.float64)
            dev = 0.0
            if f.mode == "quantile":
                dev = reference.rank_deviation(x, hess_w, f.edges, f.first_target, f.last_target, f.bins)
            hess_check.append({"name": n, "total_weight": f.total_weight + f.missing_weight,
                               "rank_deviation": dev, "certified": f.rank_error})

        # --- stage 2: continue from the stage-1 margins on each kind of cuts
        kinds = {"unweighted": (plain_table, None), "sample": (table, 1), "hessian": (table, 2)}
        results = []
        route_long = train.column("route_km").to_numpy() > 4.0
        for bins in budgets:
            for kind, (tb, version) in kinds.items():
                cuts = sketchmerge.load(tb, version=version, bins=bins)
                x = _codes(cuts, train, feats)
                x_test = _codes(cuts, test, feats, x.stride)
                t = time.perf_counter()
                model2, _ = hb.train(x, y, w, p2, init_margin=m_train)
                seconds = time.perf_counter() - t
                prob = model2.predict(x_test, init=m_test)
                e = cuts.edges("route_km")
                results.append({"bins": bins, "cuts": kind, "accuracy": hb.accuracy(y_test, prob),
                                "log_loss": hb.log_loss(y_test, prob), "train_seconds": round(seconds, 2),
                                "route_km_edges_above_4km": int(np.count_nonzero(e > 4.0)),
                                "route_km_edges": int(e.size)})
                r = results[-1]
                say(f"stage 2, {bins:3d} bins, {kind:10} cuts: accuracy {r['accuracy']:.4f}, "
                    f"log loss {r['log_loss']:.4f} ({seconds:.1f} s)")
        bayes = scenario.late_probability({n: test.column(n).to_numpy() for n in feats})
        out = {"rows": a.rows, "train_rows": int(train.num_rows), "test_rows": int(test.num_rows),
               "budgets": budgets, "stage1_rounds": a.stage1_rounds, "stage2_rounds": a.stage2_rounds,
               "stage1": stage1,
               "build": {"sample": rep1["seconds"], "unweighted": rep0["seconds"], "hessian": rep2["seconds"]},
               "hessian_build": {"version": rep2["version"], "changed": rep2["changed"],
                                 "partitions_sketched": rep2["partitions_sketched"],
                                 "partitions_total": rep2["partitions_total"]},
               "hessian_weight_total": float(hess_w.sum()),
               "long_run_share_rows": float(route_long.mean()),
               "long_run_share_hessian": float(hess_w[route_long].sum() / hess_w.sum()),
               "hessian_features": hess_check, "stage2": results,
               "bayes": {"accuracy": hb.accuracy(y_test, bayes), "log_loss": hb.log_loss(y_test, bayes)},
               "prediction_column": PRED}
    print(format_figures(out), flush=True)
    return out


def format_figures(r: dict) -> str:
    s = r["stage1"]
    lines = [f"rows {r['rows']:,} (train {r['train_rows']:,}, test {r['test_rows']:,}); "
             f"stage 1: {r['stage1_rounds']} rounds on sample-weighted {r['budgets'][0]}-bin cuts, "
             f"accuracy {s['accuracy']:.4f}, log loss {s['log_loss']:.4f}",
             f"hessian refresh: version {r['hessian_build']['version']}, "
             f"{r['hessian_build']['partitions_sketched']}/{r['hessian_build']['partitions_total']} partitions "
             f"sketched in {r['build']['hessian']:.1f} s",
             f"long runs (route_km > 4): {r['long_run_share_rows']:.1%} of rows, "
             f"{r['long_run_share_hessian']:.1%} of the hessian weight",
             f"stage 2: {r['stage2_rounds']} more rounds",
             f"{'bins':>4} {'cuts':10} {'accuracy':>9} {'log loss':>9} {'route_km edges > 4 km':>22}"]
    for x in r["stage2"]:
        lines.append(f"{x['bins']:4d} {x['cuts']:10} {x['accuracy']:9.4f} {x['log_loss']:9.4f} "
                     f"{x['route_km_edges_above_4km']:>14d} of {x['route_km_edges']:<3d}")
    b = r["bayes"]
    lines.append(f"bayes (the generator's own probabilities): accuracy {b['accuracy']:.4f}, "
                 f"log loss {b['log_loss']:.4f}")
    return "\n".join(lines)


if __name__ == "__main__":
    main(sys.argv[1:])
