"""Shared fixtures: a cleared memory filesystem, one S3-compatible test server per
session (moto's server on 127.0.0.1, port 0), and the hypothesis CI profile."""

from __future__ import annotations

import os
import uuid

import pytest

try:
    from hypothesis import HealthCheck, settings

    settings.register_profile("ci", derandomize=True, deadline=None, max_examples=150,
                              suppress_health_check=[HealthCheck.too_slow])
    settings.register_profile("dev", deadline=None, max_examples=60)
    settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "ci"))
except ImportError:  # pragma: no cover - hypothesis is in the test extra
    pass


@pytest.fixture
def memfs():
    """A cleared fsspec ``memory://`` filesystem."""
    import fsspec

    fs = fsspec.filesystem("memory")
    fs.store.clear()
    fs.pseudo_dirs.clear()
    fs.pseudo_dirs.append("")
    yield fs
    fs.store.clear()
    fs.pseudo_dirs.clear()
    fs.pseudo_dirs.append("")


@pytest.fixture(scope="module")
def client():
    """An in-process Dask cluster (one worker, two threads; every socket on 127.0.0.1)."""
    from distributed import Client, LocalCluster

    cluster = LocalCluster(n_workers=1, threads_per_worker=2, processes=False,
                           dashboard_address="127.0.0.1:0", worker_dashboard_address="127.0.0.1:0")
    c = Client(cluster)
    yield c
    c.close()
    cluster.close()


@pytest.fixture(scope="session")
def s3_server():
    """Start moto's S3-compatible server on 127.0.0.1 (free port); yield its endpoint URL."""
    pytest.importorskip("s3fs")
    from moto.server import ThreadedMotoServer

    server = ThreadedMotoServer(ip_address="127.0.0.1", port=0, verbose=False)
    server.start()
    host, port = server.get_host_and_port()
    yield f"http://{host}:{port}"
    server.stop()


@pytest.fixture
def s3_options(s3_server):
    """fsspec storage options for the test server (fake credentials)."""
    return {"key": "testing-key", "secret": "testing-secret",
            "client_kwargs": {"endpoint_url": s3_server, "region_name": "us-east-1"}}


@pytest.fixture
def s3_bucket(s3_options):
    """A fresh, empty bucket on the test server; yields its name."""
    import s3fs

    fs = s3fs.S3FileSystem(**s3_options)
    name = "sm-" + uuid.uuid4().hex[:12]
    fs.call_s3("create_bucket", Bucket=name)
    fs.invalidate_cache()
    yield name


def pytest_collection_modifyitems(config, items):
    """Skip tests marked ``slow`` unless they were asked for (``-m slow``)."""
    if "slow" in (config.getoption("-m") or ""):
        return
    skip = pytest.mark.skip(reason="slow test: run with -m slow")
    for item in items:
        if "slow" in item.keywords:
            item.add_marker(skip)
