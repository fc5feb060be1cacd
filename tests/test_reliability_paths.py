"""Paths: a build writes only under TABLE, whatever the names in the source.

Unit and partition names come from the data (folder and file names, object
keys); they may hold ``..``, leading slashes, ``%``, ``#``, ``?``, spaces,
newlines, backslashes, non-ASCII letters.  They only ever appear inside
documents: every stored name is derived from hashes and version numbers
(docs/STORE.md, "Layout").  The tests snapshot every file around the build
(source, working folder, temporary folder) and check the table's own layout.
"""

from __future__ import annotations

import os
import re
import subprocess
import sys

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import sketchmerge
from sketchmerge.store import TableStore

# docs/STORE.md, "Layout"
LAYOUT = re.compile(r"CURRENT|CURRENT\.lock|versions/v\d{8}\.(cuts|keys)|versions/v\d{8}\.[0-9a-f]{16}\.keys"
                    r"|blobs/[0-9a-f]{16,64}(\.[a-z]{1,16})?|tmp/[^/]+")

HOSTILE = [
    "day=..%2F..%2Fescape/p.parquet",
    "day=..%2f/p.parquet",
    "k=a b/c d.parquet",
    "k=ü€/naïve.parquet",
    "k=#frag/h#sh.parquet",
    "k=q?x=1/ques?tion.parquet",
    "k=back\\slash/b\\s.parquet",
    "k=new\nline/n\nl.parquet",
    "k=-rf/-rf.parquet",
    "k=..../x...parquet",
    "%2e%2e/%2e%2e.parquet",
]


def _snapshot(*roots) -> set[str]:
    out = set()
    for root in roots:
        for dirpath, dirs, files in os.walk(root):
            for name in dirs + files:
                out.add(os.path.join(dirpath, name))
    return out


def _table_files(table: str) -> list[str]:
    rels = []
    for dirpath, _, files in os.walk(table):
        for f in files:
            rels.append(os.path.relpath(os.path.join(dirpath, f), table))
    return rels


def _write(root, rel, seed):
    p = os.path.join(root, rel)
    os.makedirs(os.path.dirname(p), exist_ok=True)
    r = np.random.default_rng(seed)
    pq.write_table(pa.table({"x": r.normal(size=500), "k2": r.integers(0, 3, 500)}), p)


def test_hostile_names_stay_inside_documents(tmp_path, monkeypatch):
    src, table, cwd, tmp = (tmp_path / n for n in ("src", "table", "cwd", "tmp"))
    for d in (cwd, tmp):
        d.mkdir()
    for i, rel in enumerate(HOSTILE):
        _write(str(src), rel, i)
    before = _snapshot(src, cwd)
    env = dict(os.environ, TMPDIR=str(tmp))
    r = subprocess.run([sys.executable, "-m", "sketchmerge.cli", "build", str(src), "--out", str(table),
                        "--workers", "1", "--json"], cwd=cwd, env=env, capture_output=True, text=True,
                       timeout=300)
    assert r.returncode == 0, r.stderr
    assert _snapshot(src, cwd) == before                     # source and working folder untouched
    # the temporary folder holds only Dask's own scratch space
    assert all(os.path.relpath(p, tmp).split(os.sep)[0] == "dask-scratch-space" for p in _snapshot(tmp))
    files = _table_files(str(table))
    assert files and all(LAYOUT.fullmatch(f) for f in files), [f for f in files if not LAYOUT.fullmatch(f)]
    cuts = sketchmerge.load(str(table))
    addresses = cuts.content["units"]["address"]
    assert len(addresses) == len(HOSTILE) and cuts.rows == 500 * len(HOSTILE)
    # the names are recorded as given (with % and # escaped, sources.Unit), not interpreted
    assert any("..%252F..%252Fescape" in a for a in addresses)
    assert any("\n" in a for a in addresses)
    assert not (tmp_path / "escape").exists() and not (tmp_path / "src" / "escape").exists()


def test_hostile_object_keys_on_s3_stay_inside_documents(s3_options, s3_bucket, tmp_path, monkeypatch):
    import s3fs

    fs = s3fs.S3FileSystem(**s3_options)
    keys = ["src/../outside.parquet", "src/day=../p.parquet", "src//double.parquet", "src/./dot.parquet",
            "src/k=%2F/p.parquet", "src/ü/ß.parquet"]
    for i, k in enumerate(keys):
        r = np.random.default_rng(i)
        with fs.open(f"{s3_bucket}/{k}", "wb") as f:
            pq.write_table(pa.table({"x": r.normal(size=300)}), f)
    before = set(fs.find(s3_bucket))
    monkeypatch.chdir(tmp_path)
    rep = sketchmerge.build(f"s3://{s3_bucket}/src", f"s3://{s3_bucket}/tables/t", storage_options=s3_options,
                            workers=1)
    assert rep["version"] == 1
    fs.invalidate_cache()
    new = set(fs.find(s3_bucket)) - before
    prefix = f"{s3_bucket}/tables/t/"
    assert new and all(k.startswith(prefix) and LAYOUT.fullmatch(k[len(prefix):]) for k in new), new
    assert os.listdir(tmp_path) == []                       # nothing written locally


@pytest.mark.parametrize("out", ["t", "t/", "./t", "nested/../t"])
def test_relative_table_urls_resolve_inside_the_working_folder(tmp_path, monkeypatch, out):
    src = tmp_path / "src"
    _write(str(src), "a.parquet", 0)
    cwd = tmp_path / "cwd"
    cwd.mkdir()
    monkeypatch.chdir(cwd)
    sketchmerge.build(str(src), out, workers=1)
    assert sorted(os.listdir(cwd)) == ["t"] or sorted(os.listdir(cwd)) == ["nested", "t"]
    assert all(LAYOUT.fullmatch(f) for f in _table_files(str(cwd / "t")))
    assert TableStore(str(cwd / "t")).versions() == [1]


@pytest.mark.parametrize("url", ["memory:///reliability-t", "memory:///reliability-t/sub"])
def test_empty_authority_urls_do_not_become_local_folders(tmp_path, monkeypatch, memfs, url):
    monkeypatch.chdir(tmp_path)
    st = TableStore(url)
    st.publish(1, b"one", [])
    assert os.listdir(tmp_path) == []                        # nothing in the working folder
    assert memfs.exists(url.replace("memory://", ""))          # the table is in memory://
