"""The local table cache: keyed by table, version and sha256; safe with many processes.

Checksums are recomputed here with ``hashlib.sha256`` over the bytes the store
holds (FIPS 180-4), independently of the cache code.  The data are made up: an
invented beekeeping cooperative's hive scales.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import subprocess
import sys
import time

import numpy as np
import pytest

import sketchmerge
from sketchmerge import Summary
from sketchmerge.cuts import encode_table, feature_cuts
from sketchmerge.errors import FormatError, NoInputError
from sketchmerge.store import TableStore
from sketchmerge.tablecache import ENV_VAR, read_document, resolve_cache_dir, table_key

CONTENT = {"source": "hive-scales", "options": {"bins": 16}, "rows": 5000, "root": "", "skipped": [],
           "units": {"address": [], "fingerprint": [], "rows": [], "nbytes": []}}


def document(version, seed):
    rng = np.random.default_rng(seed)
    feats = [feature_cuts("hive_kg", Summary.from_values(rng.normal(40, 8, 5000)).prune(512), 16, 1 / 128),
             feature_cuts("frames", Summary.from_values(rng.integers(4, 11, 5000)), 16, 1 / 128)]
    return encode_table(feats, version=version, content_extra=CONTENT, record={"created": float(seed)})


def publish(root, *seeds):
    store = TableStore(str(root))
    for v, seed in enumerate(seeds, start=1):
        store.publish(v, document(v, seed), [])
    return store


def cached_files(cache, url):
    folder = cache / table_key(url)
    return sorted(p.name for p in folder.iterdir()) if folder.exists() else []


def test_layout_and_hit(tmp_path):
    store = publish(tmp_path / "t", 1, 2)
    cache = tmp_path / "cache"
    v, data, hit = read_document(store, None, str(cache))
    assert (v, hit) == (2, False)
    sha = hashlib.sha256((tmp_path / "t" / "versions" / "v00000002.cuts").read_bytes()).hexdigest()
    assert data == (tmp_path / "t" / "versions" / "v00000002.cuts").read_bytes()
    assert f"v00000002-{sha}.cuts" in cached_files(cache, store.url)
    assert read_document(store, None, str(cache))[2] is True
    v1, d1, hit1 = read_document(store, 1, str(cache))
    assert (v1, hit1) == (1, False) and d1 == (tmp_path / "t" / "versions" / "v00000001.cuts").read_bytes()
    assert not [n for n in cached_files(cache, store.url) if n.startswith(".tmp-")]
    # the folder name is a hash of the URL: no path or bucket name on local disk
    assert str(tmp_path) not in "".join(os.listdir(cache))


def test_cached_copy_is_served_without_reading_the_document(tmp_path):
    store = publish(tmp_path / "t", 1)
    cache = tmp_path / "cache"
    first = sketchmerge.load(str(tmp_path / "t"), version=1, cache_dir=str(cache))
    # damage the stored document: a cached load never reads it, an uncached one fails
    doc = tmp_path / "t" / "versions" / "v00000001.cuts"
    doc.chmod(0o644)
    doc.write_bytes(doc.read_bytes()[:-7] + b"garbage")
    again = sketchmerge.load(str(tmp_path / "t"), version=1, cache_dir=str(cache))
    np.testing.assert_array_equal(again.edges("hive_kg"), first.edges("hive_kg"))
    with pytest.raises(FormatError):
        sketchmerge.load(str(tmp_path / "t"), version=1)
    assert store.url


def test_damaged_cache_file_is_replaced_from_the_source(tmp_path, caplog):
    store = publish(tmp_path / "t", 1)
    cache = tmp_path / "cache"
    _, good, _ = read_document(store, 1, str(cache))
    (name,) = [n for n in cached_files(cache, store.url) if n.endswith(".cuts")]
    path = cache / table_key(store.url) / name
    path.write_bytes(good[: len(good) // 2])  # a truncated file
    with caplog.at_level(logging.WARNING, logger="sketchmerge"):
        _, data, hit = read_document(store, 1, str(cache))
    assert data == good and hit is False
    assert "damaged" in caplog.text
    assert hashlib.sha256(path.read_bytes()).hexdigest() == name[10:74]


def test_a_changed_published_version_raises_format_error(tmp_path):
    root = tmp_path / "t"
    publish(root, 1)
    cache = tmp_path / "cache"
    sketchmerge.load(str(root), cache_dir=str(cache))
    # the table is deleted and rebuilt from other data: version 1 now has other bytes
    for p in sorted(root.rglob("*"), reverse=True):
        p.chmod(0o755) if p.is_dir() else p.chmod(0o644)
    import shutil

    shutil.rmtree(root)
    publish(root, 99)
    with pytest.raises(FormatError, match=r"version 1: expected the document cached as sha256 .* remove"):
        sketchmerge.load(str(root), cache_dir=str(cache))
    assert sketchmerge.load(str(root)).version == 1  # without the cache the new table loads


def test_source_document_must_match_its_manifest(tmp_path):
    publish(tmp_path / "t", 1)
    doc = tmp_path / "t" / "versions" / "v00000001.cuts"
    doc.chmod(0o644)
    doc.write_bytes(document(1, 5))  # a valid document, but not the published one
    with pytest.raises(FormatError, match="expected a document with sha256"):
        sketchmerge.load(str(tmp_path / "t"), version=1, cache_dir=str(tmp_path / "cache"))


def test_environment_variable_and_opt_out(tmp_path, monkeypatch):
    publish(tmp_path / "t", 1)
    monkeypatch.setenv(ENV_VAR, str(tmp_path / "envcache"))
    assert resolve_cache_dir() == str(tmp_path / "envcache")
    sketchmerge.load(str(tmp_path / "t"))
    assert (tmp_path / "envcache").exists()
    assert resolve_cache_dir(str(tmp_path / "explicit")) == str(tmp_path / "explicit")  # argument wins
    assert resolve_cache_dir("") is None
    monkeypatch.setenv(ENV_VAR, "")
    assert resolve_cache_dir() is None


def test_nothing_published(tmp_path):
    with pytest.raises(NoInputError):
        sketchmerge.load(str(tmp_path / "none"), cache_dir=str(tmp_path / "cache"))


def test_s3_table_through_the_cache(s3_bucket, s3_options, tmp_path):
    url = f"s3://{s3_bucket}/tables/hives"
    store = TableStore(url, storage_options=s3_options)
    store.publish(1, document(1, 3), [])
    a = read_document(store, None, str(tmp_path / "cache"))
    b = read_document(TableStore(url, storage_options=s3_options), None, str(tmp_path / "cache"))
    assert a[0] == b[0] == 1 and a[1] == b[1] and (a[2], b[2]) == (False, True)
    assert s3_bucket not in "".join(os.listdir(tmp_path / "cache"))


_WORKER = """
import hashlib, json, os, sys, time
from sketchmerge.store import TableStore
from sketchmerge.tablecache import read_document
store = TableStore(sys.argv[1])
open(sys.argv[3] + "." + str(os.getpid()), "w").close()  # ready
while not os.path.exists(sys.argv[3]):  # start together: every process is imported and waiting
    time.sleep(0.002)
v, data, hit = read_document(store, None, sys.argv[2])
print(json.dumps({"v": v, "sha": hashlib.sha256(data).hexdigest(), "hit": hit}))
"""


@pytest.mark.parametrize("damaged", [False, True])
def test_many_processes_download_once(tmp_path, damaged):
    store = publish(tmp_path / "t", 1, 2, 3)
    cache = tmp_path / "cache"
    want = hashlib.sha256((tmp_path / "t" / "versions" / "v00000003.cuts").read_bytes()).hexdigest()
    if damaged:  # a half-written file left by a crashed tool sits where the document belongs
        folder = cache / table_key(store.url)
        folder.mkdir(parents=True)
        (folder / f"v00000003-{want}.cuts").write_bytes(b"\x00" * 100)
    env = dict(os.environ, PYTHONWARNINGS="ignore")
    go = tmp_path / "go"
    procs = [subprocess.Popen([sys.executable, "-c", _WORKER, str(tmp_path / "t"), str(cache), str(go)],
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env) for _ in range(6)]
    deadline = time.monotonic() + 60
    while len(list(tmp_path.glob("go.*"))) < len(procs) and time.monotonic() < deadline:
        time.sleep(0.01)  # every process imported and waiting at the start line
    go.write_text("go")
    results = []
    for p in procs:
        out, err = p.communicate(timeout=120)
        assert p.returncode == 0, err.decode()
        results.append(json.loads(out))
    assert {r["sha"] for r in results} == {want} and {r["v"] for r in results} == {3}
    # the lock serialises first downloads: exactly one process fetched the document
    assert sum(not r["hit"] for r in results) == 1
    names = cached_files(cache, store.url)
    assert names == [f"v00000003-{want}.cuts", "v00000003.lock"]
