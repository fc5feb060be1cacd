"""Cut tables on the training side: rebinning, feature subsets and order, pinned versions.

Rank errors are measured against exact weighted ranks computed here with numpy
on the raw rows (sort, cumulative weights, ``searchsorted``), never from the
summaries; exact-summary edges are compared with
``numpy.quantile(..., weights=..., method="inverted_cdf")`` (Hyndman & Fan 1996,
definition 1, the inverse of the empirical CDF).  The data are made up here:
an invented orchard's harvest log.
"""

from __future__ import annotations

import numpy as np
import pytest

import sketchmerge
from sketchmerge import Summary
from sketchmerge.cuts import CutTable, decode_table, encode_table, feature_cuts, load
from sketchmerge.errors import FormatError, InputError, NoInputError
from sketchmerge.store import TableStore
from sketchmerge.tree import capacities

CONTENT = {"source": "orchard-harvest", "options": {"bins": 32}, "rows": 0, "root": "", "skipped": [],
           "units": {"address": [], "fingerprint": [], "rows": [], "nbytes": []}}


def harvest(n=60_000, seed=0):
    rng = np.random.default_rng(seed)
    cols = {
        "crate_kg": rng.gamma(3.0, 4.0, n),
        "sugar_brix": rng.normal(13.0, 2.0, n),
        "pickers": rng.integers(1, 6, n).astype(np.float64),   # few distinct values
        "bruised_share": np.where(rng.random(n) < 0.4, 0.0, rng.beta(1.2, 8.0, n)),
    }
    cols["sugar_brix"][rng.random(n) < 0.07] = np.nan
    w = rng.gamma(2.0, 0.5, n)  # continuous weights: no exact rank ties
    return cols, w


def tree_summary(x, w, rank_error, parts=8):
    """Summaries built the way a build does: leaves pruned, merged, pruned at the node."""
    leaf, node = capacities(rank_error, 1)
    chunks = np.array_split(np.arange(x.size), parts)
    leaves = [Summary.from_values(x[c], w[c], capacity=leaf) for c in chunks]
    return leaves[0].merge(*leaves[1:]).prune(node)


def make_table(bins=32, exact=False, seed=0):
    cols, w = harvest(seed=seed)
    target = 1.0 / (8 * bins)
    feats = []
    for name, x in cols.items():
        s = Summary.from_values(x, w) if exact else tree_summary(x, w, target)
        feats.append(feature_cuts(name, s, bins, target))
    return CutTable(feats, content=dict(CONTENT, rows=w.size)), cols, w


def exact_rank_errors(f, x, w):
    """Per edge: how far its exact rank interval [W(<e), W(<=e)] / W lies from its target ranks."""
    ok = ~np.isnan(x)
    x, w = x[ok], w[ok]
    order = np.argsort(x, kind="stable")
    xs, cw = x[order], np.concatenate([[0.0], np.cumsum(w[order])])
    W = cw[-1]
    lt = cw[np.searchsorted(xs, f.edges, side="left")] / W
    le = cw[np.searchsorted(xs, f.edges, side="right")] / W
    lo_t, hi_t = f.first_target / f.bins, f.last_target / f.bins
    return np.maximum(0.0, np.maximum(lt - lo_t, hi_t - le))


# --------------------------------------------------------------------------- rebin
@pytest.mark.parametrize("bins", [4, 16, 32])
def test_rebin_honours_the_certified_bound_for_the_new_count(bins):
    table, cols, w = make_table(bins=32)
    got = table.rebin(bins)
    for name in got.features:
        f = got.feature(name)
        assert f.bins == bins and f.target_rank_error == pytest.approx(1 / (8 * bins))
        e = f.edges
        assert np.all(e[1:] > e[:-1])                     # strictly increasing
        x = cols[name][~np.isnan(cols[name])]
        assert e[-1] == x.max()                            # the last edge is the observed maximum
        if f.mode == "distinct":
            assert e.tolist() == np.unique(x).tolist() and f.rank_error == 0
            continue
        assert f.mode == "quantile" and e.size <= bins
        measured = exact_rank_errors(f, cols[name], w)
        assert measured.max() <= f.rank_error + 1e-12, name
        assert f.rank_error <= 1 / (8 * bins)


def test_rebin_of_exact_summaries_equals_numpy_weighted_quantiles():
    table, cols, w = make_table(bins=64, exact=True)
    for bins in (8, 40):
        got = table.rebin(bins)
        q = np.arange(1, bins + 1) / bins
        for name in ("crate_kg", "sugar_brix"):
            x = cols[name]
            ok = ~np.isnan(x)
            ref = np.quantile(x[ok], q, weights=w[ok], method="inverted_cdf")  # numpy reference
            ref[-1] = x[ok].max()
            np.testing.assert_array_equal(got.edges(name), np.unique(ref))
            assert got.rank_error(name) == 0.0


def test_rebin_refuses_a_count_the_stored_summaries_cannot_honour():
    table, _, _ = make_table(bins=32)
    with pytest.raises(InputError) as ei:
        table.rebin(4096)
    msg = str(ei.value)
    # every feature that cannot honour it is listed with its certified bound; distinct ones are fine
    for name in ("crate_kg", "sugar_brix", "bruised_share"):
        assert name in msg
    assert "pickers" not in msg and "certified" in msg and "--bins 4096" in msg
    # asking for a looser bound explicitly is honoured
    worst = max(table.rank_error(n) for n in table.features)
    loose = table.rebin(4096, rank_error=worst)
    assert all(loose.rank_error(n) <= worst for n in loose.features)
    for bad in (0, 65536):
        with pytest.raises(InputError, match="bins"):
            table.rebin(bad)


def test_rebin_records_what_it_did_and_keeps_the_stored_table():
    table, _, _ = make_table(bins=32)
    before = table.edges("crate_kg").copy()
    got = table.rebin(8)
    assert got.record["rebinned"] == {"bins": 8, "rank_error": 1 / 64, "from_bins": [32]}
    np.testing.assert_array_equal(table.edges("crate_kg"), before)
    assert got.content_sha256 == table.content_sha256 and got.features == table.features


# --------------------------------------------------------------------------- subsets and order
def test_feature_subset_in_the_jobs_order():
    table, cols, _ = make_table()
    job = ["sugar_brix", "crate_kg"]
    sub = table.select(job)
    assert sub.features == tuple(job)
    codes = table.bin(cols, features=job)
    np.testing.assert_array_equal(codes[:, 0], table.bin(cols, features=["sugar_brix"])[:, 0])
    np.testing.assert_array_equal(codes, sub.bin(cols))
    # a 2-D array is read in the job's column order
    m = np.stack([cols[n] for n in job], axis=1)
    np.testing.assert_array_equal(table.bin(m, features=job), codes)


def test_absent_features_are_all_listed():
    table, cols, _ = make_table()
    for call in (lambda: table.bin(cols, features=["crate_kg", "ripeness", "hail_days"]),
                 lambda: table.select(["ripeness", "crate_kg", "hail_days"]),
                 lambda: table.code_dtype(["ripeness", "hail_days"])):
        with pytest.raises(InputError, match=r"2 requested feature\(s\) not in this cut table: "
                                             r"'ripeness', 'hail_days' \(it has 4: crate_kg"):
            call()
    with pytest.raises(InputError, match="more than once"):
        table.select(["crate_kg", "crate_kg"])
    with pytest.raises(InputError, match="a list of names"):
        table.bin(cols, features="crate_kg")
    with pytest.raises(InputError, match="'ripeness' is not in this cut table"):
        table.edges("ripeness")


def test_many_features_listing_is_shortened():
    s = Summary.from_values(np.arange(10.0))
    table = CutTable([feature_cuts(f"f{i:03d}", s, 4, 1 / 32) for i in range(50)])
    with pytest.raises(InputError, match=r"\.\.\. \(30 more\)"):
        table.select(["zz"])


# --------------------------------------------------------------------------- load, pinning
def publish(root, versions):
    store = TableStore(str(root))
    for v, feats in enumerate(versions, start=1):
        store.publish(v, encode_table(feats, version=v, content_extra=CONTENT, record={"created": 0.0}), [])
    return store


def test_load_pinned_and_current_versions(tmp_path):
    t1, cols, _ = make_table(seed=1)
    t2, _, _ = make_table(seed=2)
    publish(tmp_path / "t", [[t1.feature(n) for n in t1.features], [t2.feature(n) for n in t2.features]])
    cur = load(str(tmp_path / "t"))
    pinned = load(str(tmp_path / "t"), version=1)
    assert cur.version == 2 and pinned.version == 1
    np.testing.assert_array_equal(pinned.edges("crate_kg"), t1.edges("crate_kg"))
    np.testing.assert_array_equal(cur.edges("crate_kg"), t2.edges("crate_kg"))
    assert not np.array_equal(pinned.edges("crate_kg"), cur.edges("crate_kg"))
    # load(bins=N) is rebin(N) of the same version; features= selects in order
    r = load(str(tmp_path / "t"), version=1, bins=8, features=["sugar_brix", "pickers"])
    assert r.features == ("sugar_brix", "pickers")
    np.testing.assert_array_equal(r.edges("sugar_brix"), t1.rebin(8).edges("sugar_brix"))
    np.testing.assert_array_equal(r.bin(cols), t1.rebin(8).bin(cols, features=["sugar_brix", "pickers"]))
    with pytest.raises(NoInputError, match="version 3"):
        load(str(tmp_path / "t"), version=3)


def test_load_through_memory_filesystem(memfs):
    t1, _, _ = make_table()
    publish("memory://orchard/t", [[t1.feature(n) for n in t1.features]])
    got = sketchmerge.load("memory://orchard/t")
    np.testing.assert_array_equal(got.edges("pickers"), [1.0, 2.0, 3.0, 4.0, 5.0])


def test_corrupt_document_raises_format_error(tmp_path):
    t1, _, _ = make_table()
    publish(tmp_path / "t", [[t1.feature(n) for n in t1.features]])
    doc = tmp_path / "t" / "versions" / "v00000001.cuts"
    raw = bytearray(doc.read_bytes())
    raw[len(raw) // 2] ^= 0xFF
    doc.chmod(0o644)
    doc.write_bytes(bytes(raw))
    with pytest.raises(FormatError):
        load(str(tmp_path / "t"), version=1)
    with pytest.raises(FormatError):
        load(str(tmp_path / "t"))


def test_document_bytes_round_trip_unchanged():
    t1, _, _ = make_table()
    feats = [t1.feature(n) for n in t1.features]
    data = encode_table(feats, version=4, content_extra=CONTENT, record={"created": 1.5})
    back = decode_table(data)
    again = encode_table([back.feature(n) for n in back.features], version=4, content_extra=back.content,
                         record={"created": 1.5})
    assert again == data  # decoding and re-encoding reproduces the stored bytes
    assert back.version == 4 and back.features == t1.features


def test_code_dtype():
    s = Summary.from_values(np.arange(1000.0))
    t = CutTable([feature_cuts("a", s, 255, 1 / 2040), feature_cuts("b", s, 256, 1 / 2048)])
    assert t.code_dtype(["a"]) == np.uint8     # 255 edges: codes 0..255 fit
    assert t.code_dtype() == np.uint16         # 256 edges need code 256 for missing
    assert t.bin({"a": np.array([np.nan])}, features=["a"]).tolist() == [[255]]
