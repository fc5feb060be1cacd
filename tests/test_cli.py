"""The command line as its users meet it: show, verify (exact and sampled), gc, demo, the public API."""

from __future__ import annotations

import json
import os

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import sketchmerge
from sketchmerge.cli import main, parse_storage_options


def _write(root, seed=0, n=20_000, shift=0.0, files=3):
    rng = np.random.default_rng(seed)
    for i in range(files):
        d = os.path.join(root, f"day={i}")
        os.makedirs(d, exist_ok=True)
        pq.write_table(pa.table({"x": rng.normal(shift, 1, n), "k": rng.integers(0, 3, n),
                                 "w": rng.uniform(0.5, 1.5, n)}), os.path.join(d, "a.parquet"))


@pytest.fixture
def table(tmp_path):
    _write(str(tmp_path / "d"))
    assert main(["build", str(tmp_path / "d"), "--out", str(tmp_path / "t"), "--weight-column", "w",
                 "--workers", "1", "--bins", "64", "--quiet"]) == 0
    return tmp_path


def test_public_api_is_pinned():
    assert sketchmerge.__all__ == sorted([
        "CutTable", "FormatError", "InputError", "NoInputError", "PublishRaceError",
        "SchedulerUnavailableError", "SketchmergeError", "StorageError", "Summary",
        "__version__", "build", "load"])


def test_show_text(table, capsys):
    assert main(["show", str(table / "t")]) == 0
    out = capsys.readouterr().out
    assert "cut table version 1" in out and "rows: 60,000" in out
    assert "sample weights 'w'" in out
    assert "exact values" in out  # the caution is always shown
    assert main(["show", str(table / "t"), "--feature", "k"]) == 0
    out = capsys.readouterr().out
    assert "edges: 0, 1, 2" in out


def test_show_unknown_feature_exit_code(table, capsys):
    assert main(["show", str(table / "t"), "--feature", "nope"]) == 3
    assert "nope" in capsys.readouterr().err


def test_verify_exact_and_sampled(table, capsys):
    assert main(["verify", str(table / "t"), str(table / "d"), "--json", "--workers", "1"]) == 0
    rep = json.loads(capsys.readouterr().out)
    x = [f for f in rep["features"] if f["name"] == "x"][0]
    assert rep["ok"] and 0 < x["max_rank_error"] <= x["certified"] <= 1 / (8 * 64)
    assert x["uncertainty"] == 0
    assert main(["verify", str(table / "t"), str(table / "d"), "--json", "--workers", "1",
                 "--sample-rows", "5000"]) == 0
    rep = json.loads(capsys.readouterr().out)
    x = [f for f in rep["features"] if f["name"] == "x"][0]
    assert 0.02 < rep["sample_rate"] < 0.2
    assert 3000 < x["sampled_rows"] < 7000
    # three standard errors of a share at n_eff ~ 5000 (binomial s.e. sqrt(p(1-p)/n), p = 1/2)
    assert 0.015 < x["uncertainty"] < 0.03


def test_verify_catches_wrong_data(table, capsys):
    _write(str(table / "other"), seed=1, shift=0.3)
    code = main(["verify", str(table / "t"), str(table / "other"), "--json", "--workers", "1"])
    rep = json.loads(capsys.readouterr().out)
    assert code == 9 and not rep["ok"]
    assert [f for f in rep["features"] if f["name"] == "x"][0]["max_rank_error"] > 0.05


def test_gc_command(table, capsys):
    assert main(["gc", str(table / "t"), "--json"]) == 0
    json.loads(capsys.readouterr().out)
    assert sketchmerge.load(str(table / "t")).version == 1


def test_storage_option_parsing():
    so = parse_storage_options(["anon=false", "client_kwargs.endpoint_url=http://127.0.0.1:9000",
                                "default_block_size=1048576"])
    assert so == {"anon": False, "client_kwargs": {"endpoint_url": "http://127.0.0.1:9000"},
                  "default_block_size": 1048576}


def test_demo_runs_and_verifies(tmp_path, capsys):
    assert main(["demo", "--dir", str(tmp_path / "demo"), "--rows", "40000", "--workers", "1"]) == 0
    out = capsys.readouterr().out
    assert "all edges within their certified bounds" in out
    cuts = sketchmerge.load(str(tmp_path / "demo" / "table"))
    assert set(cuts.features) == {"soil_moisture_pct", "air_temp_c", "light_lux", "rack_tier",
                                  "vent_open", "co2_ppm"}
    assert cuts.edges("rack_tier").tolist() == [1, 2, 3, 4, 5]
    assert 0.05 < cuts.feature("soil_moisture_pct").missing_share < 0.11


def test_diff_with_one_version_is_not_an_alert(table, capsys):
    assert main(["diff", str(table / "t"), "--fail-above", "0.25", "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["features"] == [] and "only one version" in doc["note"]
    # an explicit version that does not exist is still an error (exit 4)
    assert main(["diff", str(table / "t"), "--from", "7"]) == 4


def test_build_process_stays_light(tmp_path):
    # the start-up work a build of float64 Parquet skips: pyarrow.compute is not imported,
    # and the command (a process of its own) freezes what its imports created, which an
    # in-process main() (as in these tests) must not do to its caller
    import subprocess
    import sys

    src = tmp_path / "src"
    src.mkdir()
    pq.write_table(pa.table({"x": np.random.default_rng(1).normal(size=5000),
                             "w": np.ones(5000)}), src / "a.parquet")
    probe = ("import gc, sys, runpy\n"
             "sys.argv = ['sketchmerge', 'build', sys.argv[1], '--out', sys.argv[2], "
             "'--weight-column', 'w', '--quiet']\n"
             "try:\n"
             "    runpy.run_module('sketchmerge.cli', run_name='__main__')\n"
             "except SystemExit as e:\n"
             "    assert not e.code, e.code\n"
             "print('compute' if 'pyarrow.compute' in sys.modules else 'light', gc.get_freeze_count() > 0)\n")
    out = subprocess.run([sys.executable, "-c", probe, str(src), str(tmp_path / "t")],
                         capture_output=True, text=True, check=True, timeout=120)
    assert out.stdout.splitlines()[-1].split() == ["light", "True"], out.stdout + out.stderr
    import gc

    before = gc.get_freeze_count()
    assert main(["build", str(src), "--out", str(tmp_path / "t2"), "--weight-column", "w",
                 "--quiet"]) == 0
    assert gc.get_freeze_count() == before
