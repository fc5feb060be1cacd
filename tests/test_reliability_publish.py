"""A killed publisher: SIGKILL the build process at random points of its publish.

A table holds version 1; a new day of data arrives and a build process
publishes version 2.  The process kills itself with SIGKILL either at its k-th
storage call after ``publish`` began (k drawn uniformly over all the calls of
the publish, the drift read and the gc that follow it), or after a random delay
into the publish, so the kill also lands inside a call (a half-written
temporary file, a PUT in flight).  After every kill:

* readers load version 1 or version 2, never anything else, every document
  passing its checksums, and the one they load is byte-identical to an
  undisturbed build's (creation time pinned, SOURCE_DATE_EPOCH);
* the next run completes (publishing version 2 if the killed one had not
  committed it) and, with the grace period at 0, leaves no leftovers: no
  temporary files, no attempt manifests, a canonical manifest for every
  version, and the pointer on the current version.

Local disk and the S3-compatible test server; 4 + 2 trials in CI, 60 + 60 with
``-m slow``.  docs/STORE.md, "A killed writer", is the specification.
"""

from __future__ import annotations

import collections
import json
import os
import random
import shutil
import signal
import subprocess
import sys
import time

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import sketchmerge
from sketchmerge.store import TableStore, decode_pointer

pytestmark = pytest.mark.skipif(sys.platform == "win32", reason="SIGKILL is POSIX")

EPOCH = "1764547200"

# the build process: counts storage calls from the start of publish and kills itself
CHILD = r"""
import json, os, signal, sys, threading, time
import sketchmerge
from sketchmerge import store as S

src, table, so_json, kill_at, delay, log_path = sys.argv[1:]
kill_at, delay, so = int(kill_at), float(delay), json.loads(so_json)
log = open(log_path, "w", buffering=1)
n = [0]
PRIMITIVES = ("read", "read_tagged", "write", "create", "replace_if", "exists", "list", "delete", "read_many")

def wrap(backend):
    for name in PRIMITIVES:
        f = getattr(backend, name)
        def call(*a, _f=f, _name=name, **k):
            n[0] += 1
            first = a[0] if a else ""
            log.write(f"{n[0]} {_name} {first[0] if isinstance(first, list) and first else first}\n")
            if n[0] == kill_at:
                os.kill(os.getpid(), signal.SIGKILL)
            return _f(*a, **k)
        setattr(backend, name, call)

publish = S.TableStore.publish
def publishing(self, *a, **k):
    wrap(self._b)
    log.write(f"publish {time.monotonic()}\n")
    if delay > 0:
        threading.Thread(target=lambda: (time.sleep(delay), os.kill(os.getpid(), signal.SIGKILL)),
                         daemon=True).start()
    return publish(self, *a, **k)
S.TableStore.publish = publishing
sketchmerge.build(src, table, storage_options=so or None, workers=1, bins=16, weight_column="w")
log.write(f"done {time.monotonic()}\n")
"""


def write_day(root: str, day: int, fs=None):
    r = np.random.default_rng(day)
    t = pa.table({"x": r.lognormal(0, 1, 20_000), "k": r.integers(0, 9, 20_000),
                  "w": r.uniform(0.2, 2, 20_000)})
    path = f"{root}/day=2026-11-{day:02d}/p.parquet"
    if fs is None:
        os.makedirs(os.path.dirname(path), exist_ok=True)
        pq.write_table(t, path, row_group_size=5000)
    else:
        with fs.open(path, "wb") as f:
            pq.write_table(t, f, row_group_size=5000)


class Site:
    """Where the trials run: local disk or the S3-compatible server."""

    def __init__(self, tmp_path, s3=None, bucket=None):
        self.s3, self.bucket, self.tmp = s3, bucket, tmp_path
        self.so = s3 or {}
        if s3:
            import s3fs

            self.fs = s3fs.S3FileSystem(**s3)
            self.base = f"{bucket}"
            self.url = lambda p: f"s3://{bucket}/{p}"
        else:
            self.fs = None
            self.base = str(tmp_path)
            self.url = lambda p: str(tmp_path / p)

    def copy_table(self, src: str, dst: str):
        if self.fs is None:
            shutil.copytree(self.url(src), self.url(dst))
        else:
            self.fs.invalidate_cache()
            for key in self.fs.find(f"{self.bucket}/{src}"):
                self.fs.copy(key, f"{self.bucket}/{dst}" + key[len(f"{self.bucket}/{src}"):])

    def names(self, table: str) -> list[str]:
        if self.fs is None:
            root = self.url(table)
            return sorted(os.path.relpath(os.path.join(d, f), root) for d, _, fs in os.walk(root) for f in fs)
        self.fs.invalidate_cache()
        pre = f"{self.bucket}/{table}/"
        return sorted(k[len(pre):] for k in self.fs.find(pre))


def _child(site, table, kill_at, delay, log_path):
    env = dict(os.environ, SOURCE_DATE_EPOCH=EPOCH)
    p = subprocess.run([sys.executable, "-c", CHILD, site.url("src"), site.url(table), json.dumps(site.so),
                        str(kill_at), str(delay), str(log_path)], capture_output=True, text=True,
                       timeout=300, env=env)
    lines = open(log_path).read().splitlines()
    return p.returncode, lines, p.stderr


def _check_readers(site, table, old: bytes, new: bytes) -> int:
    so = site.so or None
    st = TableStore(site.url(table), storage_options=so)
    cur = st.current()
    assert cur in (1, 2)
    assert st.versions() == list(range(1, cur + 1))
    for v in range(1, cur + 1):                                   # every version: checksums verified
        assert sketchmerge.load(site.url(table), version=v, storage_options=so).version == v
    got = st.read_version()[1]
    assert got == (old if cur == 1 else new)                      # the old one or the new one, whole
    assert sketchmerge.load(site.url(table), storage_options=so).version == cur
    return cur


def _check_clean(site, table):
    st = TableStore(site.url(table), storage_options=site.so or None)
    names = site.names(table)
    cur = st.current()
    leftovers = [n for n in names if n.startswith("tmp/") or (n.startswith("versions/") and n.count(".") == 2)]
    assert leftovers == [], leftovers
    assert {f"versions/v{v:08d}.keys" for v in st.versions()} <= set(names)
    assert decode_pointer(st._b.read("CURRENT")).version == cur


def _trials(site, client, trials, seed, monkeypatch):
    monkeypatch.setenv("SOURCE_DATE_EPOCH", EPOCH)
    fs = site.fs
    src = f"{site.bucket}/src" if fs else str(site.tmp / "src")
    for day in (1, 2):
        write_day(src, day, fs)
    kw = dict(storage_options=site.so or None, client=client, bins=16, weight_column="w")
    sketchmerge.build(site.url("src"), site.url("template"), **kw)
    old = TableStore(site.url("template"), storage_options=site.so or None).read_version(1)[1]
    write_day(src, 3, fs)
    # calibration: an undisturbed publish, its bytes and its storage calls
    site.copy_table("template", "calib")
    code, lines, err = _child(site, "calib", 0, 0.0, site.tmp / "calib.log")
    assert code == 0 and lines[-1].startswith("done"), err[-3000:]
    calls = [ln for ln in lines if ln[0].isdigit()]
    stamps = {ln.split()[0]: float(ln.split()[1]) for ln in lines if ln.startswith(("publish", "done"))}
    span = stamps["done"] - stamps["publish"]      # publish, drift read and gc, undisturbed
    new = TableStore(site.url("calib"), storage_options=site.so or None).read_version(2)[1]
    rng = random.Random(seed)
    where = collections.Counter()
    outcome = collections.Counter()
    seconds = []
    for i in range(trials):
        table = f"t{i}"
        site.copy_table("template", table)
        by_call = i % 2 == 0
        k = rng.randint(1, len(calls)) if by_call else 0
        delay = 0.0 if by_call else rng.uniform(0.0, span)
        t0 = time.perf_counter()
        code, lines, err = _child(site, table, k, delay, site.tmp / f"{table}.log")
        seconds.append(time.perf_counter() - t0)
        killed = code == -signal.SIGKILL
        assert killed or (code == 0 and lines[-1].startswith("done")), (code, err[-3000:])
        last = [ln for ln in lines if ln[0].isdigit()]
        where[last[-1].split()[1] + " " + _kind(last[-1]) if (killed and last) else
              ("before publish" if killed else "not killed")] += 1
        cur = _check_readers(site, table, old, new)
        outcome[f"readers saw v{cur}"] += 1
        # the next run completes and, with no grace period, cleans up
        monkeypatch.setenv("SKETCHMERGE_GC_GRACE_SECONDS", "0")
        rep = sketchmerge.build(site.url("src"), site.url(table), **kw)
        monkeypatch.delenv("SKETCHMERGE_GC_GRACE_SECONDS")
        assert rep["version"] == 2 and rep["changed"] == (cur == 1)
        assert TableStore(site.url(table), storage_options=site.so or None).read_version(2)[1] == new
        _check_clean(site, table)
    print(f"killed publisher ({'s3' if fs else 'local'}): {trials} trials, {len(calls)} storage calls and "
          f"{span * 1e3:.0f} ms per undisturbed publish+gc; {trials - where['not killed']} killed during it; "
          f"{dict(outcome)}; killed at {dict(sorted(where.items()))}; "
          f"child seconds {min(seconds):.1f}-{max(seconds):.1f}")
    return outcome


def _kind(line: str) -> str:
    name = line.split()[-1] if len(line.split()) > 2 else ""
    for pre, kind in (("versions/", "versions"), ("blobs", "blobs"), ("tmp", "tmp"), ("CURRENT", "CURRENT")):
        if name.startswith(pre):
            if kind == "versions":
                return "attempt-manifest" if name.count(".") == 2 else name.rsplit(".", 1)[-1]
            return kind
    return name


def test_killed_publisher_local(tmp_path, client, monkeypatch):
    _trials(Site(tmp_path), client, trials=4, seed=1, monkeypatch=monkeypatch)


def test_killed_publisher_s3(tmp_path, client, monkeypatch, s3_options, s3_bucket):
    _trials(Site(tmp_path, s3_options, s3_bucket), client, trials=2, seed=2, monkeypatch=monkeypatch)


@pytest.mark.slow
def test_killed_publisher_local_many(tmp_path, client, monkeypatch):
    _trials(Site(tmp_path), client, trials=60, seed=3, monkeypatch=monkeypatch)


@pytest.mark.slow
def test_killed_publisher_s3_many(tmp_path, client, monkeypatch, s3_options, s3_bucket):
    _trials(Site(tmp_path, s3_options, s3_bucket), client, trials=60, seed=4, monkeypatch=monkeypatch)
