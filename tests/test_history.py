"""Version history of a cut table: rows per version, current marker, options, CLI.

Tables are built here directly (summaries of generated greenhouse-sensor
readings wrapped in cut tables and published with the store), so every
expected value is known from what the test itself wrote.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from sketchmerge import Summary
from sketchmerge.cli import main
from sketchmerge.cuts import encode_table, feature_cuts
from sketchmerge.errors import NoInputError
from sketchmerge.history import describe_weights, format_history, history
from sketchmerge.store import TableStore


def feats(names, seed, bins=16):
    r = np.random.default_rng(seed)
    return [feature_cuts(n, Summary.from_values(r.standard_normal(500)), bins, 1 / (8 * bins)) for n in names]


def doc(version, names, *, rows, units, changes, bins=16, options=None, created=None):
    opts = {"bins": bins, "rank_error": 1 / (8 * bins), "weight_column": None, "hessian": None,
            "prediction_column": None, "prediction_scale": None}
    opts.update(options or {})
    content = {"source": "generated://greenhouse/readings", "rows": rows, "options": opts,
               "units": {"address": [f"day={i:02d}/part.parquet" for i in range(units)],
                         "fingerprint": [f"{i:016x}" for i in range(units)],
                         "rows": [rows // units] * units, "nbytes": [2048] * units}}
    record = {"created": created or f"2031-05-{version:02d}T03:00:00Z", "tool": "sketchmerge test",
              "previous_version": version - 1 if version > 1 else None, "changes": changes}
    return encode_table(feats(names, version, bins), version=version, content_extra=content, record=record)


@pytest.fixture
def table(tmp_path):
    url = str(tmp_path / "greenhouse")
    st = TableStore(url)
    st.publish(1, doc(1, ["temp", "humidity"], rows=1000, units=2,
                      changes={"units_added": 2, "units_removed": 0, "units_changed": 0}), blob_keys=[])
    st.publish(2, doc(2, ["temp", "humidity", "light"], rows=1500, units=3,
                      changes={"units_added": 1, "units_removed": 0, "units_changed": 1},
                      options={"weight_column": "airflow"}), blob_keys=[])
    st.publish(3, doc(3, ["temp", "light"], rows=1200, units=3, bins=64,
                      changes={"units_added": 1, "units_removed": 1, "units_changed": 0},
                      options={"hessian": "logistic", "prediction_column": "p_wilt",
                               "prediction_scale": "probability"}), blob_keys=[])
    return url


def test_history_rows_newest_first(table):
    rows = history(table)
    assert [r["version"] for r in rows] == [3, 2, 1]
    assert [r["current"] for r in rows] == [True, False, False]
    r3, r2, r1 = rows
    assert (r1["rows"], r1["features"], r1["units"]) == (1000, 2, 2)
    assert (r2["rows"], r2["features"], r2["units"]) == (1500, 3, 3)
    assert (r3["units_added"], r3["units_removed"], r3["units_changed"]) == (1, 1, 0)
    assert (r2["units_added"], r2["units_removed"], r2["units_changed"]) == (1, 0, 1)
    assert r3["bins"] == 64 and r3["rank_error"] == pytest.approx(1 / 512)
    assert r1["weights"] == "none"
    assert r2["weights"] == "column 'airflow'"
    assert r3["weights"] == "logistic hessian at 'p_wilt' (probability)"
    assert r3["created"] == "2031-05-03T03:00:00Z" and r3["previous_version"] == 2


def test_format_history_marks_current(table):
    text = format_history(history(table))
    lines = text.splitlines()
    v3 = next(line for line in lines if line.split() and line.split()[0] == "*")
    assert v3.split()[1] == "3"
    marked = [line for line in lines if line.startswith("*")]
    assert len(marked) == 1  # only the current version
    v1 = next(line for line in lines if line[2:].split() and line[2:].split()[0] == "1")
    assert v1.startswith(" ") and "1,000" in v1 and "none" in v1
    assert "logistic hessian" in text


def test_current_marker_follows_the_pointer(table):
    st = TableStore(table)
    st.publish(4, doc(4, ["temp"], rows=10, units=1,
                      changes={"units_added": 0, "units_removed": 2, "units_changed": 0}), blob_keys=[])
    rows = history(table)
    assert [r["version"] for r in rows if r["current"]] == [4]


def test_unreadable_version_is_listed_not_fatal(table):
    TableStore(table).publish(4, b"not a cut table", blob_keys=[])
    rows = history(table)
    assert rows[0]["version"] == 4 and rows[0]["current"] and "error" in rows[0]
    assert [r["version"] for r in rows[1:]] == [3, 2, 1]
    assert "unreadable" in format_history(rows)


def test_history_of_nothing(tmp_path):
    with pytest.raises(NoInputError, match="expected a published version"):
        history(str(tmp_path / "empty"))


def test_history_cli(table, tmp_path, capsys):
    assert main(["history", table]) == 0
    out = capsys.readouterr().out
    assert "column 'airflow'" in out
    assert main(["history", table, "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert [r["version"] for r in data["versions"]] == [3, 2, 1]
    assert data["versions"][0]["current"] is True
    assert main(["history", str(tmp_path / "empty")]) == 4  # exit code 4: no input


def test_describe_weights():
    assert describe_weights({}) == "none"
    assert describe_weights({"weight_column": "w", "hessian": "squared"}) == "column 'w' x squared hessian"
