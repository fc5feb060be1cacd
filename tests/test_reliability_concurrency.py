"""Concurrent builders: 2 to 4 ``sketchmerge build`` processes at once on one table.

Each builder asks for its own bin count, so every published version names the
builder that wrote it.  One table carries on across all trials (``--keep``
large, so gc keeps every version), and after each trial:

* every builder exited 0 or with the documented race code 8 (lost the publish
  race ``publish_attempts`` times: retry);
* the history is consistent: versions 1..N without gaps, each loading with its
  checksums, each holding exactly one builder's content, the pointer valid and on
  the newest version;
* no version is lost: every builder that exited 0 finds its own content under
  the version it reported, and nobody else's;
* every blob that a kept manifest names exists (the gc of one builder never
  removes what another's version needs).

Every other trial the builders meet at a barrier just before their first publish, so
they all race for the same version number.  Local disk (2 trials in CI, 20 with
``-m slow``) and the S3-compatible server (2 and 10).
"""

from __future__ import annotations

import json
import os
import random
import subprocess
import sys

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import sketchmerge
from sketchmerge.store import TableStore, decode_pointer

RACE = 8  # README, "Exit codes"


def _data(root, fs=None):
    r = np.random.default_rng(3)
    for day in range(2):
        t = pa.table({"x": r.normal(size=8000), "k": r.integers(0, 5, 8000)})
        path = f"{root}/day={day}/p.parquet"
        if fs is None:
            os.makedirs(os.path.dirname(path), exist_ok=True)
            pq.write_table(t, path, row_group_size=2000)
        else:
            with fs.open(path, "wb") as f:
                pq.write_table(t, f, row_group_size=2000)


def _opts(s3):
    if not s3:
        return []
    return ["--storage-option", f"key={s3['key']}", "--storage-option", f"secret={s3['secret']}",
            "--storage-option", f"client_kwargs.endpoint_url={s3['client_kwargs']['endpoint_url']}",
            "--storage-option", "client_kwargs.region_name=us-east-1"]


# the build command; with a barrier folder, every builder waits at its first publish until
# all have arrived, so that they race for the same version number
RUNNER = r"""
import os, sys, time
barrier, n = sys.argv[1], int(sys.argv[2])
if barrier:
    from sketchmerge import store as S
    publish, first = S.TableStore.publish, [True]
    def waiting(self, *a, **k):
        if first[0]:
            first[0] = False
            open(os.path.join(barrier, str(os.getpid())), "w").close()
            t0 = time.time()
            while len(os.listdir(barrier)) < n and time.time() - t0 < 120:
                time.sleep(0.002)
        return publish(self, *a, **k)
    S.TableStore.publish = waiting
from sketchmerge.cli import main
sys.exit(main(sys.argv[3:]))
"""


def _trial(src, table, bins_list, s3, barrier=""):
    procs = [subprocess.Popen([sys.executable, "-c", RUNNER, barrier, str(len(bins_list)), "build", src, "--out",
                               table, "--bins", str(b), "--workers", "1", "--keep", "100000", "--json",
                               *_opts(s3)],
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
             for b in bins_list]
    return [(b, p.returncode, o, e) for b, p, (o, e) in
            zip(bins_list, procs, [p.communicate(timeout=600) for p in procs])]


def _check(table, s3, won: dict[int, int]):
    st = TableStore(table, storage_options=s3)
    vs = st.versions()
    assert vs == list(range(1, len(vs) + 1))                            # no gaps
    assert st.current() == vs[-1]
    pointer = decode_pointer(st._b.read("CURRENT"))                      # a valid pointer document
    assert pointer.version == vs[-1]
    import hashlib

    assert pointer.document_sha256 == hashlib.sha256(st.read_version(vs[-1])[1]).hexdigest()
    bins_of = {}
    for v in vs:
        c = sketchmerge.load(table, version=v, storage_options=s3)      # checksums verified
        assert c.version == v
        bins_of[v] = c.options["bins"]
    for v, b in won.items():
        assert bins_of[v] == b, (v, b, bins_of[v])                       # the winner's content
    assert sorted(won) == vs                                              # every version has its winner
    blobs = st.existing_blobs()
    for v in vs[-3:]:
        missing = set(st.manifest(v)) - blobs
        assert not missing, (v, sorted(missing)[:3])
    return vs


def _run(src, table, trials, seed, s3=None, barrier_root=None):
    rng = random.Random(seed)
    won: dict[int, int] = {}
    codes, races, sizes = [], 0, []
    for t in range(trials):
        n = rng.randint(2, 4)
        sizes.append(n)
        bins_list = [8 + 16 * t + 4 * i for i in range(n)]           # unique per builder and trial
        barrier = ""
        if barrier_root is not None and t % 2 == 1:                  # every other trial: a real race
            barrier = str(barrier_root / f"barrier{t}")
            os.makedirs(barrier)
        for b, code, out, err in _trial(src, table, bins_list, s3, barrier):
            codes.append(code)
            assert code in (0, RACE), err[-3000:]
            races += err.count("published by another builder")
            if code == 0:
                rep = json.loads(out)
                assert rep["changed"]
                assert rep["version"] not in won, "two builders reported the same version"
                won[rep["version"]] = b
            else:
                assert "race" in err or "another builder" in err
        _check(table, s3, won)
    print(f"concurrent builders ({'s3' if s3 else 'local'}): {trials} trials of {sizes} builders "
          f"({'every other one' if barrier_root else 'none'} meeting at a barrier before publish); "
          f"{codes.count(0)} published, {codes.count(RACE)} exited {RACE} (lost every attempt), "
          f"{races} lost races republished on top; history v1..v{len(won)} consistent")


def test_concurrent_builders_local(tmp_path):
    _data(str(tmp_path / "src"))
    _run(str(tmp_path / "src"), str(tmp_path / "table"), trials=2, seed=1, barrier_root=tmp_path)


def test_concurrent_builders_s3(s3_options, s3_bucket, tmp_path):
    import s3fs

    _data(f"{s3_bucket}/src", s3fs.S3FileSystem(**s3_options))
    _run(f"s3://{s3_bucket}/src", f"s3://{s3_bucket}/table", trials=2, seed=5, s3=s3_options,
         barrier_root=tmp_path)


@pytest.mark.slow
def test_concurrent_builders_local_many(tmp_path):
    _data(str(tmp_path / "src"))
    _run(str(tmp_path / "src"), str(tmp_path / "table"), trials=20, seed=3, barrier_root=tmp_path)


@pytest.mark.slow
def test_concurrent_builders_s3_many(s3_options, s3_bucket, tmp_path):
    import s3fs

    _data(f"{s3_bucket}/src", s3fs.S3FileSystem(**s3_options))
    _run(f"s3://{s3_bucket}/src", f"s3://{s3_bucket}/table", trials=10, seed=4, s3=s3_options,
         barrier_root=tmp_path)
