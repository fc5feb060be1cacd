"""A catalogue of bad dataset inputs, each run through the ``sketchmerge build`` command.

Every case must end with its documented exit code (README, "Exit codes"), one
error line that names the file or the column at fault, no traceback (unless
``--debug``), and nothing published: neither a first version, nor, on a table
that already has one, a new version.  A few inputs are *accepted by design*
(all-NaN, constant and all-zero-weight columns, zero-row files next to data):
for those the test checks the published result instead.

The command runs in this process (``cli.main``) against one module-wide Dask
cluster (``DASK_SCHEDULER_ADDRESS``), so the catalogue stays fast; one test
runs the real console command in a subprocess for the traceback check.
"""

from __future__ import annotations

import gzip
import io
import os
import subprocess
import sys
from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.feather as feather
import pyarrow.parquet as pq
import pytest

import sketchmerge
import sketchmerge.testing  # noqa: F401 - registers faulty://
from sketchmerge.cli import main
from sketchmerge.store import TableStore

# exit codes as documented in README.md ("Exit codes") and sketchmerge/cli.py
BAD_INPUT, NO_INPUT, STORAGE = 3, 4, 5


@pytest.fixture(scope="module")
def scheduler():
    from distributed import Client, LocalCluster

    cluster = LocalCluster(n_workers=1, threads_per_worker=2, processes=False,
                           dashboard_address="127.0.0.1:0", worker_dashboard_address="127.0.0.1:0")
    with Client(cluster):
        yield cluster.scheduler_address
    cluster.close()


@pytest.fixture
def run(scheduler, monkeypatch, capsys):
    """Run ``sketchmerge ARGS`` in this process; return (exit code, stdout, stderr)."""
    monkeypatch.setenv("DASK_SCHEDULER_ADDRESS", scheduler)
    monkeypatch.setenv("SKETCHMERGE_RETRIES", "1")   # permanent storage failures fail fast

    def go(args):
        capsys.readouterr()
        code = main([str(a) for a in args])
        out, err = capsys.readouterr()
        return code, out, err

    return go


def _rng(seed=0):
    return np.random.default_rng(seed)


def good_table(n=2000, seed=0) -> pa.Table:
    r = _rng(seed)
    return pa.table({"x": r.normal(size=n), "k": r.integers(0, 9, n), "w": r.uniform(0.5, 2, n),
                     "p": r.uniform(0.05, 0.95, n)})


def put(root, rel, table=None, raw: bytes | None = None, fmt="parquet"):
    path = os.path.join(root, rel)
    os.makedirs(os.path.dirname(path), exist_ok=True)
    if raw is not None:
        with open(path, "wb") as f:
            f.write(raw)
    elif fmt == "parquet":
        pq.write_table(table, path)
    elif fmt == "csv":
        pacsv.write_csv(table, path)
    else:
        feather.write_feather(table, path)
    return path


def parquet_bytes(table) -> bytes:
    buf = io.BytesIO()
    pq.write_table(table, buf)
    return buf.getvalue()


@dataclass(frozen=True)
class Case:
    """One bad input: how to make it, the options, and what the error must say."""

    name: str
    make: object                      # root -> None (writes the dataset under root)
    code: int
    names: tuple[str, ...]            # substrings the error line must contain
    options: tuple = ()
    source: str = "{root}"            # the SOURCE argument, formatted with root
    env: dict = field(default_factory=dict)


def _dup_columns(root):
    # pyarrow can write a Parquet file with a repeated column name
    t = pa.Table.from_arrays([pa.array([1.0, 2.0]), pa.array([3.0, 4.0])], names=["x", "x"])
    put(root, "dup.parquet", t)


def _ragged(root):
    put(root, "ragged.csv", raw=b"x,k\n1.0,2\n3.0,4,5\n6.0,7\n")


def _type_conflict(root):
    put(root, "day=1/a.parquet", good_table())
    put(root, "day=2/b.parquet", pa.table({"x": ["one", "two"], "k": [1, 2]}))


def _corrupt_footer(root):
    b = bytearray(parquet_bytes(good_table()))
    b[-8:-4] = b"\xff\xff\xff\x7f"    # footer length field (Parquet spec: 4-byte length + "PAR1")
    put(root, "bad-footer.parquet", raw=bytes(b))


def _truncated(root):
    b = parquet_bytes(good_table())
    put(root, "cut.parquet", raw=b[: len(b) // 2])


def _not_parquet(root):
    put(root, "notes.parquet", raw=b"this is a text file, not Parquet\n" * 20)


def _weights(value):
    def make(root):
        t = good_table()
        w = t.column("w").to_numpy().copy()
        w[5] = value
        put(root, "w.parquet", t.set_column(2, "w", pa.array(w)))
    return make


def _predictions(value):
    def make(root):
        t = good_table()
        p = t.column("p").to_numpy().copy()
        p[9] = value
        put(root, "p.parquet", t.set_column(3, "p", pa.array(p)))
    return make


def _zero_weights(root):
    put(root, "z.parquet", pa.table({"x": _rng(2).normal(size=5000), "w": np.zeros(5000)}))


def _saturated(root):
    # p in {0, 1}: the logistic hessian p(1-p) is 0 on every row
    put(root, "s.parquet", pa.table({"x": _rng(3).normal(size=5000),
                                     "p": (_rng(3).random(5000) < 0.5).astype(np.float64)}))


def _huge_ints(root):
    put(root, "big.parquet", pa.table({"x": [1, 2, 2**60], "k": [1, 2, 3]}))


def _corrupt_ipc(root):
    buf = io.BytesIO()
    feather.write_feather(good_table(), buf)
    b = bytearray(buf.getvalue())
    b[len(b) // 2:len(b) // 2 + 64] = b"\xab" * 64
    b[-10:-6] = b"\xff\xff\xff\x7f"   # footer length (Arrow IPC file format: int32 + "ARROW1")
    put(root, "bad.arrow", raw=bytes(b))


def _corrupt_gzip(root):
    raw = gzip.compress(b"x,k\n" + b"1.5,2\n" * 5000)
    put(root, "bad.csv.gz", raw=raw[:40] + b"\x00" * 64 + raw[104:])


def _csv_late_text(root):
    # the first block (1 MiB) plans the column as numeric; text appears past it
    body = b"x,k\n" + b"1.25,3\n" * 200_000 + b"n/a-value,4\n"
    put(root, "late.csv", raw=body)


def _feather_v1(root):
    put(root, "old.feather", raw=b"FEA1" + b"\x00" * 64 + b"FEA1")


def _mixed_types(root):
    put(root, "m.parquet", pa.table({"x": [1.0, 2.0], "city": ["a", "b"]}))


def _strings_only(root):
    put(root, "s.parquet", pa.table({"city": ["a", "b"], "note": ["c", "d"]}))


def _write_good(root):
    put(root, "day=1/a.parquet", good_table())


def _zero_byte(root):
    put(root, "empty.parquet", raw=b"")


def _only_hidden(root):
    put(root, "_SUCCESS", raw=b"")
    put(root, ".staging/part.parquet", good_table())
    put(root, "readme.txt", raw=b"not data")


def _nothing(root):
    os.makedirs(root, exist_ok=True)


def _header_only_csv(root):
    put(root, "h.csv", raw=b"x,k\n")


def _zero_row_parquet(root):
    put(root, "z.parquet", good_table().slice(0, 0))


CATALOGUE = [
    Case("empty folder", _nothing, NO_INPUT, ("{root}", "expected Parquet, CSV or Arrow IPC")),
    Case("only hidden and unknown files", _only_hidden, NO_INPUT, ("{root}", "left out")),
    Case("nonexistent path", lambda root: None, NO_INPUT, ("{root}/nowhere",), source="{root}/nowhere"),
    Case("nonexistent URL scheme", lambda root: None, BAD_INPUT, ("nosuch",), source="nosuch://bucket/x"),
    Case("zero-byte file only", _zero_byte, BAD_INPUT, ("{root}",)),
    Case("header-only CSV only", _header_only_csv, BAD_INPUT, ("{root}",)),
    Case("zero-row Parquet only", _zero_row_parquet, BAD_INPUT, ("{root}",)),
    Case("corrupt Parquet footer", _corrupt_footer, BAD_INPUT, ("bad-footer.parquet",)),
    Case("truncated Parquet file", _truncated, BAD_INPUT, ("cut.parquet",)),
    Case("text file named .parquet", _not_parquet, BAD_INPUT, ("notes.parquet",)),
    Case("CSV with ragged rows", _ragged, BAD_INPUT, ("ragged.csv",)),
    Case("CSV with text after the planned block", _csv_late_text, BAD_INPUT, ("late.csv", "'x'")),
    Case("corrupt gzip CSV", _corrupt_gzip, BAD_INPUT, ("bad.csv.gz",)),
    Case("corrupt Arrow IPC file", _corrupt_ipc, BAD_INPUT, ("bad.arrow",)),
    Case("Feather version 1 file", _feather_v1, BAD_INPUT, ("old.feather",)),
    Case("type conflict across files", _type_conflict, BAD_INPUT, ("'x'", "a.parquet", "b.parquet")),
    Case("duplicate column names", _dup_columns, BAD_INPUT, ("dup.parquet", "'x'")),
    Case("non-numeric column selected", _mixed_types, BAD_INPUT, ("city",),
         options=("--columns", "city")),
    Case("no numeric columns", _strings_only, BAD_INPUT, ("{root}", "numeric")),
    Case("selected column absent", _write_good, BAD_INPUT, ("nosuch",), options=("--columns", "nosuch")),
    Case("excluded column absent", _write_good, BAD_INPUT, ("nosuch",), options=("--exclude", "nosuch")),
    Case("weight column absent", _write_good, BAD_INPUT, ("'wt'",), options=("--weight-column", "wt")),
    Case("negative weight", _weights(-1.0), BAD_INPUT, ("w.parquet", "'w'"), options=("--weight-column", "w")),
    Case("NaN weight", _weights(np.nan), BAD_INPUT, ("w.parquet", "'w'"), options=("--weight-column", "w")),
    Case("infinite weight", _weights(np.inf), BAD_INPUT, ("w.parquet", "'w'"), options=("--weight-column", "w")),
    Case("logistic prediction above 1", _predictions(1.5), BAD_INPUT, ("p.parquet", "'p'"),
         options=("--hessian", "logistic", "--prediction-column", "p")),
    Case("negative logistic probability", _predictions(-0.1), BAD_INPUT, ("p.parquet", "'p'"),
         options=("--hessian", "logistic", "--prediction-column", "p")),
    Case("NaN prediction", _predictions(np.nan), BAD_INPUT, ("p.parquet", "'p'"),
         options=("--hessian", "logistic", "--prediction-column", "p")),
    Case("negative poisson mean", _predictions(-2.0), BAD_INPUT, ("p.parquet", "'p'"),
         options=("--hessian", "poisson", "--prediction-column", "p")),
    Case("all weights zero", _zero_weights, BAD_INPUT, ("'w'", "total weight"),
         options=("--weight-column", "w")),
    Case("saturated predictions: zero hessian", _saturated, BAD_INPUT, ("'p'", "total weight"),
         options=("--hessian", "logistic", "--prediction-column", "p")),
    Case("integers beyond 2**53", _huge_ints, BAD_INPUT, ("big.parquet", "'x'")),
    Case("credentials inside the URL", lambda root: None, BAD_INPUT, ("s3://***@bucket/src", "storage_options"),
         source="s3://AKIDEXAMPLE:fake%2Fsecret9@bucket/src"),
    Case("unreadable file", _write_good, STORAGE, ("a.parquet",), source="faulty://{root}",
         options=("--storage-option", "target_protocol=file",
                  "--storage-option", "permanent=*/a.parquet")),
]


def _fmt(s: str, root: str) -> str:
    return s.replace("{root}", root)


@pytest.mark.parametrize("case", CATALOGUE, ids=[c.name for c in CATALOGUE])
def test_bad_input(case, run, tmp_path):
    root = str(tmp_path / "src")
    case.make(root)
    out = str(tmp_path / "table")
    code, stdout, stderr = run(["build", _fmt(case.source, root), "--out", out, *case.options])
    errors = [ln for ln in stderr.splitlines() if ln.startswith("sketchmerge: ")
              and ("error" in ln.split(":", 2)[1])]
    assert code == case.code, stderr
    assert len(errors) == 1, stderr                      # one error line
    assert "Traceback" not in stderr and stdout == ""
    for name in case.names:
        assert _fmt(name, root) in errors[0], (name, errors[0])
    assert "fake%2Fsecret9" not in stderr and "AKIDEXAMPLE" not in stderr
    assert not os.path.exists(os.path.join(out, "versions")) or TableStore(out).versions() == []


REFRESH = ["corrupt Parquet footer", "truncated Parquet file", "CSV with ragged rows", "type conflict across files",
           "duplicate column names", "integers beyond 2**53", "corrupt Arrow IPC file", "negative weight"]


@pytest.mark.parametrize("case", [c for c in CATALOGUE if c.name in REFRESH], ids=lambda c: c.name)
def test_bad_input_on_refresh_publishes_nothing(case, run, tmp_path):
    """A table with a version: a bad file added tonight leaves that version current."""
    root = str(tmp_path / "src")
    out = str(tmp_path / "table")
    put(root, "day=0/good.parquet", good_table(seed=9))
    code, _, err = run(["build", root, "--out", out, *case.options])
    assert code == 0, err
    before = sketchmerge.load(out)
    case.make(root)
    code, _, err = run(["build", root, "--out", out, *case.options])
    assert code == case.code, err
    st = TableStore(out)
    assert st.versions() == [1] and st.current() == 1
    assert sketchmerge.load(out).content_sha256 == before.content_sha256


# ----------------------------------------------------------------------------- accepted by design

def test_accepted_edge_cases(run, tmp_path):
    """All-NaN, constant and all-zero-weight columns, and zero-row files next to data, build.

    References: a constant column has one distinct value, so its one edge is that value
    (README, edge semantics: at most ``bins`` distinct values become the edges); an
    all-NaN column has no values, so no edges and a missing share of 1.
    """
    root = str(tmp_path / "src")
    n = 3000
    r = _rng(4)
    put(root, "day=1/a.parquet", pa.table({
        "x": r.normal(size=n), "nan": np.full(n, np.nan), "const": np.full(n, 7.25),
        "w": r.uniform(0.5, 2, n)}))
    put(root, "day=2/empty.parquet", pa.table({"x": pa.array([], pa.float64()),
                                               "nan": pa.array([], pa.float64()),
                                               "const": pa.array([], pa.float64()),
                                               "w": pa.array([], pa.float64())}))
    put(root, "day=3/zero.parquet", raw=b"")
    out = str(tmp_path / "table")
    code, _, err = run(["build", root, "--out", out, "--weight-column", "w"])
    assert code == 0, err
    cuts = sketchmerge.load(out)
    assert cuts.rows == n
    assert cuts.edges("const").tolist() == [7.25]
    nan = cuts.feature("nan")
    assert nan.edges.size == 0 and nan.missing_share == 1.0 and nan.missing_count == n
    codes = cuts.bin({"x": np.array([0.0]), "nan": np.array([1.0]), "const": np.array([7.25])},
                     features=["x", "nan", "const"])
    assert codes[0, 2] == 0                                 # 7.25 <= edges[0]


# ----------------------------------------------------------------------------- the real command

def test_console_command_one_line_and_debug_traceback(tmp_path):
    root = str(tmp_path / "src")
    _corrupt_footer(root)
    cmd = [sys.executable, "-m", "sketchmerge.cli", "build", root, "--out", str(tmp_path / "t"),
           "--workers", "1"]
    r = subprocess.run(cmd, capture_output=True, text=True, timeout=300)
    assert r.returncode == BAD_INPUT, r.stderr
    lines = [ln for ln in r.stderr.splitlines() if ln.strip()]
    assert lines == [ln for ln in lines if ln.startswith("sketchmerge: ")], r.stderr
    assert sum("error" in ln for ln in lines) == 1 and "bad-footer.parquet" in r.stderr
    assert "Traceback" not in r.stderr
    r = subprocess.run(cmd + ["--debug"], capture_output=True, text=True, timeout=300)
    assert r.returncode != 0 and "Traceback" in r.stderr
    assert not os.path.exists(tmp_path / "t" / "versions") or TableStore(str(tmp_path / "t")).versions() == []
