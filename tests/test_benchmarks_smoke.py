"""The benchmark suite's entry point, run in its tiny --quick mode so it cannot rot.

No timing assertions here: speed goals live in benchmarks/ (see benchmarks/PERFORMANCE.md).
What is asserted are values the suite computes against outside references: the measured
rank error of every edge (exact ranks of all rows) within its certified bound, and numpy's
own exact weighted quantile measuring as exact, which checks the measure itself.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys

import pytest

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
RUN = os.path.join(ROOT, "benchmarks", "run.py")


@pytest.fixture(scope="module")
def quick(tmp_path_factory):
    pytest.importorskip("dask.dataframe")
    pytest.importorskip("matplotlib")
    tmp = tmp_path_factory.mktemp("bench")
    out = tmp / "results"
    proc = subprocess.run([sys.executable, RUN, "--quick", "--out", str(out),
                           "--data-dir", str(tmp / "data")],
                          capture_output=True, text=True, timeout=600, cwd=str(tmp))
    assert proc.returncode == 0, proc.stderr[-4000:]
    return out


def test_quick_run_writes_its_table_chart_and_figures(quick):
    md = (quick / "results.md").read_text()
    assert md.startswith("# sketchmerge benchmark results (quick mode)")
    assert "| goal | measured | target | status |" in md
    for row in ("weighted build / pyarrow scan, wall", "speed-up over dask.dataframe quantile",
                "peak RSS of a worker process", "peak RSS, embedded build", "build time vs rows",
                "merge CPU per unit", "refresh, 1 new unit", "embedded default", "## Cost model"):
        assert row in md, row
    png = (quick / "chart.png").read_bytes()
    assert png[:8] == b"\x89PNG\r\n\x1a\n"   # the PNG signature (PNG specification, 5.2)
    res = json.loads((quick / "results.json").read_text())["results"]
    assert set(res) >= {"per_unit", "whole_process", "versus_dask", "memory", "growth",
                        "refresh", "merges", "refresh_path", "startup", "model"}
    # 4 sizes, each 4 times the one before
    rows = [p["rows"] for p in res["growth"]["points"]]
    assert len(rows) == 4 and all(b == 4 * a for a, b in zip(rows, rows[1:]))


def test_measured_rank_errors_against_exact_ranks(quick):
    res = json.loads((quick / "results.json").read_text())["results"]["versus_dask"]
    per = res["rank_error_per_feature"]
    assert len(per) == 8
    for name, r in per.items():
        # numpy.quantile(weights=..., method="inverted_cdf") is exact (numpy docs; Hyndman &
        # Fan 1996 definition 1): measured against exact ranks it must show no error
        assert r["numpy_exact_weighted"] <= 1e-12, name
        # every published edge within the bound its table certifies
        assert r["sketchmerge"] <= r["sketchmerge_certified"] + 1e-12, name
        assert r["sketchmerge_weighted"] <= r["sketchmerge_weighted_certified"] + 1e-12, name
        # dask's unweighted quantile is an approximation: a positive, finite error
        assert 0.0 <= r["dask"] < 0.5, name


def test_refresh_path_counts_match_the_tree(quick):
    rp = json.loads((quick / "results.json").read_text())["results"]["refresh_path"]
    for x in rp.values():
        # one new leaf; its path to the root, plus at most one split neighbour per level
        # (content-defined groups, docs/TREE.md)
        assert x["leaves_sketched"] == 1
        assert 1 <= x["nodes_recomputed"] <= 2 * x["depth"]
