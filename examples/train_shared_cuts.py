"""Train a boosted model on a shared cut table, and again on exact quantile edges.

The training job here is what a team would run: it loads the published cut
table, bins its own rows with it (``cuts.bin``), and trains a histogram
gradient-boosting model for "will this drone flight land late?" (logistic
loss, sample weights from ``contract_weight``).  The same job then runs with
edges from exact weighted quantiles of all training rows computed by numpy,
with the same bin semantics.  If the shared table serves training, the two
held-out accuracies agree to within sampling noise of the edges, far inside
the 0.002 the example checks at the default size.

Run::

    python examples/train_shared_cuts.py                  # 1,000,000 rows in a temp folder
    python examples/train_shared_cuts.py --rows 50000 --dir runs

Everything it writes (data, table) stays in its working folder.
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


def parse_args(argv):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--rows", type=int, default=1_000_000, help="rows over train and test (default 1,000,000)")
    ap.add_argument("--dir", default=None, help="parent of the working folder (default: a temp folder)")
    ap.add_argument("--bins", type=int, default=256, help="bins per feature (default 256)")
    ap.add_argument("--rounds", type=int, default=100, help="boosting rounds (default 100)")
    ap.add_argument("--depth", type=int, default=6, help="tree depth (default 6)")
    ap.add_argument("--learning-rate", type=float, default=0.2)
    ap.add_argument("--workers", type=int, default=None, help="threads of the embedded cluster")
    ap.add_argument("--quiet", action="store_true", help="print only the final figures")
    return ap.parse_args(argv)


def _columns(table, names):
    return {n: table.column(n).to_numpy().astype(np.float64) for n in names}


def run_job(x_train, x_test, y, w, y_test, params) -> dict:
    """Train and evaluate one job; return its figures."""
    t0 = time.perf_counter()
    model, _ = hb.train(x_train, y, w, params)
    seconds = time.perf_counter() - t0
    prob = model.predict(x_test)
    return {"accuracy": hb.accuracy(y_test, prob), "log_loss": hb.log_loss(y_test, prob),
            "train_seconds": round(seconds, 2)}


def main(argv=None) -> dict:
    a = parse_args(argv)
    say = (lambda *x: None) if a.quiet else (lambda *x: print(*x, flush=True))
    import sketchmerge

    feats = list(scenario.FEATURES)
    params = hb.BoostParams(rounds=a.rounds, depth=a.depth, learning_rate=a.learning_rate)
    with scenario.workspace(a.dir, "train_shared_cuts") as root:
        say(f"working folder: {root}")
        t = time.perf_counter()
        lay = scenario.generate(os.path.join(root, "data"), rows=a.rows)
        say(f"generated {lay['train_rows']:,} training and {lay['test_rows']:,} held-out flights "
            f"in {time.perf_counter() - t:.1f} s")

        table = os.path.join(root, "table")
        rep = sketchmerge.build(lay["train"], table, columns=feats, weight_column=scenario.WEIGHT,
                                label_column=scenario.LABEL, bins=a.bins, workers=a.workers)
        say(f"built cut table version {rep['version']} from {rep['partitions_total']} partitions "
            f"({rep['rows']:,} rows) in {rep['seconds']:.1f} s")

        # --- the training job: load the shared table and bin with it
        train = scenario.read_split(lay["train"])
        test = scenario.read_split(lay["test"])
        y = train.column(scenario.LABEL).to_numpy().astype(np.float64)
        w = train.column(scenario.WEIGHT).to_numpy()
        y_test = test.column(scenario.LABEL).to_numpy().astype(np.float64)
        t = time.perf_counter()
        cuts = sketchmerge.load(table)
        codes_train = cuts.bin(train, features=feats)
        codes_test = cuts.bin(test, features=feats)
        load_bin_s = time.perf_counter() - t
        n_shared = [cuts.edges(n).size for n in feats]
        xs = hb.FeatureMajorCodes.from_codes(codes_train, n_shared)
        xs_test = hb.FeatureMajorCodes.from_codes(codes_test, n_shared, xs.stride)
        say(f"loaded and binned {train.num_rows + test.num_rows:,} rows in {load_bin_s:.2f} s")
        shared = run_job(xs, xs_test, y, w, y_test, params)
        shared["load_and_bin_seconds"] = round(load_bin_s, 2)
        say(f"shared cuts: accuracy {shared['accuracy']:.4f}, log loss {shared['log_loss']:.4f}, "
            f"trained in {shared['train_seconds']:.1f} s")

        # --- the same job on exact weighted quantile edges
        t = time.perf_counter()
        cols = _columns(train, feats)
        cols_test = _columns(test, feats)
        # the table's codes are exactly its edges under the documented semantics
        codes_match = bool(np.array_equal(
            codes_train, reference.bin_matrix([cols[n] for n in feats], [cuts.edges(n) for n in feats])))
        exact = [reference.exact_edges(cols[n], w, a.bins) for n in feats]
        ex_train = reference.bin_matrix([cols[n] for n in feats], exact)
        ex_test = reference.bin_matrix([cols_test[n] for n in feats], exact)
        exact_s = time.perf_counter() - t
        n_exact = [e.size for e in exact]
        xe = hb.FeatureMajorCodes.from_codes(ex_train, n_exact)
        xe_test = hb.FeatureMajorCodes.from_codes(ex_test, n_exact, xe.stride)
        ref = run_job(xe, xe_test, y, w, y_test, params)
        ref["edges_and_bin_seconds"] = round(exact_s, 2)
        say(f"exact cuts:  accuracy {ref['accuracy']:.4f}, log loss {ref['log_loss']:.4f}, "
            f"trained in {ref['train_seconds']:.1f} s (exact edges and binning {exact_s:.1f} s)")

        # how close the shared edges are to the exact ones, feature by feature
        per_feature = []
        for j, n in enumerate(feats):
            f = cuts.feature(n)
            dev = 0.0
            if f.mode == "quantile":
                dev = reference.rank_deviation(cols[n], w, f.edges, f.first_target, f.last_target, f.bins)
            per_feature.append({"name": n, "mode": f.mode, "edges_shared": n_shared[j],
                                "edges_exact": n_exact[j],
                                "identical": bool(np.array_equal(f.edges, exact[j])),
                                "rank_deviation": dev, "certified": f.rank_error})

        # the best possible model: the generator's own probabilities
        bayes = scenario.late_probability(cols_test)
        out = {
            "rows": a.rows, "train_rows": int(train.num_rows), "test_rows": int(test.num_rows),
            "bins": a.bins, "rounds": a.rounds, "depth": a.depth,
            "build_seconds": rep["seconds"], "partitions": rep["partitions_total"],
            "shared": shared, "exact": ref, "codes_match_edges": codes_match,
            "accuracy_gap": abs(shared["accuracy"] - ref["accuracy"]),
            "log_loss_gap": abs(shared["log_loss"] - ref["log_loss"]),
            "bayes": {"accuracy": hb.accuracy(y_test, bayes), "log_loss": hb.log_loss(y_test, bayes)},
            "majority_accuracy": float(max(y_test.mean(), 1 - y_test.mean())),
            "features": per_feature,
        }
    print(format_figures(out), flush=True)
    return out


def format_figures(r: dict) -> str:
    lines = [f"rows {r['rows']:,} (train {r['train_rows']:,}, test {r['test_rows']:,}), "
             f"{r['bins']} bins, {r['rounds']} rounds of depth {r['depth']}",
             f"build {r['build_seconds']:.1f} s over {r['partitions']} partitions",
             f"{'':8} {'accuracy':>9} {'log loss':>9} {'train s':>8}"]
    for k in ("shared", "exact"):
        v = r[k]
        lines.append(f"{k:8} {v['accuracy']:9.4f} {v['log_loss']:9.4f} {v['train_seconds']:8.1f}")
    b = r["bayes"]
    lines.append(f"{'bayes':8} {b['accuracy']:9.4f} {b['log_loss']:9.4f}   (the generator's own probabilities)")
    lines.append(f"accuracy gap {r['accuracy_gap']:.4f}, log loss gap {r['log_loss_gap']:.5f}; "
                 f"table codes equal a numpy re-binning with its edges: {r['codes_match_edges']}")
    lines.append(f"{'feature':14} {'mode':9} {'shared':>6} {'exact':>6} {'same':>5} {'rank dev':>9} {'certified':>9}")
    for f in r["features"]:
        lines.append(f"{f['name']:14} {f['mode']:9} {f['edges_shared']:6d} {f['edges_exact']:6d} "
                     f"{str(f['identical']):>5} {f['rank_deviation']:9.2e} {f['certified']:9.2e}")
    return "\n".join(lines)


if __name__ == "__main__":
    main(sys.argv[1:])
