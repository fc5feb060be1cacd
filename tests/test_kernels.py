"""The optional compiled kernels (sketchmerge/_kernels.c) against the numpy code paths.

A summary built with the kernels must be the summary built without them, bit for
bit: same entries, same rank sums, same totals (the kernels repeat numpy's
order of additions).  Both are also checked against "exact summary, then
prune" (the definition of the direct construction) and, for the scan kernel,
against numpy's own nan-aware reductions (a reference library).
"""

from __future__ import annotations

import numpy as np
import pytest

import sketchmerge.summary as core
from sketchmerge import Summary

pytestmark = pytest.mark.skipif(core._K is None, reason="compiled kernels not built")


def _dists(r, n):
    return {
        "normal": r.normal(20, 5, n),
        "lognormal": r.lognormal(3, 2, n),
        "zeros90": np.where(r.random(n) < 0.9, 0.0, r.exponential(40, n)),
        "rounded": np.round(r.gamma(2, 5, n), 1),
        "small_ints": r.integers(0, 300, n).astype(float),
        "with_nan": np.where(r.random(n) < 0.02, np.nan, r.normal(size=n)),
        "signed_zeros": np.where(r.random(n) < 0.3, -0.0, r.normal(size=n)),
        "cauchy": r.standard_cauchy(n),
        "with_inf": np.where(r.random(n) < 0.01, np.inf, r.normal(size=n)),
        "two_values": r.choice([1.0, 2.0], n),
        "sorted": np.sort(r.normal(size=n)),
        "half_one_value": np.concatenate([r.normal(size=n // 2), np.full(n - n // 2, 3.25)]),
        "subnormal_scale": r.normal(size=n) * 1e-310,
        "narrow": 1e6 + r.random(n) * 1e-6,  # a few mantissa steps: refinement levels
    }


def _same(a: Summary, b: Summary) -> bool:
    return (np.array_equal(a.values, b.values) and np.array_equal(a.rmin, b.rmin)
            and np.array_equal(a.rmax, b.rmax) and np.array_equal(a.weights, b.weights)
            and a.total_weight == b.total_weight and a.is_exact == b.is_exact
            and a.bound == b.bound and a.count == b.count
            and a.missing_count == b.missing_count and a.missing_weight == b.missing_weight)


@pytest.fixture
def without_kernels(monkeypatch):
    def build(x, w, cap):
        with monkeypatch.context() as m:
            m.setattr(core, "_K", None)
            return Summary.from_values(x, w, capacity=cap)
    return build


@pytest.mark.parametrize("n", [60_000, 250_000])
@pytest.mark.parametrize("weighting", ["unit", "float", "zero_or_one"])
def test_kernels_give_the_numpy_summary_bit_for_bit(n, weighting, without_kernels):
    r = np.random.default_rng(n)
    w = {"unit": None, "float": r.gamma(2, 1, n),
         "zero_or_one": np.where(r.random(n) < 0.3, 0.0, 1.0)}[weighting]
    for name, x in _dists(r, n).items():
        for cap in (2049, 300):
            a = Summary.from_values(x, w, capacity=cap)
            b = without_kernels(x, w, cap)
            assert _same(a, b), (name, cap)
            ref = Summary.from_values(x, w).prune(cap)  # the definition
            np.testing.assert_array_equal(a.values, ref.values, err_msg=name)
            np.testing.assert_allclose(a.rmin, ref.rmin, rtol=1e-12, atol=1e-9 * a.total_weight)
            assert a.is_exact == ref.is_exact and a.epsilon <= a.bound


def test_refinement_levels_with_kernels(monkeypatch, without_kernels):
    # cells holding most rows take the histogram levels instead of one sort
    monkeypatch.setattr(core, "_SORT_DIV", 10**9)
    monkeypatch.setattr(core, "_FINISH_ROWS", 16)
    r = np.random.default_rng(8)
    x = r.lognormal(1, 1, 80_000)
    w = r.integers(0, 4, 80_000).astype(float)
    a = Summary.from_values(x, w, capacity=500)
    assert _same(a, without_kernels(x, w, 500))
    assert a == Summary.from_values(x, w).prune(500)


def test_scan_against_numpy_reductions():
    r = np.random.default_rng(2)
    cases = [r.normal(size=1000), np.sort(r.normal(size=1000)), np.sort(r.normal(size=1000))[::-1].copy(),
             np.where(r.random(1000) < 0.1, np.nan, r.normal(size=1000)), np.full(10, 2.0),
             np.array([np.nan, np.nan]), np.array([1.0, np.nan, 0.5]), np.array([-0.0, 0.0, -0.0]),
             np.array([np.nan, 1.0, np.nan, 2.0, 3.0])]
    for x in cases:
        nan, lo, hi, order = core._K.scan(x)
        assert nan == int(np.isnan(x).sum())
        ok = x[~np.isnan(x)]
        if ok.size == 0:
            assert np.isnan(lo) and np.isnan(hi)
            continue
        assert lo == np.nanmin(x) and hi == np.nanmax(x)
        expect = 1 if np.all(ok[1:] >= ok[:-1]) else (-1 if np.all(ok[1:] <= ok[:-1]) else 0)
        assert order == expect


def _scan_reference(x):
    """numpy's reductions: NaN count, nanmin, nanmax and the order of the non-NaN values."""
    ok = x[~np.isnan(x)]
    if ok.size == 0:
        return int(x.size), None, None, 1
    order = 1 if np.all(ok[1:] >= ok[:-1]) else (-1 if np.all(ok[1:] <= ok[:-1]) else 0)
    return int(x.size - ok.size), np.nanmin(x), np.nanmax(x), order


def test_scan_every_position_of_the_vector_loop():
    # the scan takes four values a step: one out-of-order value, a NaN or an extreme at
    # each position of short arrays checks the steps, the tail and the first value
    r = np.random.default_rng(5)
    cases = [np.empty(0)]
    for n in range(1, 14):
        up = np.sort(r.normal(size=n))
        cases += [up, up[::-1].copy(), np.full(n, -np.inf), np.full(n, np.nan)]
        for k in range(n):
            bad = up.copy()
            bad[k] = up[-1] + 1.0 if k < n - 1 else up[0] - 1.0  # breaks the order at k
            nan = up.copy()
            nan[k] = np.nan
            big = r.normal(size=n)
            big[k] = np.inf if k % 2 else -np.inf
            cases += [bad, bad[::-1].copy(), nan, nan[::-1].copy(), big]
    for x in cases:
        nan, lo, hi, order = core._K.scan(x)
        e_nan, e_lo, e_hi, e_order = _scan_reference(x)
        assert (nan, order) == (e_nan, e_order), x
        if e_lo is None:
            assert np.isnan(lo) and np.isnan(hi)
        else:
            assert (lo, hi) == (e_lo, e_hi), x


def test_weights_ok_finds_the_first_bad_weight():
    w = np.ones(100)
    assert core._K.weights_ok(w) == -1
    for bad in (-1.0, np.nan, np.inf):
        v = w.copy()
        v[[37, 60]] = bad
        assert core._K.weights_ok(v) == 37
    assert core._K.weights_ok(np.array([-0.0, 0.0])) == -1  # -0.0 >= 0: an allowed zero


def test_kernels_refuse_mismatched_arrays():
    x = np.arange(10.0)
    with pytest.raises(ValueError, match="lengths"):
        core._K.first_level(x, np.ones(9), 0, np.ones(1, np.int64), np.zeros(1, np.int64), None,
                            np.empty(10, np.int64), np.empty(40, np.uint64))
    with pytest.raises(ValueError, match="outside"):  # a cell beyond the table
        core._K.first_level(x, None, 0, np.full(1, 1 << 20, np.int64), np.zeros(1, np.int64), None,
                            np.empty(10, np.int64), np.empty(4, np.uint64))
    with pytest.raises(ValueError):
        core._K.scan(np.arange(10, dtype=np.int32))  # 4-byte items
    c = np.zeros(10, np.int32)
    out = (np.empty(3, np.uint64), np.empty(3), np.empty(3, np.int64))
    with pytest.raises(ValueError, match="agree"):  # a row in an unflagged cell
        core._K.refine(x, None, c, np.full(1, -1, np.int32), np.array([0, 1, 2]), 1, *out)
    with pytest.raises(ValueError, match="agree"):  # a parent index beyond npar
        core._K.refine(x, None, c, np.ones(1, np.int32), np.array([0, 1, 2]), 1, *out)
    with pytest.raises(ValueError, match="agree"):  # a row beyond x
        core._K.refine(x, None, c, np.zeros(1, np.int32), np.array([0, 1, 10]), 1, *out)
    with pytest.raises(ValueError, match="lengths"):  # outputs shorter than the rows
        core._K.refine(x, None, c, np.zeros(1, np.int32), np.arange(4), 1, *out)
    with pytest.raises(ValueError, match="4- or 8-byte"):
        core._K.refine(x, None, c.astype(np.int16), np.zeros(1, np.int32), np.arange(3), 1, *out)


def test_kernels_run_in_threads_without_the_gil():
    # the kernels release the GIL: summaries built in threads equal serial ones
    from concurrent.futures import ThreadPoolExecutor

    r = np.random.default_rng(5)
    cols = [r.lognormal(0, 1 + i / 4, 200_000) for i in range(4)]
    w = r.gamma(2, 1, 200_000)
    serial = [Summary.from_values(c, w, capacity=2049) for c in cols]
    with ThreadPoolExecutor(4) as ex:
        threaded = list(ex.map(lambda c: Summary.from_values(c, w, capacity=2049), cols))
    assert all(_same(a, b) for a, b in zip(serial, threaded))


def test_results_of_columns_with_missing_values_are_not_scratch():
    # NaN rows are compacted into per-thread scratch buffers: summaries must not alias them
    r = np.random.default_rng(9)
    x = np.where(r.random(100_000) < 0.05, np.nan, r.normal(size=100_000))
    w = r.gamma(2, 1, 100_000)
    for cap in (None, 500):  # exact and direct routes
        a = Summary.from_values(x, w, capacity=cap)
        keep = [np.array(v) for v in (a.values, a.rmin, a.rmax, a.weights)]
        Summary.from_values(r.normal(size=100_000) * 7, w, capacity=cap)
        for v, k in zip((a.values, a.rmin, a.rmax, a.weights), keep):
            np.testing.assert_array_equal(v, k)
        assert a.missing_count == int(np.isnan(x).sum())
        assert a.missing_weight == w[np.isnan(x)].sum()  # numpy's own sum, bit for bit


def test_few_distinct_values_in_shared_cells_stay_exact(without_kernels):
    # rare tail values share first-level cells: those cells are sorted, and with at most
    # capacity + 1 distinct values the summary stays exact (numpy's unique as reference)
    r = np.random.default_rng(10)
    x = np.round(np.concatenate([r.gamma(2, 4, 200_000), r.uniform(100, 1000, 300)]), 1)
    u, c = np.unique(x, return_counts=True)
    s = Summary.from_values(x, capacity=u.size)
    assert s.is_exact and np.array_equal(s.values, u) and np.array_equal(s.weights, c)
    assert _same(s, without_kernels(x, None, u.size))
    p = Summary.from_values(x, capacity=u.size // 2)
    assert _same(p, Summary.from_values(x).prune(u.size // 2))


def test_merge_kernel_gives_the_numpy_merge_bit_for_bit(monkeypatch):
    # the k-way merge kernel adds the parts' extended bounds in part order, as the numpy
    # route does; both are checked against the parts' own rank_bounds (the definition)
    r = np.random.default_rng(12)
    for trial in range(12):
        parts = []
        for i in range(int(r.integers(1, 9))):
            n = int(r.integers(1, 20_000))
            x = np.round(r.normal(size=n), int(r.integers(1, 5)))
            w = r.gamma(2, 1, n) if trial % 2 else None
            parts.append(Summary.from_values(x, w, capacity=int(r.integers(20, 2500))))
        a = parts[0].merge(*parts[1:])
        with monkeypatch.context() as m:
            m.setattr(core, "_K", None)
            b = parts[0].merge(*parts[1:])
        assert _same(a, b), trial
        if not a.is_exact:
            lo = sum(p.rank_bounds(a.values)[0] * p.total_weight for p in parts)
            hi = sum(p.rank_bounds(a.values)[1] * p.total_weight for p in parts)
            np.testing.assert_allclose(a.rmin, lo, rtol=0, atol=1e-9 * a.total_weight)
            np.testing.assert_allclose(a.rmax, hi, rtol=0, atol=1e-9 * a.total_weight)
            assert a.epsilon <= a.bound


def test_packed_codec_kernels_give_the_numpy_bytes_and_summaries(monkeypatch):
    # bit packing and the packed decoder in C against the numpy codec (docs/FORMAT.md):
    # identical blob bytes, identical decoded summaries, for weighted, unweighted, exact,
    # float32-valued and zero-crossing summaries
    import glob
    import os

    from sketchmerge import blob

    r = np.random.default_rng(13)
    sums = [Summary.from_values(r.normal(size=60_000), r.lognormal(0, 1, 60_000), capacity=2048),
            Summary.from_values(r.normal(size=60_000), capacity=700),
            Summary.from_values(r.integers(0, 90, 10_000).astype(float)),
            Summary.from_values(r.gamma(2, 3, 50_000).astype(np.float32), r.random(50_000), capacity=999),
            Summary.from_values(np.array([-np.inf, 0.0, 1.5, np.inf])),
            Summary.from_values(r.normal(size=9000), r.integers(0, 3, 9000).astype(float), capacity=64)]
    sums.append(sums[0].merge(sums[3]).prune(1500))
    blobs = [blob.encode_summary(s) for s in sums]
    here = os.path.dirname(__file__)
    golden = [open(f, "rb").read() for f in sorted(glob.glob(os.path.join(here, "data", "summary-v2-*.bin")))]
    with monkeypatch.context() as m:
        m.setattr(core, "_K", None)
        assert [blob.encode_summary(s) for s in sums] == blobs
        slow = [blob.decode_summary(b) for b in blobs + golden]
    fast = [blob.decode_summary(b) for b in blobs + golden]
    assert all(_same(a, b) for a, b in zip(fast, slow))
    for a, b in zip(fast, sums):  # and the round trip keeps the summary's guarantee
        np.testing.assert_array_equal(a.values, b.values)
        assert a.epsilon <= a.bound


def test_bitpack_kernel_round_trips_every_width():
    r = np.random.default_rng(14)
    for width in range(65):
        v = (r.integers(0, 2**62, 100, dtype=np.int64).astype(np.uint64) * np.uint64(4)
             + r.integers(0, 4, 100).astype(np.uint64))
        v = v >> np.uint64(64 - width) if width else np.zeros(100, np.uint64)
        out = np.empty(4 + 8 * 100 + 8, np.uint8)
        nbytes = core._K.bitpack(v, 32, out)
        assert out[0] <= width and nbytes == 4 + (sum(int(w) * c for w, c in zip(out[:4], (32, 32, 32, 4))) + 7) // 8
        back = np.empty(100, np.uint64)
        core._K.bitunpack(out[:nbytes].tobytes(), 100, 32, back)
        np.testing.assert_array_equal(back, v)
    with pytest.raises(ValueError, match="short"):
        core._K.bitunpack(out[:nbytes - 1].tobytes(), 100, 32, back)


def test_cell_ranks_match_numpy_cumsum_and_searchsorted():
    # the kernel's cumulative weights and targets' cells against numpy's own cumsum and
    # searchsorted (side="left"), on tables with empty cells and a target past the end
    r = np.random.default_rng(8)
    for trial in range(20):
        m = int(r.integers(1, 3000))
        h = np.where(r.random(m) < 0.3, 0.0, r.gamma(0.7, 2.0, m))
        h[int(r.integers(0, m))] = 1.0  # at least one weighted cell
        cnt = np.where(h > 0, r.integers(1, 9, m), 0).astype(np.int64)
        for weighted in (True, False):
            hv = h if weighted else cnt.astype(np.float64)
            total = float(hv.sum())
            d = np.sort(r.random(int(r.integers(1, 50)))) * total * 1.01  # some beyond the end
            ex = np.empty(m)
            pos = np.empty(d.shape[0], np.int64)
            nocc = core._K.cell_ranks(h if weighted else None, None if weighted else cnt, d, ex, pos)
            ref_ex = np.concatenate(([0.0], np.cumsum(hv)[:-1]))
            np.testing.assert_array_equal(ex, ref_ex)
            ref_pos = core._locate(d, ref_ex + hv, hv, np.zeros(d.shape[0], np.int64),
                                   np.full(d.shape[0], m, np.int64))
            np.testing.assert_array_equal(pos, ref_pos)
            assert hv[pos].min() > 0.0
            assert nocc == int(np.count_nonzero(hv))


def test_cell_ranks_refuses_bad_arguments():
    h, d = np.ones(4), np.ones(2)
    with pytest.raises(TypeError, match="exactly one"):
        core._K.cell_ranks(h, np.ones(4, np.int64), d, np.empty(4), np.empty(2, np.int64))
    with pytest.raises(ValueError, match="lengths"):
        core._K.cell_ranks(h, None, d, np.empty(3), np.empty(2, np.int64))
