"""Secrets: a known fake credential must never appear in any output of a build.

Credentials reach the build by ``--storage-option key=... secret=...`` or by the
environment (``AWS_ACCESS_KEY_ID``/``AWS_SECRET_ACCESS_KEY``, read by botocore).
The tests scan, byte for byte, everything a build run produces against the
S3-compatible test server: stdout and stderr (also with ``--debug``), the JSON
report, every object written under the table (documents, manifests, pointer,
blobs), the outputs of ``show`` and ``history``, the Dask task keys, and the
messages (with their whole cause chain) of builds that fail.

The access key id is scanned too: it is not the secret, but it names the
account and has no business in logs.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import urllib.parse

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import sketchmerge
from sketchmerge.errors import SketchmergeError

KEY = "SMFAKEKEYID7Q2W9E4R"
SECRET = "sm-fake-secret/8c1e+Zq3Kx7Vb5Nm2Lp0"
TOKEN = "SMFAKESESSIONTOKEN5t6y7u8i"
NEEDLES = [KEY, SECRET, TOKEN, urllib.parse.quote(SECRET, safe=""), urllib.parse.quote_plus(SECRET)]


def leaks(blob) -> list[str]:
    text = blob if isinstance(blob, (bytes, bytearray)) else str(blob).encode()
    return [n for n in NEEDLES if n.encode() in text]


@pytest.fixture
def creds(s3_server):
    return {"key": KEY, "secret": SECRET,
            "client_kwargs": {"endpoint_url": s3_server, "region_name": "us-east-1"}}


@pytest.fixture
def bucket(creds, s3_bucket):
    import s3fs

    fs = s3fs.S3FileSystem(**creds)
    r = np.random.default_rng(8)
    for day in range(2):
        with fs.open(f"{s3_bucket}/src/day={day}/p.parquet", "wb") as f:
            pq.write_table(pa.table({"x": r.normal(size=3000), "w": r.uniform(0.5, 2, 3000)}), f)
    return s3_bucket


def _all_objects(creds, prefix) -> dict[str, bytes]:
    import s3fs

    fs = s3fs.S3FileSystem(**creds)
    fs.invalidate_cache()
    return {k: fs.cat_file(k) for k in fs.find(prefix)}


def _cli(args, env=None):
    e = dict(os.environ)
    for k in ("AWS_ACCESS_KEY_ID", "AWS_SECRET_ACCESS_KEY", "AWS_SESSION_TOKEN"):
        e.pop(k, None)
    e.update(env or {})
    return subprocess.run([sys.executable, "-m", "sketchmerge.cli", *args], capture_output=True, text=True,
                          timeout=300, env=e)


def _opts(creds, with_secrets=True):
    out = ["--storage-option", f"client_kwargs.endpoint_url={creds['client_kwargs']['endpoint_url']}",
           "--storage-option", "client_kwargs.region_name=us-east-1"]
    if with_secrets:
        out += ["--storage-option", f"key={KEY}", "--storage-option", f"secret={SECRET}",
                "--storage-option", f"token={TOKEN}"]
    return out


@pytest.mark.parametrize("via", ["options", pytest.param("environment", marks=pytest.mark.slow)])
def test_cli_outputs_and_stored_objects_hold_no_credential(creds, bucket, via):
    env = {} if via == "options" else {"AWS_ACCESS_KEY_ID": KEY, "AWS_SECRET_ACCESS_KEY": SECRET,
                                       "AWS_SESSION_TOKEN": TOKEN}
    opts = _opts(creds, with_secrets=via == "options")
    table = f"s3://{bucket}/tables/t"
    outputs = []
    for extra in (["--json"], ["--debug", "--full"]):
        r = _cli(["build", f"s3://{bucket}/src", "--out", table, "--workers", "1", "--weight-column", "w",
                  *opts, *extra], env)
        assert r.returncode == 0, r.stderr[-3000:]
        outputs.append(r.stdout + r.stderr)
    report = json.loads(outputs[0].split("\n")[0] if outputs[0].startswith("{") else
                        [ln for ln in outputs[0].splitlines() if ln.startswith("{")][0])
    assert report["version"] == 1 and leaks(json.dumps(report)) == []
    for cmd in (["show", table, "--json"], ["history", table, "--json"], ["show", table, "--debug"]):
        r = _cli(cmd + opts, env)
        assert r.returncode == 0, r.stderr[-2000:]
        outputs.append(r.stdout + r.stderr)
    assert "Authorization" in outputs[1]                    # the --debug run did log request headers
    for i, out in enumerate(outputs):
        assert leaks(out) == [], (i, leaks(out))
    objects = _all_objects(creds, f"{bucket}/tables/t")
    assert len(objects) > 5
    for name, data in objects.items():
        assert leaks(name) == [] and leaks(data) == [], name


def test_failing_builds_name_no_credential(creds, bucket, s3_server):
    # unreachable endpoint (closed port on loopback): storage error
    bad = dict(creds, client_kwargs={"endpoint_url": "http://127.0.0.1:9", "region_name": "us-east-1"})
    so = ["--storage-option", f"key={KEY}", "--storage-option", f"secret={SECRET}",
          "--storage-option", "client_kwargs.endpoint_url=http://127.0.0.1:9",
          "--storage-option", "config_kwargs.retries.max_attempts=1",
          "--storage-option", "config_kwargs.connect_timeout=1"]
    env = {"SKETCHMERGE_RETRIES": "0"}
    for extra in ([], ["--debug"]):
        r = _cli(["build", f"s3://{bucket}/src", "--out", f"s3://{bucket}/tables/u", "--workers", "1",
                  *so, *extra], env)
        assert r.returncode == 5, r.stderr[-2000:]
        assert leaks(r.stdout + r.stderr) == [], r.stderr[-2000:]
    # credentials inside the URLs: refused, and not repeated
    for src, out in ((f"s3://{KEY}:{urllib.parse.quote(SECRET, safe='')}@{bucket}/src", f"s3://{bucket}/t2"),
                     (f"s3://{bucket}/src", f"s3://{KEY}:{urllib.parse.quote(SECRET, safe='')}@nosuch-bkt/t")):
        r = _cli(["build", src, "--out", out, "--workers", "1", *_opts(creds)])
        assert r.returncode in (3, 4), r.stderr[-2000:]
        assert leaks(r.stdout + r.stderr) == [], r.stderr[-2000:]
    del bad


def _chain(e: BaseException) -> str:
    parts, seen = [], set()
    while e is not None and id(e) not in seen:
        seen.add(id(e))
        parts += [type(e).__name__, str(e), repr(e), repr(getattr(e, "args", ()))]
        e = e.__cause__ or e.__context__
    return "\n".join(parts)


@pytest.fixture(scope="module")
def cluster():
    from distributed import Client, LocalCluster

    c = LocalCluster(n_workers=1, threads_per_worker=2, processes=False, dashboard_address="127.0.0.1:0",
                     worker_dashboard_address="127.0.0.1:0")
    with Client(c) as client:
        yield c, client
    c.close()


def test_task_keys_reports_and_exceptions_hold_no_credential(creds, bucket, cluster):
    from distributed.diagnostics.plugin import SchedulerPlugin

    lc, client = cluster

    class Keys(SchedulerPlugin):
        def __init__(self):
            self.keys = set()

        def transition(self, key, start, finish, *args, **kwargs):
            self.keys.add(str(key))

    plugin = Keys()
    lc.scheduler.add_plugin(plugin, name="reliability-keys")
    try:
        rep = sketchmerge.build(f"s3://{bucket}/src", f"s3://{bucket}/tables/k", storage_options=creds,
                                client=client, weight_column="w", full=True)
    finally:
        lc.scheduler.remove_plugin(name="reliability-keys")
    assert rep["version"] >= 1 and len(plugin.keys) >= 3
    assert all(k.startswith("sm-") for k in plugin.keys)       # hashes of inputs (docs/TREE.md)
    assert leaks("\n".join(plugin.keys)) == [] and leaks(json.dumps(rep, default=str)) == []
    cuts = sketchmerge.load(f"s3://{bucket}/tables/k", storage_options=creds)
    assert leaks(json.dumps([cuts.content, cuts.record], default=str)) == [] and leaks(repr(cuts)) == []

    # exceptions raised to a Python caller, with their whole cause chain
    import s3fs

    fs = s3fs.S3FileSystem(**creds)
    fs.pipe_file(f"{bucket}/bad/a.parquet", b"PAR1 not really parquet PAR1")
    failures = [
        lambda: sketchmerge.build(f"s3://{bucket}/bad", f"s3://{bucket}/tables/b", storage_options=creds,
                                  client=client),
        lambda: sketchmerge.build(f"s3://{bucket}/nothing-here", f"s3://{bucket}/tables/b",
                                  storage_options=creds, client=client),
        lambda: sketchmerge.build(f"s3://{bucket}/src", "s3://no-such-bucket-sm/t", storage_options=creds,
                                  client=client),
        lambda: sketchmerge.load(f"s3://{bucket}/tables/none", storage_options=creds),
        lambda: sketchmerge.build(f"s3://{KEY}:{urllib.parse.quote(SECRET, safe='')}@{bucket}/src",
                                  f"s3://{bucket}/tables/b", client=client),
    ]
    for i, f in enumerate(failures):
        with pytest.raises(SketchmergeError) as ei:
            f()
        assert leaks(_chain(ei.value)) == [], (i, _chain(ei.value)[:2000])


def test_info_logs_hold_no_data_values(tmp_path):
    """A cut table holds exact data values; the logs of a build at info level must not.

    The data has distinctive values (its minimum, maximum and a point mass); stderr of
    a default (info-level) build is scanned for them in the usual float
    spellings.  The JSON report on stdout does carry min and max: it describes the table.
    """
    src = tmp_path / "src"
    r = np.random.default_rng(12)
    values = {"min": -7331.0625, "max": 98765.4321, "mass": 4242.4375}
    for day in range(2):
        x = r.uniform(-7000, 90000, 5000)
        x[:300] = values["mass"]
        x[-1] = values["min"] if day == 0 else values["max"]
        d = src / f"day={day}"
        d.mkdir(parents=True)
        pq.write_table(pa.table({"x": x, "k": r.integers(100000, 100009, 5000)}), str(d / "p.parquet"))
    spellings = {s for v in values.values() for s in (repr(v), str(v), f"{v:g}", f"{v:.6g}", f"{v:.4f}",
                                                       f"{v:,.2f}", f"{v:.3e}")} | {"100000", "100008"}
    p = subprocess.run([sys.executable, "-m", "sketchmerge.cli", "build", str(src), "--out",
                        str(tmp_path / "t"), "--workers", "1", "--bins", "32"],
                       capture_output=True, text=True, timeout=300)
    assert p.returncode == 0, p.stderr
    runs = [p.stderr]
    assert sketchmerge.load(str(tmp_path / "t")).edges("x")[-1] == values["max"]   # they are in the table
    for err in runs:
        assert [s for s in spellings if s in err] == [], err
