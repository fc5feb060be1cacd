"""Exported edges read back with the standard json module and pyarrow, compared with CutTable.

JSON is parsed strictly: RFC 8259 has no NaN or Infinity tokens, so the parser
is told to fail on them.  The data are made up here: an invented ferry line's
crossing log.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from sketchmerge import Summary
from sketchmerge.cli import main
from sketchmerge.cuts import CutTable, encode_table, feature_cuts, load
from sketchmerge.errors import InputError
from sketchmerge.export import (EXPORT_FORMAT, EXPORT_FORMAT_VERSION, METADATA_KEY, export,
                                export_document)
from sketchmerge.store import TableStore

CONTENT = {"source": "ferry-crossings", "options": {"bins": 32, "weight_column": "fare"}, "rows": 8000,
           "root": "", "skipped": [], "units": {"address": [], "fingerprint": [], "rows": [], "nbytes": []}}


def strict_loads(text):
    def refuse(token):
        raise ValueError(f"non-standard JSON token {token}")

    return json.loads(text, parse_constant=refuse)


def ferry_features():
    rng = np.random.default_rng(4)
    n = 8000
    minutes = rng.gamma(9.0, 5.0, n)
    minutes[:40] = np.inf                           # a stuck sensor reads +inf
    wind = np.where(rng.random(n) < 0.15, np.nan, rng.weibull(2.0, n) * 12)
    cars = rng.integers(0, 9, n)
    return [feature_cuts("minutes", Summary.from_values(minutes).prune(1024), 32, 1 / 256),
            feature_cuts("wind_knots", Summary.from_values(wind).prune(1024), 32, 1 / 256),
            feature_cuts("cars", Summary.from_values(cars), 32, 1 / 256),
            feature_cuts("ice", Summary.from_values(np.full(50, np.nan)), 32, 1 / 256)]


@pytest.fixture
def table(tmp_path):
    url = str(tmp_path / "ferry")
    store = TableStore(url)
    store.publish(1, encode_table(ferry_features(), version=1, content_extra=CONTENT, record={"created": 7.0}), [])
    return url


def edges_from_json(values):
    return np.array([float(v) for v in values], dtype=np.float64)  # float("inf") reads the strings


def check_against(cuts, feats):
    assert [f["name"] for f in feats] == list(cuts.features)
    for f in feats:
        c = cuts.feature(f["name"])
        np.testing.assert_array_equal(edges_from_json(f["edges"]), c.edges)  # bit-exact
        assert f["missing_code"] == c.edges.size
        assert f["rank_error"] == c.rank_error and f["mode"] == c.mode and f["bins"] == c.bins
        assert f["count"] == c.count and f["missing_count"] == c.missing_count
        assert f["total_weight"] == c.total_weight and f["missing_weight"] == c.missing_weight


def test_json_round_trip(table, tmp_path):
    out = tmp_path / "edges.json"
    rep = export(table, "json", output=str(out))
    assert rep == {"format": "json", "output": str(out), "table_version": 1, "features": 4}
    doc = strict_loads(out.read_text("utf-8"))
    cuts = load(table)
    assert doc["format"] == EXPORT_FORMAT and doc["format_version"] == EXPORT_FORMAT_VERSION
    assert doc["table_version"] == 1 and doc["source"] == "ferry-crossings" and doc["rows"] == 8000
    assert doc["content_sha256"] == cuts.content_sha256 and doc["code_dtype"] == "uint8"
    assert doc["weights"]["weight_column"] == "fare" and doc["bins"] == 32
    check_against(cuts, doc["features"])
    by = {f["name"]: f for f in doc["features"]}
    assert by["minutes"]["edges"][-1] == "inf" and by["minutes"]["max"] == "inf"
    assert by["ice"] == {**by["ice"], "edges": [], "mode": "empty", "missing_code": 0, "min": "nan"}
    assert by["cars"]["edges"] == [0.0, 1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0, 8.0]


def test_json_codes_reproduce_cuttable_bin(table, tmp_path):
    """A consumer applying the documented rule to the exported edges gets CutTable.bin's codes."""
    out = tmp_path / "e.json"
    export(table, "json", output=str(out))
    doc = strict_loads(out.read_text())
    cuts = load(table)
    rng = np.random.default_rng(0)
    rows = {"minutes": np.concatenate([rng.gamma(9, 5, 500), [np.inf, np.nan, -1.0]]),
            "wind_knots": np.concatenate([rng.weibull(2, 500) * 12, [np.nan, 0.0, 99.0]]),
            "cars": np.concatenate([rng.integers(0, 12, 500), [0, 8, 3]]).astype(float),
            "ice": np.concatenate([rng.random(500), [np.nan, 1.0, 2.0]])}
    want = cuts.bin(rows)
    for j, f in enumerate(doc["features"]):
        e = edges_from_json(f["edges"])
        x = rows[f["name"]]
        if e.size == 0:
            code = np.zeros(x.size, int)
        else:  # lower-bound binary search, clipped to the last bin, missing -> missing_code
            code = np.minimum(np.searchsorted(e, x, side="left"), e.size - 1)
            code[np.isnan(x)] = f["missing_code"]
        np.testing.assert_array_equal(code, want[:, j], err_msg=f["name"])


def test_json_to_stdout_with_bins_and_subset(table, capsys):
    export(table, "json", bins=8, features=["wind_knots", "cars"])
    doc = strict_loads(capsys.readouterr().out)
    cuts = load(table, bins=8, features=["wind_knots", "cars"])
    check_against(cuts, doc["features"])
    assert doc["bins"] == 8 and doc["rebinned_from_bins"] == [32]
    assert cuts.edges("wind_knots").size <= 8


def test_parquet_round_trip(table, tmp_path):
    pq = pytest.importorskip("pyarrow.parquet")
    pa = pytest.importorskip("pyarrow")
    out = tmp_path / "edges.parquet"
    export(table, "parquet", output=str(out))
    t = pq.read_table(str(out))
    cuts = load(table)
    assert t.schema.field("edges").type == pa.list_(pa.field("item", pa.float64(), nullable=False))
    assert t.schema.field("position").type == pa.int32() and t.schema.field("count").type == pa.int64()
    rows = t.to_pylist()
    assert [r["position"] for r in rows] == [0, 1, 2, 3]
    check_against(cuts, rows)
    meta = strict_loads(t.schema.metadata[METADATA_KEY].decode("utf-8"))
    assert meta["format"] == EXPORT_FORMAT and meta["table_version"] == 1 and "features" not in meta
    by = {r["name"]: r for r in rows}
    assert by["minutes"]["edges"][-1] == float("inf") and by["ice"]["min"] is None


def test_in_memory_table_and_errors(tmp_path):
    cuts = CutTable(ferry_features())
    doc = export_document(cuts)
    assert doc["table"] is None and doc["table_version"] is None
    check_against(cuts, doc["features"])
    json.dumps(doc, allow_nan=False)  # serialisable as strict JSON
    with pytest.raises(InputError, match="Parquet is not written to stdout"):
        export(cuts, "parquet")
    with pytest.raises(InputError, match="'json' or 'parquet'"):
        export(cuts, "csv", output=str(tmp_path / "x"))


def test_cli_export(table, tmp_path, capsys):
    assert main(["export", table, "--to", "json"]) == 0
    check_against(load(table), strict_loads(capsys.readouterr().out)["features"])
    out = tmp_path / "cli.parquet"
    assert main(["export", table, "--to", "parquet", "-o", str(out), "--bins", "4", "--version", "1"]) == 0
    pq = pytest.importorskip("pyarrow.parquet")
    check_against(load(table, bins=4), pq.read_table(str(out)).to_pylist())
    assert main(["export", table, "--to", "json", "--bins", "40000"]) == 3  # cannot certify: bad input


def test_export_to_memory_url(table, memfs):
    export(table, "json", output="memory://exports/ferry.json")
    doc = strict_loads(memfs.cat("memory://exports/ferry.json").decode())
    assert doc["table_version"] == 1
