"""Every example script is run here on small data, and its figures are checked.

The examples build a cut table on the embedded local cluster, train the
example booster on it and report figures.  The checks compare those figures
with references outside the example code: the generator's true
probabilities (the Bayes rate, the best any model can do), the entropy of
the label (what a constant prediction scores), numpy's exact weighted ranks,
and an independent re-binning with ``numpy.searchsorted``.  The booster
itself is checked against closed forms of logistic-loss Newton steps.
"""

from __future__ import annotations

import importlib.util
import os
import sys
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest

EXAMPLES = Path(__file__).resolve().parents[1] / "examples"
ROWS = "30000"


def _load(name):
    spec = importlib.util.spec_from_file_location(f"sketchmerge_example_{name}", EXAMPLES / f"{name}.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)  # the script puts examples/ on sys.path for its helpers
    return mod


def _helpers():
    if str(EXAMPLES) not in sys.path:
        sys.path.insert(0, str(EXAMPLES))
    import hist_boost
    import reference
    import scenario

    return hist_boost, reference, scenario


def _entropy(y):
    """Log loss of the best constant prediction, the label's Bernoulli entropy (common practice)."""
    m = float(np.mean(y))
    return -(m * np.log(m) + (1 - m) * np.log(1 - m))


def _test_labels(root):
    _, _, scenario = _helpers()
    t = scenario.read_split(os.path.join(root, "data", "test"))
    return t.column(scenario.LABEL).to_numpy().astype(float)


def _sane(fig, bayes, y_test, slack=0.03):
    """A model's held-out figures lie between the Bayes rate and a constant prediction."""
    majority = max(y_test.mean(), 1 - y_test.mean())
    assert bayes["accuracy"] - slack <= fig["accuracy"] <= bayes["accuracy"] + 0.01, (fig, bayes)
    assert fig["accuracy"] > majority + 0.05, (fig, majority)
    assert bayes["log_loss"] - 0.01 <= fig["log_loss"] < _entropy(y_test) - 0.1, (fig, bayes)


# --------------------------------------------------------------------------- the booster
def test_booster_saturated_model_matches_group_rates():
    # with one feature of four codes, four leaves, no regularisation and many rounds, the
    # logistic-loss fit converges to the weighted label rate of each code (the maximum
    # likelihood estimate of a saturated model; common practice in statistics)
    hb, _, _ = _helpers()
    rng = np.random.default_rng(3)
    code = rng.integers(0, 4, 4000)
    y = (rng.random(4000) < np.array([0.1, 0.4, 0.7, 0.9])[code]).astype(float)
    w = rng.choice([1.0, 3.0], 4000)
    x = hb.FeatureMajorCodes.from_codes(code[:, None].astype(np.uint8), [4])
    model, _ = hb.train(x, y, w, hb.BoostParams(rounds=60, depth=2, learning_rate=1.0, l2=0.0,
                                                min_child_hess=0.0))
    p = model.predict(hb.FeatureMajorCodes.from_codes(np.arange(4, dtype=np.uint8)[:, None], [4]))
    want = [np.average(y[code == c], weights=w[code == c]) for c in range(4)]
    np.testing.assert_allclose(p, want, atol=1e-6)


def test_booster_first_newton_step():
    # at margin 0 (p = 1/2) the logistic loss has g = p - y and h = 1/4 per row, so an
    # unregularised leaf's value -G/H is 4 (mean(y) - 1/2) (Chen & Guestrin 2016, eq. 5)
    hb, _, _ = _helpers()
    codes = np.array([[0, 1], [0, 0], [0, 1], [1, 0], [1, 1], [1, 0], [1, 1], [1, 0]], np.uint8)
    y = np.array([0, 0, 1, 1, 1, 1, 0, 1], float)  # only the first feature is informative
    x = hb.FeatureMajorCodes.from_codes(codes, [2, 2])
    model, margin = hb.train(x, y, None, hb.BoostParams(rounds=1, depth=1, learning_rate=1.0, l2=0.0,
                                                        min_child_hess=0.0), base_margin=0.0)
    tree = model.trees[0]
    assert tree.feature[0].tolist() == [0] and tree.threshold[0].tolist() == [0]
    np.testing.assert_allclose(tree.leaf, [4 * (1 / 3 - 0.5), 4 * (4 / 5 - 0.5)])
    np.testing.assert_allclose(margin, np.where(codes[:, 0] == 0, -2 / 3, 1.2))


def test_booster_sends_missing_to_the_better_side():
    hb, _, _ = _helpers()
    # code 2 is missing for a feature with two bins; missing rows behave like code 1
    codes = np.array([0] * 50 + [1] * 50 + [2] * 50, np.uint8)[:, None]
    y = np.array([0] * 50 + [1] * 50 + [1] * 50, float)
    x = hb.FeatureMajorCodes.from_codes(codes, [2])
    model, _ = hb.train(x, y, None, hb.BoostParams(rounds=1, depth=1, learning_rate=1.0, l2=0.0,
                                                   min_child_hess=0.0), base_margin=0.0)
    t = model.trees[0]
    assert t.threshold[0][0] == 0 and not t.missing_left[0][0]
    np.testing.assert_allclose(t.leaf, [-2.0, 2.0])  # 4 (0 - 1/2) and 4 (1 - 1/2)


def test_reference_edges_follow_inverted_cdf():
    # Hyndman & Fan (1996) definition 1 on 1..10: the smallest x with F(x) >= p, so the
    # quartile edges are 3, 5, 8 and the maximum 10 (worked by hand)
    _, ref, _ = _helpers()
    x = np.arange(1.0, 11.0)
    np.testing.assert_array_equal(ref.exact_edges(x, None, 4), [3.0, 5.0, 8.0, 10.0])
    np.testing.assert_array_equal(ref.bin_with_edges(np.array([0.0, 3.0, 3.5, 10.0, 11.0, np.nan]),
                                                     np.array([3.0, 5.0, 8.0, 10.0])),
                                  [0, 0, 1, 3, 3, 4])


# --------------------------------------------------------------------------- the examples
@pytest.fixture(scope="module")
def shared_run(tmp_path_factory):
    d = tmp_path_factory.mktemp("shared")
    out = _load("train_shared_cuts").main(["--rows", ROWS, "--dir", str(d), "--quiet"])
    return d, out


@pytest.fixture(scope="module")
def hessian_run(tmp_path_factory):
    d = tmp_path_factory.mktemp("hessian")
    out = _load("hessian_refresh").main(["--rows", ROWS, "--dir", str(d), "--quiet",
                                         "--stage1-rounds", "10", "--stage2-rounds", "20",
                                         "--learning-rate", "0.15"])
    return d, out


@pytest.fixture(scope="module")
def two_jobs_run(tmp_path_factory):
    d = tmp_path_factory.mktemp("two")
    out = _load("two_jobs_shared_table").main(["--rows", ROWS, "--dir", str(d), "--quiet",
                                               "--rounds", "20"])
    return d, out


def test_train_shared_cuts_agrees_with_exact_edges(shared_run):
    d, r = shared_run
    y_test = _test_labels(d / "train_shared_cuts")
    assert r["train_rows"] + r["test_rows"] == int(ROWS) and r["test_rows"] == y_test.size
    for k in ("shared", "exact"):
        _sane(r[k], r["bayes"], y_test)
    # on 6,000 held-out rows the two runs may differ by a few rows; the 0.002 claim is the
    # default 1M-row run's (the slow test below)
    assert r["accuracy_gap"] <= 0.01 and r["log_loss_gap"] <= 0.01, r
    assert r["codes_match_edges"] is True  # against numpy searchsorted with the table's edges
    by = {f["name"]: f for f in r["features"]}
    # few distinct values keep every value: hub tiers 1..5, a boolean (the generator's)
    assert by["hub_tier"]["mode"] == "distinct" and by["hub_tier"]["edges_shared"] == 5
    assert by["night"]["edges_shared"] == 2 and by["night"]["identical"]
    for f in r["features"]:
        assert f["rank_deviation"] <= f["certified"] + 1e-12, f


def test_bayes_reference_is_the_generator(shared_run):
    # the reported Bayes figures are the generator's probabilities scored on the test rows
    d, r = shared_run
    _, _, scenario = _helpers()
    t = scenario.read_split(os.path.join(d, "train_shared_cuts", "data", "test"))
    p = scenario.late_probability({n: t.column(n).to_numpy() for n in scenario.FEATURES})
    y = t.column(scenario.LABEL).to_numpy()
    assert r["bayes"]["accuracy"] == pytest.approx(np.mean((p > 0.5) == y))


def test_hessian_refresh(hessian_run):
    d, r = hessian_run
    root = d / "hessian_refresh"
    y_test = _test_labels(root)
    hb = r["hessian_build"]
    # rewriting every file with the prediction column changes every partition
    assert hb["version"] == 2 and hb["changed"] and hb["partitions_sketched"] == hb["partitions_total"] > 1
    # independent reference for the weights: logistic hessian p (1 - p) times the sample
    # weight (Chen & Guestrin 2016, section 3.3), summed with numpy over the rewritten files
    _, _, scenario = _helpers()
    total = 0.0
    for f in scenario.split_files(str(root / "data" / "train")):
        t = pq.read_table(f, columns=[scenario.WEIGHT, r["prediction_column"]])
        p = t.column(r["prediction_column"]).to_numpy()
        assert np.all((p > 0) & (p < 1))
        total += float(np.sum(t.column(scenario.WEIGHT).to_numpy() * p * (1 - p)))
    assert r["hessian_weight_total"] == pytest.approx(total, rel=1e-9)
    for f in r["hessian_features"]:
        assert f["total_weight"] == pytest.approx(total, rel=1e-9), f
        assert f["rank_deviation"] <= f["certified"] + 1e-12, f
    kinds = {(x["bins"], x["cuts"]): x for x in r["stage2"]}
    assert set(kinds) == {(b, k) for b in (16, 32) for k in ("unweighted", "sample", "hessian")}
    for x in r["stage2"]:
        _sane(x, r["bayes"], y_test, slack=0.04)
    # where the hessian weight sits: about bins * (hessian share of long runs) edges above 4 km
    for b in (16, 32):
        above = kinds[(b, "hessian")]["route_km_edges_above_4km"]
        assert abs(above - b * r["long_run_share_hessian"]) <= 2, (b, above, r["long_run_share_hessian"])
        assert above > kinds[(b, "sample")]["route_km_edges_above_4km"]
    assert r["long_run_share_hessian"] > r["long_run_share_rows"]


def test_two_jobs_share_one_table(two_jobs_run):
    d, r = two_jobs_run
    y_test = _test_labels(d / "two_jobs_shared_table")
    dispatch, fleet = r["jobs"]
    assert dispatch["features"] == ["wind_gust_ms", "route_km", "battery_pct", "night"]
    assert dispatch["bins"] == 256 and dispatch["code_dtype"] == "uint16"  # 256 edges + missing
    assert fleet["bins"] == 32 and fleet["code_dtype"] == "uint8"
    for j in (dispatch, fleet):
        assert j["codes_match_edges"] is True
        assert j["accuracy"] > max(y_test.mean(), 1 - y_test.mean()) + 0.03, j
        assert j["log_loss"] < _entropy(y_test)
        for f in j["per_feature"]:
            assert f["rank_deviation"] <= f["certified"] + 1e-12 and f["certified"] <= f["target"], f
    assert r["dispatch_matches_table_order"] and r["fleet_matches_rebin"]
    s = r["shared_feature"]
    assert s["dispatch_edges"] == 256 and s["fleet_edges"] == 32 and s["fleet_codes_max"] == 31


def test_examples_write_only_their_working_folder(shared_run, hessian_run, two_jobs_run):
    for (d, _), name in ((shared_run, "train_shared_cuts"), (hessian_run, "hessian_refresh"),
                         (two_jobs_run, "two_jobs_shared_table")):
        assert sorted(os.listdir(d)) == [name]


def test_example_refuses_a_foreign_folder(tmp_path):
    mine = tmp_path / "two_jobs_shared_table"
    mine.mkdir()
    (mine / "keep.txt").write_text("not the example's")
    with pytest.raises(FileExistsError, match="two_jobs_shared_table"):
        _load("two_jobs_shared_table").main(["--rows", "1000", "--dir", str(tmp_path), "--quiet"])
    assert (mine / "keep.txt").read_text() == "not the example's"


@pytest.mark.slow
def test_train_shared_cuts_default_size(tmp_path):
    # the README's claim: on the default 1M rows the accuracies agree within 0.002
    r = _load("train_shared_cuts").main(["--dir", str(tmp_path), "--quiet"])
    assert r["rows"] == 1_000_000
    assert r["accuracy_gap"] <= 0.002, r
    y_test = _test_labels(tmp_path / "train_shared_cuts")
    for k in ("shared", "exact"):
        _sane(r[k], r["bayes"], y_test, slack=0.01)
