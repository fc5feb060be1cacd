"""Data-source tests against object storage: the shared S3-compatible test server
(moto on 127.0.0.1) and a small range-serving HTTP server on 127.0.0.1.

References are pyarrow's own reads of the same bytes; ETags are checked against
the MD5 of the object's bytes, which is what S3 reports for single-part uploads
(common practice).
"""

from __future__ import annotations

import hashlib
import http.server
import io
import re
import threading
import urllib.parse

import numpy as np
import pyarrow as pa
import pyarrow.csv as pcsv
import pyarrow.ipc as pipc
import pyarrow.parquet as pq
import pytest

from sketchmerge import sources as S
from sketchmerge.errors import InputError, NoInputError

from test_sources import crates, reference, read_all, same

SECRET = "testing-secret"   # the fake secret of the s3_options fixture


def parquet_bytes(table: pa.Table, **kw) -> bytes:
    buf = io.BytesIO()
    pq.write_table(table, buf, **kw)
    return buf.getvalue()


@pytest.fixture
def s3(s3_options, s3_bucket):
    fs = S.filesystem("s3", s3_options)
    return fs, s3_bucket, s3_options


def assert_clean(*texts: str) -> None:
    for t in texts:
        assert SECRET not in t and "testing-key" not in t, t


def test_s3_hive_dataset_reads_like_pyarrow(s3):
    fs, bucket, opts = s3
    days = ["2026-11-29", "2026-11-30"]
    tables = {d: crates(250, seed=i) for i, d in enumerate(days)}
    for d, t in tables.items():
        fs.pipe(f"{bucket}/packing/day={d}/part-0.parquet", parquet_bytes(t, row_group_size=50))
    fs.pipe(f"{bucket}/packing/_SUCCESS", b"")
    fs.pipe(f"{bucket}/packing/.spark-staging/x.parquet", b"junk")
    text = b"sugar_brix,weight_g\n10.5,900\n,1200\n"
    fs.pipe(f"{bucket}/packing/day=2026-12-01/late.csv", text)
    ds = S.open_dataset(f"s3://{bucket}/packing", storage_options=opts, byte_budget=1)
    assert ds.protocol == "s3" and ds.root == f"{bucket}/packing"
    assert ds.partition_columns == ("day",)
    assert len(ds.files) == 3 and len(ds.units) == 11   # 5 + 5 row groups + 1 CSV
    assert_clean(repr(ds), *map(repr, ds.units), *(u.address for u in ds.units))
    feats, _ = S.select_features(ds)
    assert feats == ["sugar_brix", "weight_g", "bruise_count", "is_organic"]
    got = read_all(ds, ["sugar_brix", "weight_g"], storage_options=opts)
    ref_csv = pcsv.read_csv(io.BytesIO(text))
    for c in ("sugar_brix", "weight_g"):
        expect = np.concatenate([reference(tables[d], c) for d in days] + [reference(ref_csv, c)])
        assert same(got[c], expect), c


def _fixed_width(seed: int) -> bytes:
    """Plain, uncompressed float64 values: two seeds give files of one size."""
    vals = np.random.default_rng(seed).normal(12.0, 2.0, 64)
    return parquet_bytes(pa.table({"sugar_brix": vals}), compression="none",
                         use_dictionary=False, write_statistics=False)


def test_s3_tokens_agree_across_listing_calls_and_change_on_rewrite(s3):
    fs, bucket, opts = s3
    data = _fixed_width(1)
    key = f"{bucket}/ds/day=1/a.parquet"
    fs.pipe(key, data)
    fs.pipe(f"{bucket}/ds/day=2/b.parquet", _fixed_width(2))
    expect = "etag:" + hashlib.md5(data).hexdigest()   # single-part upload ETag (common practice)
    listings = {}
    fs.invalidate_cache()
    listings["find"] = fs.find(f"{bucket}/ds", detail=True)[key]
    fs.invalidate_cache()
    listings["ls"] = next(e for e in fs.ls(f"{bucket}/ds/day=1", detail=True) if e["name"] == key)
    fs.invalidate_cache()
    listings["info"] = fs.info(key)
    fs.invalidate_cache()
    listings["glob"] = fs.glob(f"{bucket}/ds/*/a.parquet", detail=True)[key]
    assert {k: S.version_token(v) for k, v in listings.items()} == dict.fromkeys(listings, expect)

    by_folder = S.open_dataset(f"s3://{bucket}/ds", storage_options=opts)
    by_glob = S.open_dataset(f"s3://{bucket}/ds/day=*/*.parquet", storage_options=opts)
    assert [(u.address, u.fingerprint) for u in by_folder.units] == \
           [(u.address, u.fingerprint) for u in by_glob.units]

    # same size, different bytes: the ETag, hence the fingerprint, changes
    rewritten = _fixed_width(3)
    assert len(rewritten) == len(data) and rewritten != data
    fs.pipe(key, rewritten)
    after = S.open_dataset(f"s3://{bucket}/ds", storage_options=opts)
    a0, b0 = by_folder.units[0], after.units[0]
    assert a0.address == b0.address and a0.fingerprint != b0.fingerprint
    with pytest.raises(InputError, match="changed since") as ei:
        S.read_unit(a0, ["sugar_brix"], protocol="s3", storage_options=opts)
    assert_clean(str(ei.value))
    arrays, _, _ = S.read_unit(b0, ["sugar_brix"], protocol="s3", storage_options=opts)
    assert same(arrays["sugar_brix"], reference(pq.read_table(io.BytesIO(rewritten)), "sugar_brix"))


def test_s3_missing_and_empty_sources(s3):
    fs, bucket, opts = s3
    fs.pipe(f"{bucket}/run/_SUCCESS", b"")
    fs.pipe(f"{bucket}/run/_temporary/0/part-0.parquet", parquet_bytes(crates(3)))
    for src in (f"s3://{bucket}/run", f"s3://{bucket}/nothing-here",
                f"s3://{bucket}-absent-bucket/ds", f"s3://{bucket}/run/*.parquet"):
        with pytest.raises(NoInputError) as ei:
            S.open_dataset(src, storage_options=opts)
        assert src in str(ei.value)
        assert_clean(str(ei.value))


def test_s3_corrupt_footer_and_deleted_object(s3):
    fs, bucket, opts = s3
    data = parquet_bytes(crates(100))
    # footer length field (4 bytes before the trailing magic) pointing past the start
    fs.pipe(f"{bucket}/bad/a.parquet", data[:-8] + (10 * len(data)).to_bytes(4, "little") + b"PAR1")
    with pytest.raises(InputError, match="a.parquet") as ei:
        S.open_dataset(f"s3://{bucket}/bad", storage_options=opts)
    assert_clean(str(ei.value))
    fs.pipe(f"{bucket}/gone/a.parquet", data)
    ds = S.open_dataset(f"s3://{bucket}/gone", storage_options=opts)
    fs.rm(f"{bucket}/gone/a.parquet")
    with pytest.raises(NoInputError, match="a.parquet") as ei:
        S.read_unit(ds.units[0], ["weight_g"], protocol="s3", storage_options=opts)
    assert_clean(str(ei.value))


def test_s3_arrow_ipc_units(s3):
    fs, bucket, opts = s3
    t = crates(600, seed=8)
    sink = io.BytesIO()
    with pipc.new_file(sink, t.schema) as w:
        for b in t.to_batches(max_chunksize=100):
            w.write_batch(b)
    fs.pipe(f"{bucket}/ipc/crates.feather", sink.getvalue())
    ds = S.open_dataset(f"s3://{bucket}/ipc", storage_options=opts, byte_budget=1)
    assert [u.address for u in ds.units] == [f"crates.feather#batch={i}-{i}" for i in range(6)]
    got = read_all(ds, ["sugar_brix", "is_organic"], storage_options=opts)
    for c in ("sugar_brix", "is_organic"):
        assert same(got[c], reference(t, c)), c


# --------------------------------------------------------------------------- HTTP with credentials in the URL

class _RangeHandler(http.server.BaseHTTPRequestHandler):
    """Serves ``server.files`` with HEAD, GET and single byte ranges; records requests."""

    def do_HEAD(self):
        self._serve(body=False)

    def do_GET(self):
        self._serve(body=True)

    def _serve(self, body: bool):
        self.server.seen.append(self.path)
        data = self.server.files.get(urllib.parse.urlsplit(self.path).path)
        if data is None:
            self.send_response(404)
            self.send_header("Content-Length", "0")
            self.end_headers()
            return
        m = re.match(r"bytes=(\d+)-(\d*)$", self.headers.get("Range", ""))
        if m:
            start = int(m[1])
            end = min(int(m[2]) if m[2] else len(data) - 1, len(data) - 1)
            chunk = data[start:end + 1]
            self.send_response(206)
            self.send_header("Content-Range", f"bytes {start}-{end}/{len(data)}")
        else:
            chunk = data
            self.send_response(200)
        self.send_header("Content-Length", str(len(chunk)))
        self.send_header("Accept-Ranges", "bytes")
        self.send_header("ETag", '"' + hashlib.md5(data).hexdigest().upper() + '"')
        self.end_headers()
        if body:
            self.wfile.write(chunk)

    def log_message(self, *args):
        pass


@pytest.fixture
def http_server():
    pytest.importorskip("aiohttp")
    srv = http.server.ThreadingHTTPServer(("127.0.0.1", 0), _RangeHandler)
    srv.files, srv.seen = {}, []
    th = threading.Thread(target=srv.serve_forever, daemon=True)
    th.start()
    yield srv
    srv.shutdown()
    srv.server_close()


def test_signed_http_url_never_leaks(http_server):
    fake = "FAKEsig0123456789abcdef"
    cred = "AKFAKEFAKE/20261130/us-east-1/s3/aws4_request"
    t = crates(120, seed=21)
    data = parquet_bytes(t, row_group_size=40)
    http_server.files["/exports/crates.parquet"] = data
    host, port = http_server.server_address[:2]
    url = (f"http://packer:pw-{fake}@{host}:{port}/exports/crates.parquet?"
           f"X-Amz-Credential={urllib.parse.quote(cred, safe='')}&X-Amz-Signature={fake}")
    ds = S.open_dataset(url, byte_budget=1)
    texts = [repr(ds), ds.source, ds.root, *map(repr, ds.units), *(u.address for u in ds.units),
             *(u.fingerprint for u in ds.units), str(S.select_features(ds))]
    for text in texts:
        assert fake not in text and "AKFAKE" not in text and "pw-" not in text, text
    assert [u.address for u in ds.units] == [f"crates.parquet#rg={i}-{i}" for i in range(3)]
    assert ds.units[0].fingerprint != ds.units[1].fingerprint
    arrays = {}
    for u in ds.units:
        a, _, _ = S.read_unit(u, ["weight_g"], protocol=ds.protocol)
        arrays[u.parts[0]] = a["weight_g"]
    assert same(np.concatenate([arrays[i] for i in range(3)]), reference(t, "weight_g"))
    # the signed query reached the server (the worker opened the real URL)
    assert any(fake in p for p in http_server.seen)

    missing = url.replace("crates.parquet", "absent.parquet")
    with pytest.raises(NoInputError) as ei:
        S.open_dataset(missing)
    assert fake not in str(ei.value) and "AKFAKE" not in str(ei.value)
    assert ei.value.__cause__ is None or fake not in str(ei.value.__cause__)
