"""The sketch core (sketchmerge.summary): exact construction, direct pruned
construction, merge, prune, queries and the certified error bound.

References used below (each named beside its check):

* numpy's weighted quantiles, ``numpy.quantile(a, q, weights=w,
  method="inverted_cdf")``: a reference library, independent of this code.
* Hyndman & Fan (1996), "Sample quantiles in statistical packages", The
  American Statistician 50(4), definition 1: the inverse of the empirical
  distribution function, Q(p) = x_(k) with k = ceil(n p) for 0 < p <= 1.
* A brute-force rank oracle written here from the definitions: the weight of
  the rows strictly below, at or below, and equal to a point.
"""

from __future__ import annotations

import math
import threading
from fractions import Fraction

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from sketchmerge import InputError, Summary
from sketchmerge.summary import EXACT_METHODS, exact_entries, float_keys, key_values
from sketchmerge.weights import hessian


@pytest.fixture(autouse=True, params=["kernels", "numpy"])
def core_route(request, monkeypatch):
    """Every test here runs twice: with the compiled kernels (when built) and on the numpy
    route alone, which must give the same results (tests/test_kernels.py compares them)."""
    import sketchmerge.summary as core

    if request.param == "numpy":
        monkeypatch.setattr(core, "_K", None)
    elif core._K is None:
        pytest.skip("compiled kernels not built")
    return request.param


def rng(seed):
    return np.random.default_rng(seed)


# --------------------------------------------------------------------------- oracles
def oracle(x, w=None):
    """Brute force from the definitions: for points p, (weight < p, weight <= p, weight == p).

    ``x`` and ``w`` are the raw rows (NaN rows are missing and dropped)."""
    x = np.asarray(x, dtype=np.float64)
    w = np.ones(x.shape[0]) if w is None else np.asarray(w, dtype=np.float64)
    keep = ~np.isnan(x)
    x, w = x[keep], w[keep]

    def at(points):
        p = np.asarray(points, dtype=np.float64)[:, None]
        below = ((x[None, :] < p) * w).sum(axis=1)
        upto = ((x[None, :] <= p) * w).sum(axis=1)
        return below, upto, upto - below

    return at, float(w.sum())


def sorted_oracle(x, w=None):
    """The same oracle by sorting (for inputs too large to broadcast)."""
    x = np.asarray(x, dtype=np.float64)
    w = np.ones(x.shape[0]) if w is None else np.asarray(w, dtype=np.float64)
    keep = ~np.isnan(x)
    x, w = x[keep], w[keep]
    o = np.argsort(x, kind="stable")
    xs, c = x[o], np.concatenate(([0.0], np.cumsum(w[o])))

    def at(points):
        p = np.asarray(points, dtype=np.float64)
        below = c[np.searchsorted(xs, p, side="left")]
        upto = c[np.searchsorted(xs, p, side="right")]
        return below, upto, upto - below

    return at, float(c[-1])


def check_valid(s: Summary, at, total, tol=1e-9):
    """Every entry's bounds hold against the oracle, and queries keep the certified error."""
    assert s.total_weight == pytest.approx(total, rel=1e-12, abs=1e-12)
    if len(s) == 0:
        return
    slack = tol * max(total, 1.0)
    below, upto, eq = at(s.values)
    assert np.all(s.rmin <= below + slack)
    assert np.all(upto <= s.rmax + slack)
    assert np.all(s.weights <= eq + slack)
    assert s.epsilon <= s.bound
    if total <= 0.0:
        return
    q = np.linspace(0.0, 1.0, 41)
    v = s.quantiles(q)
    b, u, _ = at(v)
    d = q * total
    half = s.epsilon / 2.0 * total + slack
    # the answer's true rank interval [below, at-or-below] lies within eps/2 of the target
    assert np.all(b <= d + half) and np.all(d <= u + half)
    pts = np.concatenate((s.values, s.values[:-1] / 2.0 + s.values[1:] / 2.0))
    pts = pts[np.isfinite(pts)]
    lo, hi = s.rank_bounds(pts)
    b, u, _ = at(pts)
    assert np.all(lo * total <= b + slack) and np.all(u <= hi * total + slack)


# --------------------------------------------------------------------------- inputs
DISTRIBUTIONS = {
    "normal": lambda r, n: r.normal(size=n),
    "point_masses": lambda r, n: r.choice([-2.0, 0.0, 0.5, 7.0], size=n, p=[0.1, 0.6, 0.2, 0.1]),
    "heavy_tail": lambda r, n: r.standard_cauchy(n) * 1e3,
    "lognormal": lambda r, n: r.lognormal(0.0, 4.0, n),
    "sorted": lambda r, n: np.sort(r.normal(size=n)),
    "reverse_sorted": lambda r, n: np.sort(r.normal(size=n))[::-1].copy(),
    "few_distinct": lambda r, n: r.integers(0, 5, n).astype(np.float64),
    "signed_zeros": lambda r, n: r.choice([-0.0, 0.0, 1.0, -1.0], size=n),
    "subnormals": lambda r, n: r.choice([5e-324, 1e-320, -1e-310, 0.0, 2.2e-308], size=n),
    "large_integers": lambda r, n: (2**53 - r.integers(0, 50, n)).astype(np.int64),
    "float32": lambda r, n: r.normal(size=n).astype(np.float32),
    "with_inf_nan": lambda r, n: np.where(r.random(n) < 0.1, np.inf,
                                          np.where(r.random(n) < 0.1, np.nan, r.normal(size=n))),
    "zero_inflated": lambda r, n: np.where(r.random(n) < 0.6, 0.0, r.lognormal(0.0, 1.5, n)),
    "sentinels": lambda r, n: np.where(r.random(n) < 0.15, -999.0, np.where(r.random(n) < 0.2, -0.0, r.normal(size=n))),
}

WEIGHTINGS = {
    "unit": lambda r, n: None,
    "integer": lambda r, n: r.integers(0, 6, n).astype(np.float64),
    "one_row_most": lambda r, n: np.where(np.arange(n) == n // 3, 1e6, 1.0),
    "mostly_zero": lambda r, n: np.where(r.random(n) < 0.95, 0.0, r.random(n) + 0.5),
    "float": lambda r, n: r.gamma(0.5, 2.0, n),
}


def finite_rows(x, w):
    x = np.asarray(x, dtype=np.float64)
    keep = ~np.isnan(x)
    return x[keep], (None if w is None else np.asarray(w)[keep])


# --------------------------------------------------------------------------- exact summaries
@pytest.mark.parametrize("dist", sorted(DISTRIBUTIONS))
@pytest.mark.parametrize("weighting", sorted(WEIGHTINGS))
def test_exact_quantiles_match_numpy_inverted_cdf(dist, weighting):
    r = rng(abs(hash((dist, weighting))) % 2**32)
    n = 500
    x = DISTRIBUTIONS[dist](r, n)
    w = WEIGHTINGS[weighting](r, n)
    s = Summary.from_values(x, w)
    xf, wf = finite_rows(x, w)
    if wf is not None and wf.sum() == 0:
        pytest.skip("no weight to rank")
    q = np.concatenate((np.linspace(0.0, 1.0, 101), r.random(50)))
    # reference library: numpy.quantile(..., weights=..., method="inverted_cdf")
    ref = np.quantile(xf, q, weights=np.ones(xf.shape[0]) if wf is None else wf, method="inverted_cdf")
    got = s.quantiles(q)
    if wf is None or weighting == "integer":
        # integer weights sum exactly, so even the boundary cases (q * W landing on a
        # cumulative weight) agree: both take the lower value there
        np.testing.assert_array_equal(got, ref)
    else:
        # float weights: partial sums may round differently from numpy's row-by-row
        # cumulative sum; off a boundary the answers agree, on one both are right
        at, total = sorted_oracle(xf, wf)
        b, u, _ = at(got)
        tol = 1e-9 * total
        assert np.all(b <= q * total + tol) and np.all(q * total <= u + tol)
        differ = got != ref
        rb, ru, _ = at(ref[differ])
        assert np.all(np.isclose(ru, q[differ] * total, rtol=1e-9) | np.isclose(rb, q[differ] * total, rtol=1e-9))
    assert s.epsilon == 0.0 and s.bound == 0.0 and s.is_exact


@pytest.mark.parametrize("dist", sorted(DISTRIBUTIONS))
def test_exact_entries_against_oracle(dist):
    r = rng(11)
    x = DISTRIBUTIONS[dist](r, 300)
    w = r.integers(0, 4, 300).astype(np.float64)
    s = Summary.from_values(x, w)
    xf, wf = finite_rows(x, w)
    at, total = oracle(xf, wf)
    # every distinct value is an entry, zero-weight ones included
    np.testing.assert_array_equal(s.values, np.unique(xf + 0.0))
    below, upto, eq = at(s.values)
    np.testing.assert_array_equal(s.rmin, below)
    np.testing.assert_array_equal(s.rmax, upto)
    np.testing.assert_array_equal(s.weights, eq)
    assert s.count == xf.shape[0] and s.total_weight == total
    check_valid(s, at, total)


def test_hyndman_fan_type1_worked_examples():
    # The nearest-rank method (Hyndman & Fan 1996, definition 1): worked examples as
    # published in Wikipedia's "Percentile" article, section "The nearest-rank method"
    # (values recalled from memory, and re-derived below from the definition).
    a = [15, 20, 35, 40, 50]
    s = Summary.from_values(np.array(a, dtype=np.float64))
    for p, expected in [(0.05, 15), (0.30, 20), (0.40, 20), (0.50, 35), (1.00, 50)]:
        assert s.quantiles(p) == expected
    b = [3, 6, 7, 8, 8, 10, 13, 15, 16, 20]
    s = Summary.from_values(np.array(b, dtype=np.float64))
    for p, expected in [(0.25, 7), (0.50, 8), (0.75, 15), (1.00, 20)]:
        assert s.quantiles(p) == expected
    b2 = [3, 6, 7, 8, 8, 9, 10, 13, 15, 16, 20]
    s = Summary.from_values(np.array(b2, dtype=np.float64))
    for p, expected in [(0.25, 7), (0.50, 9), (0.75, 15), (1.00, 20)]:
        assert s.quantiles(p) == expected


@pytest.mark.parametrize("n", [1, 2, 5, 10, 37, 100])
def test_hyndman_fan_type1_definition(n):
    # Hyndman & Fan (1996) definition 1: Q(p) = x_(k), k = ceil(n p), for 0 < p <= 1,
    # evaluated in exact rational arithmetic so that n p on an integer is not rounded up
    x = np.sort(rng(n).integers(-20, 20, n).astype(np.float64))
    s = Summary.from_values(rng(n + 1).permutation(x))
    for num in range(1, 201):
        p = Fraction(num, 200)
        k = math.ceil(n * p)
        assert s.quantiles(float(p)) == x[k - 1], (n, p)


def test_missing_zero_and_infinite_values():
    x = np.array([np.nan, -0.0, 0.0, np.inf, -np.inf, 2.0, np.nan])
    w = np.array([5.0, 1.0, 2.0, 1.0, 1.0, 0.0, 0.5])
    s = Summary.from_values(x, w)
    assert s.missing_count == 2 and s.missing_weight == 5.5
    assert s.count == 5 and s.total_weight == 5.0
    # -0.0 and +0.0 are one value; infinities are the extremes; 2.0 has zero weight
    assert s.values.tolist() == [-np.inf, 0.0, 2.0, np.inf]
    assert not np.signbit(s.values[1])
    assert s.weights.tolist() == [1.0, 3.0, 0.0, 1.0]
    assert s.min == -np.inf and s.max == np.inf
    assert s.quantiles([0.0, 0.5, 1.0]).tolist() == [-np.inf, 0.0, np.inf]
    lo, hi = s.rank_bounds([-0.0, 1.0])
    assert lo.tolist() == [0.2, 0.8] and hi.tolist() == [0.8, 0.8]


@pytest.mark.parametrize("bad, pos", [(np.nan, 3), (np.inf, 1), (-np.inf, 0), (-1e-300, 2)])
def test_bad_weights_name_position(bad, pos):
    w = np.ones(6)
    w[pos] = bad
    with pytest.raises(InputError, match=f"position {pos}") as e:
        Summary.from_values(np.arange(6.0), w)
    assert isinstance(e.value, ValueError)
    with pytest.raises(InputError, match=f"position {pos}"):
        Summary.from_values(np.arange(6.0), w, capacity=2)


def test_zero_weight_rows_are_points_without_mass():
    x = np.array([1.0, 2.0, 3.0, 4.0])
    s = Summary.from_values(x, [0.0, 1.0, 0.0, 1.0])
    assert s.values.tolist() == [1.0, 2.0, 3.0, 4.0] and s.total_weight == 2.0
    assert s.quantiles([0.0, 0.5, 0.75, 1.0]).tolist() == [2.0, 2.0, 4.0, 4.0]
    empty_weight = Summary.from_values(x, np.zeros(4))
    assert empty_weight.total_weight == 0.0 and len(empty_weight) == 4
    assert empty_weight.quantiles(0.5) == 1.0


@pytest.mark.parametrize("values, expected", [
    (np.array([3, 1, 2], dtype=np.int8), [1.0, 2.0, 3.0]),
    (np.array([3, 1, 2], dtype=np.uint64), [1.0, 2.0, 3.0]),
    (np.array([True, False, True]), [0.0, 1.0]),
    (np.array([0.5, -1.5], dtype=np.float32), [-1.5, 0.5]),
    (np.array([0.5, -1.5], dtype=np.float16), [-1.5, 0.5]),
    (np.array([2**53, -(2**53)], dtype=np.int64), [-(2.0**53), 2.0**53]),
    ([1, 2.5, 2], [1.0, 2.0, 2.5]),
])
def test_accepted_dtypes(values, expected):
    s = Summary.from_values(values)
    assert s.values.tolist() == expected
    assert s.dtype == np.asarray(values).dtype.name


@pytest.mark.parametrize("values, match", [
    (np.array([2**53 + 1], dtype=np.int64), r"2\*\*53"),
    (np.array([1, -(2**53) - 1], dtype=np.int64), "position 1"),
    (np.array([2**64 - 1], dtype=np.uint64), r"2\*\*53"),
    (np.array(["a", "b"]), "numeric"),
    (np.array([1 + 2j]), "numeric"),
    (np.zeros((2, 2)), "1-D"),
    (np.array([10**30], dtype=object), "numeric"),
])
def test_rejected_values(values, match):
    with pytest.raises(InputError, match=match):
        Summary.from_values(values)


def test_rejected_weights_shape_and_capacity():
    with pytest.raises(InputError, match="length 3"):
        Summary.from_values([1.0, 2.0, 3.0], [1.0, 1.0])
    for cap in (0, -1, 2.5, True, "8"):
        with pytest.raises(InputError, match="capacity"):
            Summary.from_values([1.0, 2.0], capacity=cap)
    with pytest.raises(InputError, match="capacity"):
        Summary.from_values([1.0, 2.0]).prune(0)
    with pytest.raises(InputError, match=r"\[0, 1\]"):
        Summary.from_values([1.0, 2.0]).quantiles([0.5, 1.5])
    with pytest.raises(InputError, match="NaN"):
        Summary.from_values([1.0, 2.0]).rank_bounds([np.nan])


def test_empty_and_all_missing():
    for s in (Summary.from_values(np.array([])), Summary.from_values([np.nan, np.nan], capacity=4),
              Summary.empty()):
        assert len(s) == 0 and s.count == 0 and s.total_weight == 0.0
        assert math.isnan(s.min) and math.isnan(s.max) and s.epsilon == 0.0
        assert np.isnan(s.quantiles([0.0, 0.5])).all()
        lo, hi = s.rank_bounds([1.0])
        assert lo.tolist() == [0.0] and hi.tolist() == [0.0]
    s = Summary.from_values([np.nan, np.nan], [1.0, 2.0])
    assert s.missing_count == 2 and s.missing_weight == 3.0
    assert s.merge(Summary.empty()).missing_weight == 3.0


def test_query_shapes_and_scalars():
    s = Summary.from_values(np.arange(10.0))
    assert isinstance(s.quantiles(0.5), float) or np.ndim(s.quantiles(0.5)) == 0
    assert s.quantiles([[0.0, 1.0]]).shape == (1, 2)
    lo, hi = s.rank_bounds(np.array([[1.0, 2.0], [3.0, 4.0]]))
    assert lo.shape == hi.shape == (2, 2)
    assert lo[0, 0] == 0.1 and hi[0, 0] == 0.2


@pytest.mark.parametrize("method", [m for m in EXACT_METHODS])
@pytest.mark.parametrize("dist", ["normal", "few_distinct", "point_masses", "signed_zeros",
                                  "subnormals", "large_integers", "float32", "lognormal", "sorted"])
def test_exact_methods_agree(method, dist):
    r = rng(5)
    x, _ = finite_rows(DISTRIBUTIONS[dist](r, 3000), None)
    w = r.integers(0, 9, x.shape[0]).astype(np.float64)
    ref_x = np.unique(x + 0.0)
    for weights in (None, w):
        if method == "count":
            bits = int(float_keys(np.array([x.max()]))[0] - float_keys(np.array([x.min()]))[0]).bit_length()
            if bits > 26:
                continue
        xu, wu = exact_entries(x, weights, method)
        np.testing.assert_array_equal(xu, ref_x)
        assert not np.signbit(xu).any() or (xu[np.signbit(xu)] < 0).all()
        at, _ = sorted_oracle(x, weights)
        np.testing.assert_array_equal(wu, at(ref_x)[2])


def test_float_keys_order_and_inverse():
    x = np.array([-np.inf, -1e300, -1.0, -5e-324, -0.0, 0.0, 5e-324, 1e-300, 1.0, 3.5, np.inf])
    k = float_keys(x)
    assert np.all(k[1:] >= k[:-1]) and k[4] == k[5]  # -0.0 folds into +0.0
    back = key_values(k)
    np.testing.assert_array_equal(back, x + 0.0)


# --------------------------------------------------------------------------- direct pruned construction
CAPACITY_CASES = [
    ("normal", 20_000, 256), ("normal", 3000, 4096), ("point_masses", 20_000, 64),
    ("heavy_tail", 30_000, 512), ("lognormal", 30_000, 100), ("sorted", 10_000, 50),
    ("reverse_sorted", 10_000, 50), ("few_distinct", 10_000, 3), ("few_distinct", 10_000, 4),
    ("signed_zeros", 5000, 2), ("subnormals", 5000, 3), ("large_integers", 20_000, 16),
    ("float32", 40_000, 1000), ("with_inf_nan", 20_000, 128), ("normal", 200_000, 2048),
    ("zero_inflated", 50_000, 400), ("sentinels", 50_000, 64), ("zero_inflated", 8000, 4096),
]


@pytest.fixture
def always_direct(monkeypatch):
    """Take the direct pruned route whatever the ratio of rows to capacity."""
    import sketchmerge.summary as core

    monkeypatch.setattr(core, "_DIRECT_ROWS", 1)


@pytest.mark.parametrize("dist, n, b", CAPACITY_CASES)
@pytest.mark.parametrize("weighting", ["unit", "integer", "mostly_zero_int"])
def test_capacity_equals_exact_then_prune(dist, n, b, weighting, always_direct):
    # with integer weights every rank is an exact sum, so the direct construction and
    # "exact summary, then prune" must give the same summary, bit for bit
    r = rng(n + b)
    x = DISTRIBUTIONS[dist](r, n)
    w = {"unit": None, "integer": r.integers(0, 7, n).astype(np.float64),
         "mostly_zero_int": np.where(r.random(n) < 0.97, 0.0, 3.0)}[weighting]
    s = Summary.from_values(x, w, capacity=b)
    ref = Summary.from_values(x, w).prune(b)
    assert s == ref
    assert len(s) <= b + 1
    assert s.epsilon <= s.bound
    if not s.is_exact:
        assert s.bound == 1.0 / b


@pytest.mark.parametrize("dist, n, b", CAPACITY_CASES)
def test_capacity_with_float_weights_against_oracle(dist, n, b, always_direct):
    r = rng(7 * n + b)
    x = DISTRIBUTIONS[dist](r, n)
    w = r.gamma(0.3, 1.0, n) * np.where(r.random(n) < 0.2, 0.0, 1.0)
    s = Summary.from_values(x, w, capacity=b)
    xf, wf = finite_rows(x, w)
    at, total = sorted_oracle(xf, wf)
    assert len(s) <= b + 1
    assert s.bound <= 1.0 / b and s.epsilon <= s.bound
    # entries are data values; first and last are the exact minimum and maximum
    assert np.isin(s.values, xf + 0.0).all()
    assert s.min == xf.min() and s.max == xf.max()
    # direct construction keeps exact ranks at its entries
    below, upto, eq = at(s.values)
    np.testing.assert_allclose(s.rmin, below, rtol=1e-12, atol=1e-9 * total)
    np.testing.assert_allclose(s.rmax, upto, rtol=1e-12, atol=1e-9 * total)
    np.testing.assert_allclose(s.weights, eq, rtol=1e-12, atol=1e-9 * total)
    check_valid(s, at, total)
    ref = Summary.from_values(x, w).prune(b)
    assert len(s) == len(ref) and s.is_exact == ref.is_exact


def test_capacity_keeps_few_distinct_exact():
    r = rng(3)
    x = r.integers(0, 65, 100_000).astype(np.float64)  # 65 distinct values
    for w in (None, r.random(100_000)):
        s = Summary.from_values(x, w, capacity=64)
        assert s.is_exact and len(s) == 65 and s.epsilon == 0.0 and s.bound == 0.0
        np.testing.assert_array_equal(s.values, np.arange(65.0))
        s = Summary.from_values(x, w, capacity=63)
        assert not s.is_exact and len(s) <= 64 and s.epsilon <= s.bound == 1 / 63


def test_capacity_results_are_not_scratch():
    # the construction reuses per-thread scratch buffers: results must never alias them
    r = rng(4)
    a = Summary.from_values(r.normal(size=50_000), capacity=300)
    copy = [np.array(v) for v in (a.values, a.rmin, a.rmax, a.weights)]
    for _ in range(3):
        Summary.from_values(r.lognormal(size=60_000), r.random(60_000), capacity=500)
        Summary.from_values(r.integers(0, 9, 60_000))
    for v, c in zip((a.values, a.rmin, a.rmax, a.weights), copy):
        np.testing.assert_array_equal(v, c)
        assert not v.flags.writeable


def test_construction_in_threads_matches_serial():
    r = rng(8)
    inputs = [(r.standard_cauchy(40_000), r.random(40_000)) for _ in range(6)]
    serial = [Summary.from_values(x, w, capacity=257) for x, w in inputs]
    out = [None] * len(inputs)

    def work(i):
        for _ in range(3):
            out[i] = Summary.from_values(*inputs[i], capacity=257)

    threads = [threading.Thread(target=work, args=(i,)) for i in range(len(inputs))]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert all(a == b for a, b in zip(out, serial))


def test_deterministic_bytes():
    r = rng(9)
    x, w = r.normal(size=30_000), r.random(30_000)
    assert Summary.from_values(x, w, capacity=200).to_bytes() == Summary.from_values(x, w, capacity=200).to_bytes()
    assert Summary.from_values(x).to_bytes() == Summary.from_values(x.copy()).to_bytes()


# --------------------------------------------------------------------------- merge and prune
def test_prune_is_noop_when_small_and_keeps_at_most_b_plus_one():
    s = Summary.from_values(np.arange(10.0))
    assert s.prune(9) is s
    # a zero-weight minimum must not cost an extra entry
    x = np.arange(1000.0)
    w = np.ones(1000)
    w[0] = 0.0
    for b in (1, 2, 3, 10, 500):
        p = Summary.from_values(x, w).prune(b)
        assert len(p) <= b + 1 and p.values[0] == 0.0 and p.values[-1] == 999.0
        assert p.epsilon <= p.bound == 1.0 / b


def test_merge_of_exact_is_exact_and_equals_whole():
    r = rng(10)
    x = r.integers(0, 50, 4000).astype(np.float64)
    w = r.integers(0, 3, 4000).astype(np.float64)
    parts = [Summary.from_values(x[i::3], w[i::3]) for i in range(3)]
    m = parts[0].merge(*parts[1:])
    assert m == Summary.from_values(x, w)
    with pytest.raises(TypeError):
        parts[0].merge(object())


def test_merge_bound_is_max_and_prune_adds():
    r = rng(12)
    a = Summary.from_values(r.normal(size=5000), capacity=100)
    b = Summary.from_values(r.normal(size=7000), capacity=40)
    m = a.merge(b)
    assert m.bound == max(a.bound, b.bound) and m.epsilon <= m.bound
    assert m.prune(50).bound == m.bound + 1 / 50
    assert m.count == 12_000 and m.dtype == "float64"


@st.composite
def merge_trees(draw):
    """A random reduction tree: leaves (data, weights, optional direct capacity), inner nodes
    merging 1-4 children, each node optionally pruned and optionally passed through bytes."""
    seed = draw(st.integers(0, 2**32 - 1))
    r = rng(seed)
    n_leaves = draw(st.integers(1, 7))
    kind = draw(st.sampled_from(["normal", "ints", "masses", "heavy", "mixed"]))
    weighted = draw(st.sampled_from(["none", "int", "float", "zeros"]))
    leaves = []
    for _ in range(n_leaves):
        n = draw(st.integers(0, 400))
        if kind == "normal":
            x = r.normal(size=n)
        elif kind == "ints":
            x = r.integers(-30, 30, n).astype(np.float64)
        elif kind == "masses":
            x = r.choice([-1.0, 0.0, 2.0, 9.0], size=n)
        elif kind == "heavy":
            x = r.standard_cauchy(n)
        else:
            x = np.where(r.random(n) < 0.3, 0.0, r.lognormal(0, 2, n)) * r.choice([-1, 1], size=n)
        x[r.random(n) < 0.05] = np.nan
        w = {"none": None, "int": r.integers(0, 5, n).astype(np.float64),
             "float": r.gamma(0.7, 1.0, n), "zeros": np.where(r.random(n) < 0.7, 0.0, r.random(n))}[weighted]
        cap = draw(st.sampled_from([None, 1, 2, 5, 17, 64]))
        leaves.append((x, w, cap))
    ops = draw(st.lists(st.tuples(st.integers(1, 4), st.sampled_from([None, 1, 3, 8, 33]), st.booleans()),
                        min_size=1, max_size=6))
    return leaves, ops


@given(merge_trees())
def test_random_merge_trees_keep_their_certified_bound(tree):
    leaves, ops = tree
    xs = np.concatenate([x for x, _, _ in leaves])
    ws = None if leaves[0][1] is None else np.concatenate([w for _, w, _ in leaves])
    nodes = []
    for x, w, cap in leaves:
        s = Summary.from_values(x, w, capacity=cap)
        if cap is not None:
            assert len(s) <= cap + 1 and s.bound <= 1.0 / cap
        assert s.epsilon <= s.bound
        nodes.append(s)
    i = 0
    while len(nodes) > 1 or i < len(ops):
        fan, cap, through_bytes = ops[i % len(ops)]
        i += 1
        group, nodes = nodes[:fan], nodes[fan:]
        s = group[0].merge(*group[1:])
        assert s.bound <= max(g.bound for g in group)
        assert s.epsilon <= s.bound
        if cap is not None:
            before = s.bound
            s = s.prune(cap)
            assert len(s) <= cap + 1
            assert s.bound in (before, before + 1.0 / cap)
        assert s.epsilon <= s.bound
        if through_bytes:
            t = Summary.from_bytes(s.to_bytes())
            assert t.epsilon <= t.bound
            # rounding only ever widens the bounds
            assert np.all(t.rmin <= s.rmin) and np.all(t.rmax >= s.rmax) and np.all(t.weights <= s.weights)
            np.testing.assert_array_equal(t.values, s.values)
            assert Summary.from_bytes(t.to_bytes()) == t  # a decoded summary round-trips exactly
            s = t
        nodes.append(s)
        if i > 40:
            break
    root = nodes[0].merge(*nodes[1:])
    at, total = oracle(xs, ws)
    assert root.count == int(np.count_nonzero(~np.isnan(xs)))
    check_valid(root, at, total)


@given(st.lists(st.floats(allow_nan=True, allow_infinity=True, width=64), max_size=60),
       st.data())
def test_exact_summary_of_any_floats(values, data):
    x = np.array(values, dtype=np.float64)
    w = None
    if data.draw(st.booleans()):
        w = np.array(data.draw(st.lists(st.floats(0, 1e6), min_size=len(values), max_size=len(values))))
    s = Summary.from_values(x, w)
    xf, wf = finite_rows(x, w)
    at, total = oracle(xf, wf)
    np.testing.assert_array_equal(s.values, np.unique(xf + 0.0))
    check_valid(s, at, total)
    assert Summary.from_bytes(s.to_bytes()) == s
    cap = data.draw(st.integers(1, 8))
    p = Summary.from_values(x, w, capacity=cap)
    assert len(p) <= cap + 1 and p.epsilon <= p.bound
    check_valid(p, at, total)


# --------------------------------------------------------------------------- facts of the trade
def test_squared_error_hessian_weighting_equals_unweighted():
    # common practice: the squared-error loss has hessian 1, so hessian-weighted bin
    # edges are the unweighted ones
    r = rng(20)
    x = r.lognormal(0, 1, 20_000)
    h = hessian("squared", None)
    assert h == 1.0
    w = np.full(x.shape[0], h)
    for cap in (None, 128):
        a, b = Summary.from_values(x, w, capacity=cap), Summary.from_values(x, capacity=cap)
        np.testing.assert_array_equal(a.values, b.values)
        np.testing.assert_array_equal(a.rmin, b.rmin)
        np.testing.assert_array_equal(a.rmax, b.rmax)
        np.testing.assert_array_equal(a.quantiles(np.linspace(0, 1, 33)), b.quantiles(np.linspace(0, 1, 33)))


def test_logistic_hessian_weighting():
    # common practice: for logistic loss h = p(1 - p), largest (0.25) at p = 0.5 and zero
    # at p in {0, 1}; rows the model already predicts with certainty carry no rank mass
    p = np.array([0.0, 0.1, 0.5, 0.9, 1.0])
    h = hessian("logistic", p)
    np.testing.assert_allclose(h, [0.0, 0.09, 0.25, 0.09, 0.0])
    assert h.argmax() == 2 and h.max() == 0.25
    r = rng(21)
    x = r.normal(size=5000)
    prob = np.where(r.random(5000) < 0.3, r.choice([0.0, 1.0], size=5000), r.random(5000))
    s = Summary.from_values(x, hessian("logistic", prob))
    certain = (prob == 0.0) | (prob == 1.0)
    t = Summary.from_values(x[~certain], hessian("logistic", prob[~certain]))
    q = np.linspace(0, 1, 65)
    np.testing.assert_array_equal(s.quantiles(q), t.quantiles(q))
    assert len(s) == 5000 and len(t) == int((~certain).sum())  # the certain rows stay as points


def test_rank_error_gives_about_one_over_eps_buckets():
    # common practice: a rank error eps yields about 1/eps buckets
    x = rng(22).normal(size=100_000)
    for eps in (0.1, 0.01, 1 / 256):
        b = round(1 / eps)
        s = Summary.from_values(x, capacity=b)
        assert len(s) - 1 == b and s.bound == pytest.approx(eps)
        edges = np.unique(s.quantiles(np.arange(1, b) / b))
        assert len(edges) + 1 == b


def test_merge_sums_the_extended_bounds_of_its_inputs():
    # Chen & Guestrin (2016, Appendix A): at every point of the union the merged bounds
    # are the sums of the inputs' extended bounds (read here through rank_bounds)
    r = rng(30)
    for trial in range(20):
        parts = []
        for _ in range(int(r.integers(2, 7))):
            n = int(r.integers(1, 400))
            x = r.integers(-40, 40, n).astype(np.float64) if trial % 2 else r.normal(size=n)
            s = Summary.from_values(x, r.integers(0, 4, n).astype(np.float64), capacity=int(r.integers(1, 30)))
            if s.count and s.total_weight > 0:
                parts.append(s)
        m = parts[0].merge(*parts[1:])
        lo = sum(p.rank_bounds(m.values)[0] * p.total_weight for p in parts)
        hi = sum(p.rank_bounds(m.values)[1] * p.total_weight for p in parts)
        np.testing.assert_allclose(m.rmin, lo, rtol=0, atol=1e-9)
        np.testing.assert_allclose(m.rmax, hi, rtol=0, atol=1e-9)
        assert m.total_weight == sum(p.total_weight for p in parts)


@pytest.mark.parametrize("dist", ["normal", "heavy_tail", "zero_inflated", "lognormal", "sentinels"])
def test_capacity_refinement_levels(dist, monkeypatch, always_direct):
    # force the histogram refinement levels (normally only large work units reach them)
    import sketchmerge.summary as core

    monkeypatch.setattr(core, "_FINISH_ROWS", 16)
    monkeypatch.setattr(core, "_SORT_DIV", 10**9)
    r = rng(31)
    x = DISTRIBUTIONS[dist](r, 60_000)
    w = r.integers(0, 5, 60_000).astype(np.float64)
    for b in (7, 300, 3000):
        assert Summary.from_values(x, w, capacity=b) == Summary.from_values(x, w).prune(b)
        assert Summary.from_values(x, capacity=b) == Summary.from_values(x).prune(b)


def test_release_scratch_keeps_results_and_frees_buffers():
    from sketchmerge.summary import release_scratch

    r = rng(40)
    x = r.normal(size=200_000)
    a = Summary.from_values(x, capacity=1000)
    release_scratch()
    assert Summary.from_values(x, capacity=1000) == a


@pytest.mark.parametrize("dist", ["normal", "lognormal", "zero_inflated", "sentinels",
                                  "point_masses", "few_distinct", "packed_in_one_cell"])
@pytest.mark.parametrize("weighting", ["unit", "float", "mostly_zero"])
def test_first_level_width_does_not_change_the_summary(dist, weighting, monkeypatch):
    # The first level records counts and key ranges per cell (wide) only when the sample
    # suggests few distinct values; the pruned entries must not depend on that choice,
    # bit for bit, whichever way it goes.  "packed_in_one_cell": every value in one
    # first-level cell (one binade, within one step of its top mantissa bits), which the
    # narrow table hands to the exact methods.
    import sketchmerge.summary as core

    r = rng(77)
    n, b = 120_000, 1000
    x = (1e9 + r.random(n)) if dist == "packed_in_one_cell" else DISTRIBUTIONS[dist](r, n)
    x = np.asarray(x, dtype=np.float64)
    w = WEIGHTINGS[weighting](r, n)
    real = core._first_map
    got = {}
    for wide in (False, True):
        def forced(*a, _wide=wide, **k):
            return real(*a, **k)[:5] + (_wide,)

        monkeypatch.setattr(core, "_first_map", forced)
        got[wide] = Summary.from_values(x, w, capacity=b)
    monkeypatch.setattr(core, "_first_map", real)
    assert got[False] == got[True]
    assert got[False] == Summary.from_values(x, w, capacity=b)
    if weighting == "unit":  # exact sums: the same as exact-then-prune, bit for bit
        assert got[False] == Summary.from_values(x, w).prune(b)
