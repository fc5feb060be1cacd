"""Drift between cut-table versions: PSI, edge shift, missing share, weight ratio, diff CLI, plot.

Every expected value is computed independently with numpy on the raw rows the
summaries were built from (never from the summaries): bin shares over the old
edges with the cut-table bin semantics (bin i holds edges[i-1] < x <= edges[i],
values above the last edge in the last bin, NaN as its own bin), weighted with
``numpy.bincount``, and the PSI formula written out again here.  Pruned
summaries are checked against the certified interval the module derives from
their rank bounds, which must contain the exact value.

The scenario: readings of a made-up fleet of greenhouse sensors, generated here.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from sketchmerge import Summary
from sketchmerge.cli import main
from sketchmerge.cuts import decode_table, encode_table, feature_cuts
from sketchmerge.drift import (SHARE_FLOOR, diff, drift_between, feature_drift, format_diff,
                               plot_drift, psi, psi_interval, shares_at_edges)
from sketchmerge.errors import InputError, NoInputError
from sketchmerge.store import TableStore

BINS = 32


# --------------------------------------------------------------------------- references
def ref_shares(edges, x, w=None):
    """Exact shares over ``edges`` plus a missing bin, from the raw rows (numpy only)."""
    x = np.asarray(x, dtype=float)
    w = np.ones_like(x) if w is None else np.asarray(w, dtype=float)
    nan = np.isnan(x)
    k = max(len(edges), 1)
    # side="left" gives the first i with x <= edges[i], i.e. edges[i-1] < x <= edges[i]
    i = np.searchsorted(np.asarray(edges, dtype=float), x[~nan], side="left") if len(edges) else \
        np.zeros(int((~nan).sum()), dtype=np.int64)
    i = np.minimum(i, k - 1)  # above the last edge: the last bin
    counts = np.bincount(i, weights=w[~nan], minlength=k)
    out = np.append(counts, w[nan].sum())
    return out / w.sum()


def ref_psi(a, e, floor=SHARE_FLOOR):
    """PSI = sum (a - e) ln(a / e) with shares floored (docs/DRIFT.md), in plain Python."""
    total = 0.0
    for ai, ei in zip(a, e):
        ai, ei = max(ai, floor), max(ei, floor)
        total += (ai - ei) * math.log(ai / ei)
    return total


def cuts_of(name, x, w=None, capacity=None, bins=BINS):
    s = Summary.from_values(np.asarray(x), weights=w, capacity=capacity)
    return feature_cuts(name, s, bins, 1.0 / (8 * bins))


def encode(features, version, *, rows, bins=BINS, weight_column=None, hessian=None,
           prediction_column=None, created=None, changes=None, units=3):
    content = {"source": "generated://greenhouse/readings", "rows": int(rows),
               "options": {"bins": bins, "rank_error": 1.0 / (8 * bins), "weight_column": weight_column,
                           "hessian": hessian, "prediction_column": prediction_column},
               "units": {"address": [f"part-{i:03d}.parquet" for i in range(units)],
                         "fingerprint": [f"{version:02d}{i:014x}" for i in range(units)],
                         "rows": [int(rows) // units] * units, "nbytes": [1000] * units}}
    record = {"created": created or f"2031-04-{version:02d}T02:00:00Z", "tool": "sketchmerge test",
              "previous_version": version - 1 if version > 1 else None,
              "changes": changes or {"units_added": units if version == 1 else 0,
                                     "units_removed": 0, "units_changed": 0 if version == 1 else 1}}
    return encode_table(features, version=version, content_extra=content, record=record)


def publish(table, versions):
    """Publish a list of feature lists as versions 1, 2, ... of ``table``."""
    store = TableStore(str(table))
    for v, feats in enumerate(versions, start=1):
        store.publish(v, encode(feats, v, rows=10_000), blob_keys=[])
    return store


def rng(seed):
    return np.random.default_rng(seed)


# --------------------------------------------------------------------------- the formula
def test_psi_formula_hand_values():
    # hand computation: 0.1 ln(0.6/0.5) + (-0.1) ln(0.4/0.5)
    assert psi([0.6, 0.4], [0.5, 0.5]) == pytest.approx(0.1 * math.log(1.2) - 0.1 * math.log(0.8))
    assert psi([0.25] * 4, [0.25] * 4) == 0.0
    # an empty new bin uses the floor: (1e-4 - 0.5) ln(1e-4 / 0.5) + (1 - 0.5) ln(1 / 0.5)
    assert psi([0.0, 1.0], [0.5, 0.5]) == pytest.approx(
        (1e-4 - 0.5) * math.log(1e-4 / 0.5) + 0.5 * math.log(2.0))
    with pytest.raises(InputError):
        psi([0.5, 0.5], [1.0])


def test_psi_interval_contains_every_point_of_the_box():
    r = rng(3)
    a_lo = r.uniform(0, 0.2, 6)
    a_hi = a_lo + r.uniform(0, 0.05, 6)
    e_lo = r.uniform(0, 0.2, 6)
    e_hi = e_lo + r.uniform(0, 0.05, 6)
    lo, hi = psi_interval(a_lo, a_hi, e_lo, e_hi)
    # brute force over a grid of the box: the bounds hold at every sampled point
    for _ in range(300):
        a = r.uniform(a_lo, a_hi)
        e = r.uniform(e_lo, e_hi)
        v = ref_psi(a, e)
        assert lo - 1e-12 <= v <= hi + 1e-12
    # and the bounds are attained at corners / nearest ends (tight per term)
    corner = max(ref_psi([x], [y]) for x in (a_lo[0], a_hi[0]) for y in (e_lo[0], e_hi[0]))
    assert psi_interval(a_lo[:1], a_hi[:1], e_lo[:1], e_hi[:1])[1] == pytest.approx(corner)


# --------------------------------------------------------------------------- shares
def test_shares_exact_summary_match_numpy_weighted_with_missing():
    r = rng(1)
    x = r.gamma(2.0, 3.0, 5000)
    x[r.random(5000) < 0.07] = np.nan
    w = r.exponential(1.0, 5000)
    s = Summary.from_values(x, weights=w)
    edges = np.quantile(x[~np.isnan(x)], np.linspace(0.05, 0.95, 17))
    est, lo, hi = shares_at_edges(s, edges)
    ref = ref_shares(edges, x, w)
    np.testing.assert_allclose(est, ref, atol=1e-12)
    np.testing.assert_allclose(lo, ref, atol=1e-12)
    np.testing.assert_allclose(hi, ref, atol=1e-12)


def test_shares_pruned_summary_bounds_hold():
    r = rng(2)
    x = r.standard_normal(40_000)
    s = Summary.from_values(x, capacity=100)
    edges = np.linspace(-2.5, 2.5, 41)  # points between the summary's entries
    est, lo, hi = shares_at_edges(s, edges)
    ref = ref_shares(edges, x)
    assert np.all(lo <= ref + 1e-12) and np.all(ref <= hi + 1e-12)
    # the weight at or below each edge is bounded by an interval at most epsilon wide,
    # so each share (a difference of two of them) lies in an interval at most 2 epsilon wide
    assert np.all(hi - lo <= 2 * s.epsilon + 1e-12)
    assert np.all(np.abs(est - ref) <= 2 * s.epsilon + 1e-12)
    assert np.max(hi - lo) > s.epsilon / 2  # the bounds are not trivially exact here


# --------------------------------------------------------------------------- PSI per feature
def test_identical_data_psi_zero():
    r = rng(4)
    x = r.standard_normal(20_000)
    exact = feature_drift(cuts_of("t", x), cuts_of("t", x))
    assert exact["psi"] == 0.0 and exact["psi_high"] == 0.0
    assert exact["edge_shift"] == 0.0
    pruned_old = cuts_of("t", x, capacity=256)
    pruned_new = cuts_of("t", x[::-1].copy(), capacity=256)
    d = feature_drift(pruned_old, pruned_new)
    # exact value is 0; the certified interval must contain it and the estimate is inside it
    assert d["psi_low"] == 0.0
    assert 0.0 <= d["psi"] <= d["psi_high"]
    assert d["psi"] < 0.01
    assert abs(d["edge_shift"]) <= d["edge_shift_error"]


@pytest.mark.parametrize("weighted", [False, True])
def test_shifted_exact_psi_matches_numpy(weighted):
    r = rng(5)
    n = 30_000
    x0 = r.standard_normal(n)
    x1 = r.standard_normal(n) + 0.5
    x0[r.random(n) < 0.02] = np.nan
    x1[r.random(n) < 0.06] = np.nan
    w0 = r.exponential(1.0, n) if weighted else None
    w1 = r.exponential(1.0, n) if weighted else None
    old, new = cuts_of("temp", x0, w0), cuts_of("temp", x1, w1)
    d = feature_drift(old, new)
    ref = ref_psi(ref_shares(old.edges, x1, w1), ref_shares(old.edges, x0, w0))
    assert d["psi"] == pytest.approx(ref, rel=1e-9, abs=1e-12)
    assert d["psi_low"] == pytest.approx(ref, rel=1e-9) and d["psi_high"] == pytest.approx(ref, rel=1e-9)
    assert d["bins"] == old.edges.size + 1


def test_shifted_pruned_psi_within_certified_interval():
    r = rng(6)
    n = 100_000
    x0 = r.standard_normal(n)
    x1 = r.standard_normal(n) + 0.5
    # capacity 2048 gives about the accuracy of a default build (epsilon <= 1/(4 * bins))
    old = cuts_of("temp", x0, capacity=2048, bins=256)
    new = cuts_of("temp", x1, capacity=2048, bins=256)
    d = feature_drift(old, new)
    ref = ref_psi(ref_shares(old.edges, x1), ref_shares(old.edges, x0))
    assert d["psi_low"] <= ref <= d["psi_high"]
    # the interval is worst case; the interpolated estimate is far closer (measured ~0.1%)
    assert d["psi"] == pytest.approx(ref, rel=0.02)
    # reading thresholds 0.1 / 0.25 (common practice)
    assert d["level"] == ("large" if ref > 0.25 else "moderate" if ref >= 0.1 else "little")


def test_merged_pruned_summaries_within_certified_interval():
    r = rng(7)
    x0 = r.lognormal(0.0, 1.0, 60_000)
    x1 = r.lognormal(0.2, 1.1, 60_000)

    def merged(x):
        parts = [Summary.from_values(p, capacity=512) for p in np.array_split(x, 6)]
        return parts[0].merge(*parts[1:]).prune(512)

    old = feature_cuts("flow", merged(x0), 64, 1 / 512)
    new = feature_cuts("flow", merged(x1), 64, 1 / 512)
    d = feature_drift(old, new)
    ref = ref_psi(ref_shares(old.edges, x1), ref_shares(old.edges, x0))
    assert d["psi_low"] <= ref <= d["psi_high"]
    assert d["psi_low"] < d["psi_high"]  # merged summaries are uncertain at their entries


@settings(max_examples=25)
@given(seed=st.integers(0, 2**32 - 1), shift=st.floats(-1.0, 1.0), cap=st.sampled_from([16, 64, 200]),
       bins=st.sampled_from([4, 16, 50]), ints=st.booleans())
def test_certified_interval_always_contains_numpy_psi(seed, shift, cap, bins, ints):
    r = rng(seed)
    x0 = r.standard_normal(3000) * 3
    x1 = r.standard_normal(2000) * 3 + shift * 3
    if ints:  # point masses and ties
        x0, x1 = np.round(x0), np.round(x1)
    x1[r.random(2000) < 0.1] = np.nan
    w0 = r.uniform(0.0, 2.0, 3000)
    w1 = r.uniform(0.0, 2.0, 2000)
    old = cuts_of("f", x0, w0, capacity=cap, bins=bins)
    new = cuts_of("f", x1, w1, capacity=cap, bins=bins)
    d = feature_drift(old, new)
    ref = ref_psi(ref_shares(old.edges, x1, w1), ref_shares(old.edges, x0, w0))
    assert d["psi_low"] - 1e-9 <= ref <= d["psi_high"] + 1e-9
    assert d["psi_low"] <= d["psi"] <= d["psi_high"]


def test_distinct_and_empty_features():
    r = rng(8)
    v0 = r.integers(0, 5, 4000).astype(float)
    v1 = r.choice([0, 1, 2, 3, 4, 5], 4000, p=[0.1, 0.1, 0.2, 0.2, 0.3, 0.1]).astype(float)
    old, new = cuts_of("vent", v0), cuts_of("vent", v1)
    assert old.mode == "distinct"
    d = feature_drift(old, new)
    ref = ref_psi(ref_shares(old.edges, v1), ref_shares(old.edges, v0))
    assert d["psi"] == pytest.approx(ref, rel=1e-12)
    # a value above the old maximum (5) falls into the last old bin, as when binning
    assert ref_shares(old.edges, v1)[-2] == pytest.approx(np.mean(v1 >= 4))

    # a feature that was all missing: one value bin and the missing bin
    e0 = np.full(1000, np.nan)
    e1 = np.where(r.random(1000) < 0.3, np.nan, 1.0)
    de = feature_drift(cuts_of("dead", e0), cuts_of("dead", e1))
    assert de["bins"] == 2
    assert de["psi"] == pytest.approx(ref_psi([np.mean(e1 == 1.0), np.mean(np.isnan(e1))], [0.0, 1.0]))
    assert de["missing_share_change"] == pytest.approx(np.mean(np.isnan(e1)) - 1.0)


# --------------------------------------------------------------------------- edge shift
def test_edge_shift_of_a_mean_shift_against_numpy():
    r = rng(9)
    n = 50_000
    x0 = r.standard_normal(n)
    x1 = r.standard_normal(n) + 0.5
    for cap in (None, 2048):
        old = cuts_of("temp", x0, capacity=cap, bins=64)
        new = cuts_of("temp", x1, capacity=cap, bins=64)
        d = feature_drift(old, new)
        # reference 1: where the old ROWS place the new edges (numpy on the data), minus the targets
        t = new.last_target / new.bins
        old_rank = np.array([np.mean(x0 <= e) for e in new.edges])
        ref = (old_rank - t)[np.argmax(np.abs(old_rank - t))]
        assert d["edge_shift"] == pytest.approx(ref, abs=old.summary.epsilon / 2 + 1.0 / n)
        # reference 2, independent of the table's edges: exact new quantiles from numpy
        # (inverted_cdf, Hyndman & Fan 1996 definition 1) placed in the old rows
        q = np.quantile(x1, t, method="inverted_cdf")
        old_q = np.array([np.mean(x0 <= v) for v in q])
        ref2 = np.max(np.abs(old_q - t))
        assert abs(d["edge_shift"]) == pytest.approx(ref2, abs=d["edge_shift_error"] + 2.0 / n)
        assert d["edge_shift"] > 0  # the distribution moved up: new edges rank higher in the old data


def test_edge_shift_downward_weighted_is_negative():
    r = rng(10)
    n = 20_000
    x0 = r.uniform(0, 10, n)
    x1 = r.uniform(-2, 8, n)
    w0 = r.uniform(0.5, 1.5, n)
    w1 = r.uniform(0.5, 1.5, n)
    old, new = cuts_of("rad", x0, w0), cuts_of("rad", x1, w1)
    d = feature_drift(old, new)
    t = new.last_target / new.bins
    old_rank = np.array([w0[x0 <= e].sum() / w0.sum() for e in new.edges])
    dev = old_rank - t
    assert d["edge_shift"] == pytest.approx(dev[np.argmax(np.abs(dev))], abs=1e-9)
    assert d["edge_shift"] < -0.15


# --------------------------------------------------------------------------- weights and missing
def test_missing_share_and_weight_ratio():
    r = rng(11)
    x0 = r.standard_normal(8000)
    x1 = r.standard_normal(12_000)
    x0[:400] = np.nan
    x1[:3000] = np.nan
    w0 = r.uniform(1, 2, 8000)
    w1 = r.uniform(1, 3, 12_000)
    d = feature_drift(cuts_of("hum", x0, w0), cuts_of("hum", x1, w1))
    ms0 = w0[:400].sum() / w0.sum()
    ms1 = w1[:3000].sum() / w1.sum()
    assert d["missing_share_from"] == pytest.approx(ms0)
    assert d["missing_share_to"] == pytest.approx(ms1)
    assert d["missing_share_change"] == pytest.approx(ms1 - ms0)
    assert d["total_weight_ratio"] == pytest.approx(w1.sum() / w0.sum())
    assert (d["count_from"], d["count_to"]) == (8000, 12_000)


# --------------------------------------------------------------------------- tables
def three_features(seed, shift_temp, shift_hum, shift_light, n=20_000):
    r = rng(seed)
    return [cuts_of("temp", r.standard_normal(n) + shift_temp),
            cuts_of("humidity", r.standard_normal(n) * (1 + shift_hum)),
            cuts_of("light", r.exponential(1.0 + shift_light, n))]


def test_drift_between_orders_most_drifted_first_and_lists_added_removed():
    old = decode_table(encode(three_features(1, 0, 0, 0) + [cuts_of("co2", np.arange(100.0))], 1, rows=20_000))
    new_feats = three_features(2, 0.05, 0.6, 0.2) + [cuts_of("soil", np.arange(50.0))]
    new = decode_table(encode(new_feats, 2, rows=20_000))
    rep = drift_between(old, new)
    names = [f["name"] for f in rep["features"]]
    # the reference order: numpy PSI of each feature's rows over its old edges
    r_old = rng(1)
    raw_old = [r_old.standard_normal(20_000), r_old.standard_normal(20_000), r_old.exponential(1.0, 20_000)]
    r_new = rng(2)
    raw_new = [r_new.standard_normal(20_000) + 0.05, r_new.standard_normal(20_000) * 1.6,
               r_new.exponential(1.2, 20_000)]
    refs = {}
    for name, a, b in zip(["temp", "humidity", "light"], raw_old, raw_new):
        e = old.feature(name).edges
        refs[name] = ref_psi(ref_shares(e, b), ref_shares(e, a))
    assert names == sorted(refs, key=lambda k: -refs[k])
    assert names[0] == "humidity"
    for f in rep["features"]:
        assert f["psi"] == pytest.approx(refs[f["name"]], rel=1e-9)
    assert rep["added"] == ["soil"] and rep["removed"] == ["co2"]
    assert (rep["from_version"], rep["to_version"]) == (1, 2)
    assert rep["max_psi"] == pytest.approx(max(refs.values()), rel=1e-9)


def test_diff_defaults_and_pins(tmp_path):
    table = tmp_path / "greenhouse"
    publish(table, [three_features(1, 0, 0, 0), three_features(2, 0.3, 0, 0), three_features(3, 1.0, 0, 0)])
    rep = diff(str(table))
    assert (rep["from_version"], rep["to_version"]) == (2, 3)
    assert rep["to_created"] == "2031-04-03T02:00:00Z" and rep["from_rows"] == 10_000
    pinned = diff(str(table), from_version=1, to_version=2)
    assert (pinned["from_version"], pinned["to_version"]) == (1, 2)
    only_to = diff(str(table), to_version=2)
    assert only_to["from_version"] == 1
    t12 = {f["name"]: f["psi"] for f in pinned["features"]}
    t13 = {f["name"]: f["psi"] for f in diff(str(table), from_version=1)["features"]}
    assert t13["temp"] > t12["temp"]  # a larger mean shift drifts more


def test_diff_missing_version_errors(tmp_path):
    table = tmp_path / "greenhouse"
    publish(table, [three_features(1, 0, 0, 0), three_features(2, 0, 0, 0)])
    with pytest.raises(NoInputError) as ei:
        diff(str(table), from_version=7)
    msg = str(ei.value)
    assert "greenhouse" in msg and "version 7" in msg and "1, 2" in msg
    with pytest.raises(NoInputError, match="version 9"):
        diff(str(table), to_version=9)
    with pytest.raises(NoInputError, match="before 1"):
        diff(str(table), to_version=1)
    with pytest.raises(InputError):
        diff(str(table), from_version=0)
    with pytest.raises(NoInputError):
        diff(str(tmp_path / "nothing-here"))


def test_diff_cli_exit_codes_and_json(tmp_path, capsys):
    table = str(tmp_path / "greenhouse")
    publish(table, [three_features(1, 0, 0, 0), three_features(2, 0.5, 0, 0)])
    assert main(["diff", table]) == 0
    text = capsys.readouterr().out
    assert "temp" in text and "version 1" in text
    assert main(["diff", table, "--fail-above", "0.1"]) == 10
    out = capsys.readouterr().out
    assert "over --fail-above: temp" in out
    assert main(["diff", table, "--fail-above", "5"]) == 0
    capsys.readouterr()
    assert main(["diff", table, "--json", "--fail-above", "0.1"]) == 10
    doc = json.loads(capsys.readouterr().out)
    assert doc["over_threshold"] == ["temp"]
    assert doc["features"][0]["name"] == "temp"
    assert doc["features"][0]["psi"] > 0.1 > doc["features"][-1]["psi"]
    assert main(["diff", table, "--from", "5"]) == 4  # no input: the version does not exist
    assert "version 5" in capsys.readouterr().err


def test_format_diff_text():
    old = decode_table(encode(three_features(1, 0, 0, 0), 1, rows=1))
    new = decode_table(encode(three_features(2, 0.5, 0, 0)[:2] + [cuts_of("soil", np.arange(9.0))], 2, rows=1))
    text = format_diff(drift_between(old, new))
    lines = text.splitlines()
    first_row = next(i for i, line in enumerate(lines) if line.startswith("temp"))
    assert lines[first_row].split()[0] == "temp"
    assert "added: soil" in text and "removed: light" in text
    assert "0.1-0.25 moderate" in text


# --------------------------------------------------------------------------- plot
def test_plot_drift_png(tmp_path):
    image = pytest.importorskip("matplotlib.image")
    old = decode_table(encode(three_features(1, 0, 0, 0), 1, rows=1))
    new = decode_table(encode(three_features(2, 0.5, 0.3, 0.1), 2, rows=1))
    rep = drift_between(old, new)
    path = tmp_path / "drift.png"
    plot_drift(rep, path)
    assert path.stat().st_size > 5000
    with open(path, "rb") as fh:
        assert fh.read(8) == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification, section 5.2)
    img = image.imread(path)
    assert img.ndim == 3 and img.shape[0] > 100 and img.shape[1] > 400
    assert float(img[..., :3].std()) > 0.05  # not a blank canvas


def test_plot_drift_cli(tmp_path, capsys):
    pytest.importorskip("matplotlib")
    table = str(tmp_path / "greenhouse")
    publish(table, [three_features(1, 0, 0, 0), three_features(2, 0.5, 0, 0)])
    png = tmp_path / "d.png"
    assert main(["diff", table, "--plot", str(png)]) == 0
    capsys.readouterr()
    assert png.stat().st_size > 5000
