"""Feature plots: the CDF band and bin shares against numpy on the raw rows, and the PNG itself.

The exact weighted CDF is computed here with numpy (sorted values, cumulative
weights); a pruned summary's band must contain it at every entry.  Files are
checked against the PNG signature of ISO/IEC 15948 (the eight bytes
``89 50 4E 47 0D 0A 1A 0A``) and decoded with matplotlib to see that they are
not blank.  The data are made up here: an invented bakery's oven log.
"""

from __future__ import annotations

import sys

import numpy as np
import pytest

from sketchmerge import Summary
from sketchmerge.cli import main
from sketchmerge.cuts import CutTable, encode_table, feature_cuts
from sketchmerge.errors import SketchmergeError
from sketchmerge.plots import bin_shares, cdf_band, choose_xscale, plot_feature
from sketchmerge.store import TableStore

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def exact_cdf(x, w, at):
    """weight(values <= at) / W from the raw rows."""
    ok = ~np.isnan(x)
    x, w = x[ok], w[ok]
    order = np.argsort(x)
    cw = np.concatenate([[0.0], np.cumsum(w[order])])
    return cw[np.searchsorted(x[order], at, side="right")] / cw[-1]


def oven_rows(n=30_000, seed=2):
    rng = np.random.default_rng(seed)
    temp = rng.normal(220, 15, n)
    temp[rng.random(n) < 0.12] = np.nan
    loaf_g = rng.lognormal(6.0, 1.3, n)       # heavy right tail
    trays = rng.integers(1, 7, n).astype(float)
    w = rng.gamma(2.0, 1.0, n)
    return {"oven_temp": temp, "loaf_g": loaf_g, "trays": trays}, w


def test_cdf_band_exact_and_pruned():
    cols, w = oven_rows()
    x = cols["oven_temp"]
    xe, lo, hi = cdf_band(Summary.from_values(x, w))
    np.testing.assert_allclose(lo, exact_cdf(x, w, xe), rtol=0, atol=1e-12)
    np.testing.assert_allclose(hi, lo, rtol=0, atol=1e-12)           # exact: a line, not a band
    s = Summary.from_values(x, w).prune(256)
    xp, lo, hi = cdf_band(s)
    truth = exact_cdf(x, w, xp)
    assert np.all(lo <= truth + 1e-12) and np.all(truth <= hi + 1e-12)
    # between two entries F lies in [lower at the left one, upper at the right one]: the band drawn
    mid = (xp[:-1] + xp[1:]) / 2
    between = exact_cdf(x, w, mid)
    assert np.all(lo[:-1] <= between + 1e-12) and np.all(between <= hi[1:] + 1e-12)
    assert np.max(hi[1:] - lo[:-1]) > 0  # a pruned summary does leave uncertainty


def test_bin_shares_match_numpy_on_exact_summaries():
    cols, w = oven_rows()
    for name in ("oven_temp", "trays"):
        x = cols[name]
        f = feature_cuts(name, Summary.from_values(x, w), 16, 1 / 128)
        share, bounds = bin_shares(f.summary, f.edges)
        ok = ~np.isnan(x)
        code = np.minimum(np.searchsorted(f.edges, x[ok], side="left"), f.edges.size - 1)
        want = np.bincount(code, weights=w[ok], minlength=f.edges.size) / w[ok].sum()
        np.testing.assert_allclose(share, want, rtol=0, atol=1e-12)
        assert bounds.size == f.edges.size + 1 and bounds[0] == np.nanmin(x)


def test_choose_xscale():
    cols, w = oven_rows()
    rng = np.random.default_rng(0)
    assert choose_xscale(cols["oven_temp"][~np.isnan(cols["oven_temp"])],
                         np.quantile(cols["oven_temp"][~np.isnan(cols["oven_temp"])], np.linspace(0, 1, 33)[1:])) == "linear"
    ln = cols["loaf_g"]
    assert choose_xscale(ln, np.quantile(ln, np.linspace(0, 1, 33)[1:])) == "log"
    t = rng.standard_t(1.5, 20_000) * 40
    assert choose_xscale(t, np.quantile(t, np.linspace(0, 1, 33)[1:])) == "symlog"
    assert choose_xscale(np.arange(5.0), np.arange(5.0)) == "linear"


def _check_png(path):
    image = pytest.importorskip("matplotlib.image")
    raw = path.read_bytes()
    assert raw[:8] == PNG_SIGNATURE
    img = image.imread(str(path))
    assert img.shape[0] > 300 and img.shape[1] > 500
    rgb = img[..., :3]
    # not blank: white background plus a fair number of drawn (non-white) pixels
    assert (rgb < 0.9).any(axis=-1).mean() > 0.02


@pytest.mark.parametrize("feature,bins,capacity,scale", [
    ("oven_temp", 256, 2048, "linear"), ("loaf_g", 32, 1024, "log"), ("trays", 64, None, "linear")])
def test_plot_feature_png(tmp_path, feature, bins, capacity, scale):
    pytest.importorskip("matplotlib")
    cols, w = oven_rows()
    s = Summary.from_values(cols[feature], w)
    if capacity:
        s = s.prune(capacity)
    cuts = CutTable([feature_cuts(feature, s, bins, 1 / (8 * bins))])
    png = tmp_path / f"{feature}.png"
    assert plot_feature(cuts, feature, str(png)) == scale
    _check_png(png)


def test_plot_infinite_and_empty_features(tmp_path):
    pytest.importorskip("matplotlib")
    rng = np.random.default_rng(1)
    x = np.concatenate([rng.exponential(3, 5000), np.full(80, np.inf), np.full(20, -np.inf)])
    cuts = CutTable([feature_cuts("proof_min", Summary.from_values(x).prune(512), 32, 1 / 256),
                     feature_cuts("humidity", Summary.from_values(np.full(10, np.nan)), 32, 1 / 256)])
    for name in cuts.features:
        png = tmp_path / f"{name}.png"
        plot_feature(cuts, name, png)
        assert png.read_bytes()[:8] == PNG_SIGNATURE
    with pytest.raises(SketchmergeError, match="xscale"):
        plot_feature(cuts, "proof_min", tmp_path / "bad.png", xscale="cubic")


def test_install_hint_without_matplotlib(monkeypatch, tmp_path):
    cuts = CutTable([feature_cuts("trays", Summary.from_values(np.arange(6.0)), 8, 1 / 64)])
    monkeypatch.setitem(sys.modules, "matplotlib", None)  # import fails as if not installed
    with pytest.raises(SketchmergeError, match=r"pip install 'sketchmerge\[plot\]'"):
        plot_feature(cuts, "trays", tmp_path / "x.png")


def test_cli_show_plot(tmp_path, capsys):
    pytest.importorskip("matplotlib")
    cols, w = oven_rows()
    feats = [feature_cuts(n, Summary.from_values(x, w).prune(1024), 32, 1 / 256) for n, x in cols.items()]
    content = {"source": "oven-log", "options": {"bins": 32, "rank_error": 1 / 256}, "rows": w.size,
               "root": "", "skipped": [], "units": {"address": [], "fingerprint": [], "rows": [], "nbytes": []}}
    TableStore(str(tmp_path / "t")).publish(1, encode_table(feats, version=1, content_extra=content,
                                                            record={"created": 0.0, "tool": "test"}), [])
    png = tmp_path / "temp.png"
    assert main(["show", str(tmp_path / "t"), "--feature", "oven_temp", "--plot", str(png)]) == 0
    assert "oven_temp" in capsys.readouterr().out
    _check_png(png)
