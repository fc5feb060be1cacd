"""Tests of the table store (sketchmerge/store.py) on a local directory, memory:// and
the moto S3 server: publish/read/pin, manifests, the forward-only pointer, document
checks, blobs, key validation, gc and its grace period, leftovers, a writer that
dies at every step of a publish, redaction and storage-error translation."""

from __future__ import annotations

import hashlib
import os
import socket
import threading
import time

import msgpack
import pytest
from hypothesis import given
from hypothesis import strategies as st

import sketchmerge
from sketchmerge import store as store_mod
from sketchmerge.store import (
    MANIFEST_KIND,
    POINTER_KIND,
    TableStore,
    check_blob_key,
    decode_manifest,
    decode_pointer,
    encode_manifest,
    encode_pointer,
    redact_url,
)

KINDS = ["local", "memory", "s3"]


def key(i: int, suffix: str = "") -> str:
    """A valid 16-hex-digit blob key."""
    return f"{i:016x}" + (f".{suffix}" if suffix else "")


def doc(v: int, tag: str = "") -> bytes:
    """A stand-in cut-table document that names its own version (the build's real
    documents also record their version; the store never looks inside)."""
    return f"cut-table v={v} {tag}".encode() + bytes(range(256)) * 4


@pytest.fixture(params=KINDS)
def kind(request):
    return request.param


@pytest.fixture
def make(kind, tmp_path, request):
    """make(name="t", **kw) -> a TableStore on a fresh table of the parametrised kind;
    calling it twice with one name gives two stores on the same table."""
    if kind == "local":
        def factory(name="t", **kw):
            return TableStore(str(tmp_path / name), **kw)
    elif kind == "memory":
        memfs = request.getfixturevalue("memfs")
        assert memfs is not None

        def factory(name="t", **kw):
            return TableStore(f"memory://tables/{name}", **kw)
    else:
        options = request.getfixturevalue("s3_options")
        bucket = request.getfixturevalue("s3_bucket")

        def factory(name="t", **kw):
            return TableStore(f"s3://{bucket}/tables/{name}", storage_options=options, **kw)
    return factory


def raw_names(store: TableStore, folder: str) -> set[str]:
    """Object names under one folder of the table, straight from the backend listing."""
    return {e.name for e in store._b.list(folder)}


# ----------------------------------------------------------------------------- publish / read / pin


def test_empty_table_reports_nothing_published(make):
    s = make()
    assert s.current() is None
    assert s.versions() == []
    with pytest.raises(FileNotFoundError) as info:
        s.read_version()
    assert isinstance(info.value, sketchmerge.NoInputError)
    assert s.url in str(info.value)


def test_publish_read_and_pin(make):
    s = make()
    for v in (1, 2, 3):
        s.publish(v, doc(v), [key(v)])
    assert s.versions() == [1, 2, 3]
    assert s.current() == 3
    assert s.read_version() == (3, doc(3))
    assert s.read_version(1) == (1, doc(1))      # a pinned version stays readable
    other = make()                                # a second reader on the same table
    assert other.read_version(2) == (2, doc(2))
    with pytest.raises(sketchmerge.NoInputError, match="version 7") as info:
        s.read_version(7)
    assert isinstance(info.value, FileNotFoundError) and s.url in str(info.value)


def test_manifest_round_trip_sorted_unique(make):
    s = make()
    keys = [key(9, "node"), key(3), key(9, "node"), key(1), key(2, "summary")]
    s.publish(1, doc(1), keys)
    assert make().manifest(1) == sorted(set(keys))
    s.publish(2, doc(2), [])
    assert s.manifest(2) == []
    with pytest.raises(sketchmerge.NoInputError, match="version 5"):
        s.manifest(5)


def test_recorded_checksum_matches_published_test_vector(make):
    # FIPS 180-2, Appendix B.1: SHA-256("abc")
    abc = "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    s = make()
    s.publish(1, b"abc", [key(1)])
    pointer = decode_pointer(s._b.read("CURRENT"))
    manifest = decode_manifest(s._b.read("versions/v00000001.keys"))
    assert pointer.version == 1 and pointer.document_sha256 == abc
    assert manifest.document_sha256 == abc and manifest.document_size == 3


def test_publish_rejects_a_taken_version_and_gaps(make):
    s = make()
    s.publish(1, doc(1), [])
    s.publish(2, doc(2), [])
    with pytest.raises(FileExistsError) as info:
        make().publish(2, doc(2, "another builder"), [])
    err = info.value
    assert isinstance(err, sketchmerge.PublishRaceError)
    assert "version 2" in str(err) and s.url in str(err)
    assert s.read_version(2) == (2, doc(2))       # the published version is untouched
    with pytest.raises(ValueError, match="expected version 3"):
        s.publish(5, doc(5), [])                   # would leave a gap
    s.publish(2, doc(2), [])                       # same bytes again: a retried publish that had won
    assert s.versions() == [1, 2]


def test_publish_cannot_recreate_a_collected_version(make):
    s = make()
    for v in (1, 2, 3):
        s.publish(v, doc(v), [])
    s.gc(keep=1, grace_seconds=0)
    assert s.versions() == [3]
    with pytest.raises(sketchmerge.PublishRaceError):
        s.publish(1, doc(1, "rewritten history"), [])
    assert s.versions() == [3]


def test_pointer_never_moves_backward(make):
    s = make()
    for v in (1, 2, 3):
        s.publish(v, doc(v), [])
    s._advance_pointer(2, doc(2))                  # a slow writer of version 2 finishing late
    assert decode_pointer(s._b.read("CURRENT")).version == 3
    s.publish(4, doc(4), [])
    assert decode_pointer(s._b.read("CURRENT")).version == 4


def test_readers_see_past_a_lagging_or_missing_pointer(make):
    s = make()
    for v in (1, 2, 3):
        s.publish(v, doc(v), [])
    # as if the pointer write of versions 2 and 3 lost a race or their writers died
    s._b.write("CURRENT", encode_pointer(1, hashlib.sha256(doc(1)).hexdigest()))
    assert s.current() == 3
    assert s.read_version() == (3, doc(3))
    s._b.delete(["CURRENT"])
    assert s.current() == 3 and s.read_version() == (3, doc(3))
    s.publish(4, doc(4), [])                       # and the next publish restores it
    assert decode_pointer(s._b.read("CURRENT")).version == 4


# ----------------------------------------------------------------------------- document checks


def test_bad_pointer_bytes_raise_format_error_naming_it(make):
    s = make()
    s.publish(1, doc(1), [])
    good = s._b.read("CURRENT")
    for bad in (good[:-3], good[:10] + bytes([good[10] ^ 0xFF]) + good[11:], b"", b"\xc1garbage"):
        s._b.write("CURRENT", bad)
        with pytest.raises(sketchmerge.FormatError, match="CURRENT"):
            s.current()


def test_bad_manifest_bytes_raise_format_error_naming_it(make):
    s = make()
    s.publish(1, doc(1), [key(1)])
    good = s._b.read("versions/v00000001.keys")
    s._b.write("versions/v00000001.keys", good[:-1])
    with pytest.raises(sketchmerge.FormatError, match="v00000001.keys"):
        s.manifest(1)


def test_document_tampered_under_the_pointer_is_detected(make):
    s = make()
    s.publish(1, doc(1), [])
    s._b.write("versions/v00000001.cuts", doc(1, "edited in place"))
    with pytest.raises(sketchmerge.FormatError, match="v00000001.cuts"):
        s.read_version()


def _envelope(**fields):
    payload = msgpack.packb({"version": 1, "document_sha256": "0" * 64, "updated": 1.0}, use_bin_type=True)
    env = {"kind": POINTER_KIND, "format": 1, "payload": payload, "sha256": hashlib.sha256(payload).hexdigest()}
    env.update(fields)
    return msgpack.packb(env, use_bin_type=True)


def test_pointer_layout_decodes_with_plain_msgpack():
    # the layout written down in docs/STORE.md, read back with the msgpack library alone
    data = encode_pointer(7, "ab" * 32, updated=123.5)
    env = msgpack.unpackb(data, raw=False)
    assert env["kind"] == "sketchmerge.table-pointer" and env["format"] == 1
    assert env["sha256"] == hashlib.sha256(env["payload"]).hexdigest()
    assert msgpack.unpackb(env["payload"], raw=False) == {"version": 7, "document_sha256": "ab" * 32,
                                                           "updated": 123.5}
    assert decode_pointer(_envelope()).version == 1


@pytest.mark.parametrize("fields, message", [
    ({"kind": MANIFEST_KIND}, "expected kind"),
    ({"format": 2}, "newer"),
    ({"sha256": "0" * 64}, "sha256"),
    ({"extra": 1}, "expected a map with keys"),
    ({"payload": "text"}, "payload bytes"),
])
def test_pointer_checks_kind_version_checksum_and_fields(fields, message):
    with pytest.raises(sketchmerge.FormatError, match=message):
        decode_pointer(_envelope(**fields), "tables/t/CURRENT")


def test_manifest_checks_its_keys():
    data = encode_manifest(3, "00112233aabbccdd", b"doc", [key(2), key(1)], created=5.0)
    m = decode_manifest(data)
    assert (m.version, m.attempt, m.keys) == (3, "00112233aabbccdd", (key(1), key(2)))
    env = msgpack.unpackb(data, raw=False)
    body = msgpack.unpackb(env["payload"], raw=False)
    for keys in (["../escape"], [key(2), key(1)], [key(1), key(1)]):
        payload = msgpack.packb({**body, "keys": keys}, use_bin_type=True)
        bad = msgpack.packb({**env, "payload": payload, "sha256": hashlib.sha256(payload).hexdigest()},
                            use_bin_type=True)
        with pytest.raises(sketchmerge.FormatError, match="m.keys"):
            decode_manifest(bad, "m.keys")


# ----------------------------------------------------------------------------- blobs


def test_blobs_put_get_list(make):
    s = make()
    assert s.get_blob(key(1)) is None
    assert s.existing_blobs() == set()
    blobs = {key(i, "summary" if i % 2 else ""): os.urandom(100 + i) for i in range(6)}
    for k, v in blobs.items():
        s.put_blob(k, v)
    s.put_blob(key(0), blobs[key(0)])             # idempotent
    assert s.get_blob(key(3, "summary")) == blobs[key(3, "summary")]
    wanted = list(blobs) + [key(99)]
    assert s.get_blobs(wanted) == blobs           # the missing key is absent
    assert s.existing_blobs() == set(blobs)
    assert s.existing_blobs([key(0), key(99)]) == {key(0)}


@pytest.mark.parametrize("bad", ["../x", "/abs", "a/b", "", "..", "0123456789abcdef/../x",
                                 "0123456789ABCDEF", "0123456789abcde", "0" * 65, "0123456789abcdef.",
                                 "0123456789abcdef.TXT", "0123456789abcdef\n", "0123456789abcdef.a/b",
                                 "C:\\0123456789abcdef", None, 123])
def test_bad_blob_keys_are_rejected(make, bad):
    s = make()
    for call in (lambda: s.put_blob(bad, b"x"), lambda: s.get_blob(bad), lambda: s.get_blobs([key(1), bad]),
                 lambda: s.existing_blobs([bad]), lambda: s.publish(1, doc(1), [key(1), bad])):
        with pytest.raises(ValueError, match="blob key"):
            call()
    assert s.versions() == [] and s.existing_blobs() == set()


@pytest.mark.parametrize("bad", ["../1", "1/../2", "/1", 0, -1, 1.5, True, 10**8, "3"])
def test_bad_version_numbers_are_rejected(make, bad):
    s = make()
    for call in (lambda: s.read_version(bad), lambda: s.manifest(bad), lambda: s.publish(bad, b"x", [])):
        with pytest.raises(ValueError, match="version"):
            call()


def test_nothing_is_written_outside_the_table(tmp_path):
    before = set(os.listdir(tmp_path))
    s = TableStore(str(tmp_path / "t"))
    for bad in ("../../evil", "/abs/evil", "0123456789abcdef/../../evil"):
        with pytest.raises(ValueError):
            s.put_blob(bad, b"x")
    s.put_blob(key(1), b"x")
    s.publish(1, doc(1), [key(1)])
    assert set(os.listdir(tmp_path)) - before == {"t"}


@given(st.text(min_size=0, max_size=80))
def test_any_key_text_is_stored_under_blobs_or_rejected(text):
    import fsspec

    fs = fsspec.filesystem("memory")
    s = TableStore("memory://prop/t")
    before = set(fs.store)
    try:
        s.put_blob(text, b"x")
    except ValueError:
        assert set(fs.store) == before
        return
    assert set(fs.store) - before <= {f"/prop/t/blobs/{text}"}
    assert s.get_blob(text) == b"x"


def test_check_blob_key_returns_valid_keys():
    assert check_blob_key("a" * 64 + ".node") == "a" * 64 + ".node"


# ----------------------------------------------------------------------------- gc


def _populate(s: TableStore, n: int = 5):
    """Versions 1..n; version v needs blobs v and v+1 (shared with its neighbour)."""
    sizes = {}
    for v in range(1, n + 1):
        for i in (v, v + 1):
            data = bytes(10 * i)
            s.put_blob(key(i), data)
            sizes[key(i)] = len(data)
        s.publish(v, doc(v), [key(v), key(v + 1)])
    s.put_blob(key(500), bytes(7))                  # cached but never published
    sizes[key(500)] = 7
    return sizes


def test_gc_keeps_what_kept_versions_need(make):
    s = make()
    sizes = _populate(s)
    result = s.gc(keep=2, grace_seconds=0)
    assert s.versions() == [4, 5] and result["kept"] == [4, 5]
    assert s.existing_blobs() == {key(4), key(5), key(6)}
    gone = [key(1), key(2), key(3), key(500)]
    assert result["versions_removed"] == 3 and result["manifests_removed"] == 3
    assert result["blobs_removed"] == 4
    assert result["blob_bytes_removed"] == sum(sizes[k] for k in gone)
    assert result["bytes_removed"] > result["blob_bytes_removed"]
    assert s.read_version() == (5, doc(5)) and s.manifest(4) == [key(4), key(5)]
    assert raw_names(s, "versions") == {"v00000004.cuts", "v00000004.keys", "v00000005.cuts", "v00000005.keys"}


def test_gc_never_removes_the_current_version(make):
    s = make()
    _populate(s, 3)
    assert s.gc(keep=1, grace_seconds=0)["kept"] == [3]
    assert s.current() == 3 and s.read_version() == (3, doc(3))
    with pytest.raises(ValueError, match="keep"):
        s.gc(keep=0)


def test_gc_grace_period_protects_young_blobs(make):
    s = make()
    _populate(s)
    result = s.gc(keep=1, grace_seconds=3600)       # every blob is seconds old
    assert result["blobs_removed"] == 0 and s.versions() == [5]
    assert s.existing_blobs() == {key(i) for i in range(1, 7)} | {key(500)}
    result = s.gc(keep=1, grace_seconds=0)
    assert s.existing_blobs() == {key(5), key(6)} and result["blobs_removed"] == 5


def _age(path: str, seconds: float) -> None:
    t = time.time() - seconds
    os.utime(path, (t, t))


def test_gc_default_grace_on_aged_blobs_and_inflight_manifests(tmp_path):
    root = tmp_path / "t"
    s = TableStore(str(root))
    _populate(s, 3)
    for i in (1, 2, 500, 600, 601):
        if i >= 600:
            s.put_blob(key(i), b"in flight")
        _age(str(root / "blobs" / key(i)), 7 * 3600)
    # a build that is publishing version 4 right now: its attempt manifest is young
    (root / "versions" / "v00000004.00000000000000aa.keys").write_bytes(
        encode_manifest(4, "00000000000000aa", doc(4), [key(600), key(601)]))
    s.put_blob(key(700), b"fresh, unreferenced")
    result = s.gc(keep=1)
    assert s.existing_blobs() == {key(3), key(4), key(600), key(601), key(700)}
    assert result["blobs_removed"] == 3           # 1, 2 and 500: old and unneeded
    _age(str(root / "versions" / "v00000004.00000000000000aa.keys"), 7 * 3600)
    result = s.gc(keep=1)                         # the build died long ago: its blobs go, and its manifest
    assert s.existing_blobs() == {key(3), key(4), key(700)}
    assert result["leftovers_removed"] == 1
    assert raw_names(s, "versions") == {"v00000003.cuts", "v00000003.keys"}


# ----------------------------------------------------------------------------- leftovers


def test_clean_leftovers_on_local_disk(tmp_path):
    root = tmp_path / "t"
    s = TableStore(str(root))
    s.publish(1, doc(1), [key(1)])
    (root / "tmp").mkdir(exist_ok=True)
    for name, age in (("old-a.tmp", 7200), ("old-b.tmp", 7200), ("young.tmp", 0)):
        (root / "tmp" / name).write_bytes(b"partial")
        _age(str(root / "tmp" / name), age)
    versions = root / "versions"
    # an orphan attempt manifest (its writer died before the commit), old and young
    for token, age in (("0000000000000001", 7200), ("0000000000000002", 0)):
        p = versions / f"v00000002.{token}.keys"
        p.write_bytes(encode_manifest(2, token, doc(2), [key(2)]))
        _age(str(p), age)
    # version 2 committed, but its writer died before promoting the manifest
    s._b.create("versions/v00000002.cuts", doc(2, "won"))
    p = versions / "v00000002.00000000000000ff.keys"
    p.write_bytes(encode_manifest(2, "00000000000000ff", doc(2, "won"), [key(7), key(8)]))
    _age(str(p), 7200)
    assert s.manifest(2) == [key(7), key(8)]      # found through the attempt that matches the document
    removed = s.clean_leftovers()
    assert removed == 4                           # two tmp files, the old orphan, the promoted attempt
    assert sorted(os.listdir(root / "tmp")) == ["young.tmp"]
    assert sorted(os.listdir(versions)) == ["v00000001.cuts", "v00000001.keys", "v00000002.0000000000000002.keys",
                                            "v00000002.cuts", "v00000002.keys"]
    assert s.manifest(2) == [key(7), key(8)] and s.current() == 2
    assert s.clean_leftovers(older_than_seconds=0) == 2   # young leftovers go when asked
    assert sorted(os.listdir(versions)) == ["v00000001.cuts", "v00000001.keys", "v00000002.cuts", "v00000002.keys"]


class _Crash(BaseException):
    """Stands for the process dying: not an Exception, so nothing in the store catches it."""


def _crashing(store: TableStore, at: int):
    """Make the store's backend 'die' at its at-th mutating call; every later call dies too."""
    calls = {"n": 0, "dead": False}
    backend = store._b
    for name in ("write", "create", "replace_if", "delete"):
        original = getattr(backend, name)

        def wrapped(*args, _original=original):
            calls["n"] += 1
            if calls["dead"] or calls["n"] == at:
                calls["dead"] = True
                raise _Crash()
            return _original(*args)

        setattr(backend, name, wrapped)
    return calls


def test_writer_dying_at_every_step_of_a_publish(make):
    probe = make("probe")
    probe.publish(1, doc(1), [key(1)])
    steps = _crashing(probe, at=0)
    probe.publish(2, doc(2), [key(2)])
    total = steps["n"]
    assert total >= 4                              # manifest, document, canonical manifest, pointer ...
    for at in range(1, total + 1):
        name = f"crash{at}"
        writer = make(name)
        writer.publish(1, doc(1), [key(1)])
        _crashing(writer, at)
        with pytest.raises(_Crash):
            writer.publish(2, doc(2), [key(2)])
        reader = make(name)
        cur = reader.current()
        assert cur in (1, 2), at
        assert reader.versions() == list(range(1, cur + 1))
        assert reader.read_version() == (cur, doc(cur))
        assert reader.manifest(cur) == [key(cur)]
        reader.publish(cur + 1, doc(cur + 1), [key(cur + 1)])   # nothing blocks the next builder
        reader.clean_leftovers(older_than_seconds=0)
        assert not {n for n in raw_names(reader, "versions") if n.count(".") == 2}, at
        assert raw_names(reader, "tmp") == set()
        assert reader.manifest(cur) == [key(cur)] and reader.current() == cur + 1


def test_threads_racing_in_one_process(make, kind):
    if kind == "s3":
        pytest.skip("processes racing on S3 are covered in test_store_concurrency.py")
    make().publish(1, doc(1), [])
    wins: dict[int, str] = {}
    guard = threading.Lock()

    def worker(name: str):
        s = make()
        won = 0
        for _ in range(200):
            if won == 4:
                return
            v = s.current() + 1
            try:
                s.publish(v, doc(v, name), [key(v)])
            except sketchmerge.PublishRaceError:
                continue
            with guard:
                assert v not in wins
                wins[v] = name
            won += 1

    threads = [threading.Thread(target=worker, args=(f"w{i}",)) for i in range(3)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    s = make()
    assert sorted(wins) == list(range(2, 14))
    assert s.versions() == list(range(1, 14)) and s.current() == 13
    for v, name in wins.items():
        assert s.read_version(v) == (v, doc(v, name))


def test_fallback_mode_on_local_disk(tmp_path):
    s = TableStore(str(tmp_path / "t"), mode="fallback")
    assert s.mode == "fallback-verify"
    s.publish(1, doc(1), [key(1)])
    with pytest.raises(sketchmerge.PublishRaceError):
        TableStore(str(tmp_path / "t"), mode="fallback").publish(1, doc(1, "other"), [])
    assert TableStore(str(tmp_path / "t")).read_version() == (1, doc(1))


# ----------------------------------------------------------------------------- redaction


FAKE_KEY = "AKIDEXAMPLEFAKE0001"
FAKE_SECRET = "fake-secret-Zq9w8e7r6t"
FAKE_SIG = "fake-signature-4f4f4f"


def test_redact_url():
    assert redact_url(f"s3://{FAKE_KEY}:{FAKE_SECRET}@bkt/t?X-Sig={FAKE_SIG}#frag") == "s3://bkt/t"
    assert redact_url("memory://tables/t") == "memory://tables/t"


def test_credentials_never_shown_or_written(s3_options, s3_bucket):
    url = f"s3://{FAKE_KEY}:{FAKE_SECRET}@{s3_bucket}/tables/t?X-Amz-Signature={FAKE_SIG}"
    options = {"client_kwargs": s3_options["client_kwargs"]}
    s = TableStore(url, storage_options=options)
    other = TableStore(f"s3://{s3_bucket}/tables/t", storage_options={**s3_options, "secret": FAKE_SECRET})
    secrets_ = (FAKE_KEY, FAKE_SECRET, FAKE_SIG)
    assert s.url == f"s3://{s3_bucket}/tables/t"
    s.put_blob(key(1), b"b")
    s.publish(1, doc(1), [key(1)])
    messages = [repr(s), str(s.url), repr(other)]
    for call in (lambda: s.read_version(9), lambda: s.publish(1, doc(1, "x"), []), lambda: s.put_blob("../x", b""),
                 lambda: s.manifest(4), lambda: other.read_version(9)):
        with pytest.raises(Exception) as info:
            call()
        messages.append(str(info.value))
    for text in messages:
        for secret in secrets_:
            assert secret not in text, text
    import s3fs

    fs = s3fs.S3FileSystem(**s3_options)
    objects = fs.find(f"{s3_bucket}/tables/t")
    assert len(objects) >= 4
    for path, data in fs.cat(objects).items():
        for secret in secrets_:
            assert secret.encode() not in data, path


def _closed_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def test_unreachable_store_raises_storage_error_without_secrets():
    options = {"key": FAKE_KEY, "secret": FAKE_SECRET,
               "client_kwargs": {"endpoint_url": f"http://127.0.0.1:{_closed_port()}", "region_name": "us-east-1"},
               "config_kwargs": {"retries": {"max_attempts": 1}, "connect_timeout": 1}}
    pytest.importorskip("s3fs")
    s = TableStore("s3://unreachable/t", storage_options=options, retries=2, backoff_seconds=0.001)
    with pytest.raises(OSError) as info:
        s.current()
    err = info.value
    assert isinstance(err, sketchmerge.StorageError)
    assert "s3://unreachable/t/CURRENT" in str(err) and "after 3 attempts" in str(err)
    assert FAKE_SECRET not in str(err) and FAKE_KEY not in str(err) and FAKE_SECRET not in repr(s)


# ----------------------------------------------------------------------------- storage errors


def test_transient_failures_are_retried_then_translated(tmp_path):
    s = TableStore(str(tmp_path / "t"), retries=3, backoff_seconds=0.001)
    s.publish(1, doc(1), [])
    real_read = s._b.read
    calls = {"n": 0}

    def flaky(name, fail=2):
        calls["n"] += 1
        if calls["n"] <= fail:
            raise ConnectionResetError("connection reset by peer")
        return real_read(name)

    s._b.read = flaky
    assert s.read_version(1) == (1, doc(1)) and calls["n"] == 3
    s._b.read = lambda name: flaky(name, fail=10**6)
    with pytest.raises(sketchmerge.StorageError, match=r"v00000001.cuts.*after 4 attempts"):
        s.read_version(1)
    s._b.read = lambda name: (_ for _ in ()).throw(PermissionError(13, "denied"))
    with pytest.raises(sketchmerge.StorageError, match="PermissionError"):
        s.read_version(1)


def test_s3_error_classification():
    botocore = pytest.importorskip("botocore.exceptions")
    from s3fs.errors import translate_boto_error

    def client_error(code, status, condition=None):
        err = {"Code": code, "Message": "m"}
        if condition:
            err["Condition"] = condition
        return translate_boto_error(botocore.ClientError(
            {"Error": err, "ResponseMetadata": {"HTTPStatusCode": status}}, "PutObject"))

    # status codes and error codes from the S3 API error-response reference (from memory)
    assert store_mod._is_transient(client_error("SlowDown", 503))
    assert store_mod._is_transient(client_error("InternalError", 500))
    assert not store_mod._is_transient(client_error("AccessDenied", 403))
    assert not store_mod._is_transient(client_error("NoSuchKey", 404))
    assert store_mod._is_precondition(client_error("PreconditionFailed", 412, "If-Match"))
    assert isinstance(client_error("PreconditionFailed", 412, "If-None-Match"), FileExistsError)
    assert store_mod._is_transient(botocore.EndpointConnectionError(endpoint_url="http://127.0.0.1:1"))


def test_missing_bucket_is_named(s3_options):
    s = TableStore("s3://no-such-bucket-here/t", storage_options=s3_options)
    with pytest.raises(sketchmerge.NoInputError, match="s3://no-such-bucket-here/t"):
        s.current()
    with pytest.raises(sketchmerge.NoInputError, match="s3://no-such-bucket-here/t"):
        s.put_blob(key(1), b"x")


def test_store_is_public_through_the_module_only():
    # the store is imported by the build and the loader from sketchmerge.store
    assert "TableStore" in store_mod.__all__ and store_mod.__all__ == sorted(store_mod.__all__)


def test_storage_messages_are_scrubbed_of_secrets(tmp_path):
    # an underlying library may quote a credential in its own message; ours never passes it on
    s = TableStore(str(tmp_path / "t"), storage_options=None, retries=1, backoff_seconds=0.001)
    s._hidden = (FAKE_SECRET,)
    s._b.read = lambda name: (_ for _ in ()).throw(ConnectionError(f"auth {FAKE_SECRET} rejected"))
    with pytest.raises(sketchmerge.StorageError) as info:
        s.read_version(1)
    assert FAKE_SECRET not in str(info.value) and "***" in str(info.value)


class _OverwritingRacer:
    """An S3 client whose store honours If-None-Match only loosely: right after our
    create lands, another builder's unconditional PUT of the same name lands too
    (the check-then-write window of a store without atomic conditional writes)."""

    def __init__(self, fs, bucket, key_name, their_bytes):
        self._fs, self._bucket, self._key, self._theirs = fs, bucket, key_name, their_bytes

    def __getattr__(self, name):
        return getattr(self._fs, name)

    def call_s3(self, method, **kwargs):
        out = self._fs.call_s3(method, **kwargs)
        if method == "put_object" and kwargs.get("Key") == self._key and "IfNoneMatch" in kwargs:
            self._fs.call_s3("put_object", Bucket=self._bucket, Key=self._key, Body=self._theirs)
        return out


def test_s3_create_detects_a_store_that_lost_the_race_silently(s3_options, s3_bucket):
    s = TableStore(f"s3://{s3_bucket}/t", storage_options=s3_options)
    theirs = doc(1, "the other builder")
    s._b.fs = _OverwritingRacer(s._b.fs, s3_bucket, "t/versions/v00000001.cuts", theirs)
    with pytest.raises(sketchmerge.PublishRaceError):
        s.publish(1, doc(1), [key(1)])
    reader = TableStore(f"s3://{s3_bucket}/t", storage_options=s3_options)
    assert reader.read_version(1) == (1, theirs)
    assert not {e.name for e in reader._b.list("versions") if e.name.count(".") == 2}  # our attempt withdrawn
