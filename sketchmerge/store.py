"""Table store: immutable versions of a cut table, a forward-only pointer, cached blobs.

One TABLE URL (a local directory, ``s3://bucket/prefix`` or any fsspec URL)
holds every published version of one dataset's cut table, the manifest of
blob keys each version needs, a small pointer to the current version, and the
per-unit summary and merge-node blobs the nightly refresh reuses.  The layout,
the commit protocol of each kind of store, the fallback for stores without
conditional writes and what a killed writer leaves behind are specified in
``docs/STORE.md``; keep this module and that document in step.

The commit point of a publish is the create-only write of the version
document ``versions/vNNNNNNNN.cuts``: once that object is visible the version
exists, complete, for every reader.  Everything else (the canonical manifest,
the pointer) is derived state that readers and :meth:`TableStore.clean_leftovers`
can rebuild, so a writer killed at any moment never leaves a table that reads
wrong.

Examples
--------
>>> import tempfile, os
>>> store = TableStore(os.path.join(tempfile.mkdtemp(), "table"))
>>> store.current() is None
True
>>> store.put_blob("0123456789abcdef", b"summary bytes")
>>> store.publish(1, b"cut table v1", ["0123456789abcdef"])
>>> store.read_version()
(1, b'cut table v1')
>>> store.manifest(1)
['0123456789abcdef']
"""

from __future__ import annotations

import asyncio
import contextlib
import errno
import hashlib
import math
import os
import random
import re
import secrets
import threading
import time
import urllib.parse
from dataclasses import dataclass

import msgpack

from .errors import FormatError, InputError, NoInputError, PublishRaceError, SketchmergeError, StorageError

__all__ = [
    "MANIFEST_KIND",
    "POINTER_KIND",
    "STORE_FORMAT_VERSION",
    "TableStore",
    "check_blob_key",
    "decode_manifest",
    "decode_pointer",
    "encode_manifest",
    "encode_pointer",
    "redact_url",
]

STORE_FORMAT_VERSION = 1
POINTER_KIND = "sketchmerge.table-pointer"
MANIFEST_KIND = "sketchmerge.table-manifest"

#: object names inside TABLE (docs/STORE.md, "Layout")
POINTER_NAME = "CURRENT"
LOCK_NAME = "CURRENT.lock"
VERSIONS_DIR = "versions"
BLOBS_DIR = "blobs"
TMP_DIR = "tmp"

MAX_VERSION = 99_999_999  # eight digits keep names sortable as text
_MAX_KEYS = 1 << 24
_KEY_PATTERN = r"[0-9a-f]{16,64}(?:\.[a-z]{1,16})?"
_KEY_RE = re.compile(_KEY_PATTERN)
# all keys of a manifest are checked in one regex pass over the joined text
# instead of one match per key; "\n" cannot occur inside a valid key
_KEYS_RE = re.compile(rf"(?:{_KEY_PATTERN}\n)*")
_DOC_RE = re.compile(r"v(\d{8})\.cuts")
_CANONICAL_RE = re.compile(r"v(\d{8})\.keys")
_ATTEMPT_RE = re.compile(r"v(\d{8})\.([0-9a-f]{16})\.keys")
_HEX64_RE = re.compile(r"[0-9a-f]{64}")
_TOKEN_RE = re.compile(r"[0-9a-f]{16}")

# names of exception classes (anywhere in the MRO) that mean "the network or
# the service hiccuped": botocore, aiohttp and fsspec spell these differently
# and importing them all just to classify would make s3fs a hard dependency
_TRANSIENT_NAMES = frozenset({
    "EndpointConnectionError", "ConnectionClosedError", "ReadTimeoutError", "ConnectTimeoutError",
    "HTTPClientError", "ClientConnectorError", "ServerDisconnectedError", "ClientOSError",
    "ClientPayloadError", "IncompleteRead", "ResponseParserError", "FSTimeoutError", "ProxyConnectionError",
})
_TRANSIENT_ERRNOS = frozenset({
    errno.EBUSY, errno.ETIMEDOUT, errno.ECONNRESET, errno.ECONNREFUSED, errno.ECONNABORTED,
    errno.EAGAIN, errno.EHOSTUNREACH, errno.ENETUNREACH, errno.ENETDOWN, errno.EPIPE,
    getattr(errno, "EREMOTEIO", 121),
})
_TRANSIENT_S3_CODES = frozenset({
    "InternalError", "ServiceUnavailable", "SlowDown", "RequestTimeout", "OperationAborted",
    "ConditionalRequestConflict", "RequestTimeTooSkewed", "503", "500",
})
_SECRET_WORDS = ("secret", "password", "passwd", "token", "key", "credential", "signature", "sig", "auth")


# ----------------------------------------------------------------------------- validation


def check_blob_key(key) -> str:
    """Return ``key`` if it is a valid blob key, else raise :class:`InputError`.

    A key is 16 to 64 lower-case hexadecimal digits with an optional
    ``.suffix`` of 1 to 16 lower-case letters, so a key can never name a path
    outside ``TABLE/blobs/`` (no ``/``, ``..``, drive letters or odd characters).

    Examples
    --------
    >>> check_blob_key("00ff00ff00ff00ff.node")
    '00ff00ff00ff00ff.node'
    """
    if not isinstance(key, str) or _KEY_RE.fullmatch(key) is None:
        raise InputError(f"blob key: expected 16-64 lower-case hex digits with an optional "
                         f".suffix of lower-case letters, got {_short(key)}")
    return key


def _check_keys(keys, what: str = "blob keys") -> list[str]:
    """Validate many keys in one pass; return them sorted and unique."""
    if isinstance(keys, (str, bytes)) or keys is None:
        raise InputError(f"{what}: expected a list of key strings, got {type(keys).__name__}")
    keys = list(keys)
    if len(keys) > _MAX_KEYS:
        raise InputError(f"{what}: expected at most {_MAX_KEYS} keys, got {len(keys)}")
    if not all(isinstance(k, str) for k in keys):
        bad = next(k for k in keys if not isinstance(k, str))
        raise InputError(f"{what}: expected key strings, got {_short(bad)}")
    if keys and _KEYS_RE.fullmatch("\n".join(keys) + "\n") is None:
        for k in keys:  # error path only: find the offender for the message
            check_blob_key(k)
    return sorted(set(keys))


def _check_version(version) -> int:
    """Return ``version`` as an int in 1..MAX_VERSION, else raise :class:`InputError`."""
    if isinstance(version, bool) or not hasattr(version, "__index__"):
        raise InputError(f"version: expected an integer 1..{MAX_VERSION}, got {_short(version)}")
    v = int(version.__index__())
    if not 1 <= v <= MAX_VERSION:
        raise InputError(f"version: expected an integer 1..{MAX_VERSION}, got {v}")
    return v


def _short(value, limit: int = 80) -> str:
    text = repr(value)
    return text if len(text) <= limit else text[:limit] + "...'"


def _doc_name(v: int) -> str:
    return f"{VERSIONS_DIR}/v{v:08d}.cuts"


def _canonical_name(v: int) -> str:
    return f"{VERSIONS_DIR}/v{v:08d}.keys"


def _attempt_name(v: int, token: str) -> str:
    return f"{VERSIONS_DIR}/v{v:08d}.{token}.keys"


# ----------------------------------------------------------------------------- documents


def _pack(obj) -> bytes:
    return msgpack.packb(obj, use_bin_type=True)


def _unpack(data: bytes, what: str, *, max_str: int, max_binary: int, max_array: int, max_map: int):
    try:
        return msgpack.unpackb(data, raw=False, strict_map_key=True, use_list=True,
                               max_str_len=max_str, max_bin_len=max_binary, max_array_len=max_array,
                               max_map_len=max_map, max_ext_len=0)
    except Exception as e:  # msgpack raises several types; all mean malformed bytes
        raise FormatError(f"{what}: expected a msgpack document, got malformed bytes "
                          f"({type(e).__name__}: {e})") from e


def _encode_envelope(kind: str, payload_obj: dict) -> bytes:
    payload = _pack(payload_obj)
    return _pack({"kind": kind, "format": STORE_FORMAT_VERSION, "payload": payload,
                  "sha256": hashlib.sha256(payload).hexdigest()})


def _decode_envelope(data, kind: str, what: str, *, max_array: int) -> dict:
    """Check kind, format version and checksum of a store document; return its payload map."""
    if not isinstance(data, (bytes, bytearray, memoryview)):
        raise FormatError(f"{what}: expected bytes, got {type(data).__name__}")
    data = bytes(data)
    env = _unpack(data, what, max_str=128, max_binary=len(data), max_array=0, max_map=8)
    if not isinstance(env, dict) or set(env) != {"kind", "format", "payload", "sha256"}:
        got = sorted(env) if isinstance(env, dict) else type(env).__name__
        raise FormatError(f"{what}: expected a map with keys format, kind, payload, sha256, got {got}")
    if env["kind"] != kind:
        raise FormatError(f"{what}: expected kind {kind!r}, got {_short(env['kind'])}")
    fmt = env["format"]
    if not isinstance(fmt, int) or isinstance(fmt, bool) or fmt != STORE_FORMAT_VERSION:
        hint = " (written by a newer sketchmerge?)" if isinstance(fmt, int) and fmt > STORE_FORMAT_VERSION else ""
        raise FormatError(f"{what}: expected format version {STORE_FORMAT_VERSION}, got {_short(fmt)}{hint}")
    payload = env["payload"]
    if not isinstance(payload, bytes):
        raise FormatError(f"{what}: expected payload bytes, got {type(payload).__name__}")
    digest = hashlib.sha256(payload).hexdigest()
    if env["sha256"] != digest:
        raise FormatError(f"{what}: expected sha256 {_short(env['sha256'])} of the payload, got {digest}")
    body = _unpack(payload, what, max_str=128, max_binary=0, max_array=max_array, max_map=16)
    if not isinstance(body, dict):
        raise FormatError(f"{what}: expected a payload map, got {type(body).__name__}")
    return body


def _require(body: dict, fields: dict, what: str) -> None:
    if set(body) != set(fields):
        raise FormatError(f"{what}: expected payload fields {sorted(fields)}, got {sorted(body)}")
    for name, types in fields.items():
        value = body[name]
        if not isinstance(value, types) or isinstance(value, bool):
            raise FormatError(f"{what}: expected field {name!r} of type "
                              f"{'/'.join(t.__name__ for t in types)}, got {type(value).__name__}")


@dataclass(frozen=True)
class Pointer:
    """The decoded ``TABLE/CURRENT`` document."""

    version: int
    document_sha256: str
    updated: float


@dataclass(frozen=True)
class Manifest:
    """The decoded manifest of one publish attempt of one version."""

    version: int
    attempt: str
    document_sha256: str
    document_size: int
    keys: tuple[str, ...]
    created: float


def encode_pointer(version: int, document_sha256: str, updated: float | None = None) -> bytes:
    """Encode the pointer document (docs/STORE.md, "Pointer document")."""
    return _encode_envelope(POINTER_KIND, {
        "version": _check_version(version), "document_sha256": document_sha256,
        "updated": float(time.time() if updated is None else updated)})


def decode_pointer(data, what: str = "CURRENT") -> Pointer:
    """Decode and check a pointer document; bad bytes raise :class:`FormatError` naming ``what``."""
    body = _decode_envelope(data, POINTER_KIND, what, max_array=0)
    _require(body, {"version": (int,), "document_sha256": (str,), "updated": (float, int)}, what)
    if not 1 <= body["version"] <= MAX_VERSION:
        raise FormatError(f"{what}: expected a version 1..{MAX_VERSION}, got {body['version']}")
    if _HEX64_RE.fullmatch(body["document_sha256"]) is None:
        raise FormatError(f"{what}: expected a 64-digit hex sha256, got {_short(body['document_sha256'])}")
    return Pointer(body["version"], body["document_sha256"], float(body["updated"]))


def encode_manifest(version: int, attempt: str, document: bytes, keys, created: float | None = None) -> bytes:
    """Encode a manifest (docs/STORE.md, "Manifest document"); keys are stored sorted and unique."""
    if _TOKEN_RE.fullmatch(attempt) is None:
        raise InputError(f"manifest attempt: expected 16 hex digits, got {_short(attempt)}")
    return _encode_envelope(MANIFEST_KIND, {
        "version": _check_version(version), "attempt": attempt,
        "document_sha256": hashlib.sha256(document).hexdigest(), "document_size": len(document),
        "keys": _check_keys(keys), "created": float(time.time() if created is None else created)})


def decode_manifest(data, what: str = "manifest") -> Manifest:
    """Decode and check a manifest; bad bytes or keys raise :class:`FormatError` naming ``what``."""
    body = _decode_envelope(data, MANIFEST_KIND, what, max_array=_MAX_KEYS)
    _require(body, {"version": (int,), "attempt": (str,), "document_sha256": (str,),
                    "document_size": (int,), "keys": (list,), "created": (float, int)}, what)
    if not 1 <= body["version"] <= MAX_VERSION:
        raise FormatError(f"{what}: expected a version 1..{MAX_VERSION}, got {body['version']}")
    if _TOKEN_RE.fullmatch(body["attempt"]) is None or _HEX64_RE.fullmatch(body["document_sha256"]) is None:
        raise FormatError(f"{what}: expected hex attempt token and sha256, got "
                          f"{_short(body['attempt'])}, {_short(body['document_sha256'])}")
    try:
        keys = _check_keys(body["keys"], what)
    except InputError as e:
        raise FormatError(f"{what}: expected valid blob keys: {e}") from e
    if keys != body["keys"]:
        raise FormatError(f"{what}: expected sorted unique keys, got an unsorted or repeated list")
    return Manifest(body["version"], body["attempt"], body["document_sha256"], body["document_size"],
                    tuple(keys), float(body["created"]))


# ----------------------------------------------------------------------------- urls and secrets


def redact_url(url: str) -> str:
    """Strip ``user:password@`` and any query string or fragment from a URL.

    Examples
    --------
    >>> redact_url("s3://AKIDFAKE:hunter2@bucket/tables/t?X-Sig=abc")
    's3://bucket/tables/t'
    >>> redact_url("tables/t")
    'tables/t'
    """
    if "://" not in url:
        return url
    parts = urllib.parse.urlsplit(url)
    netloc = parts.netloc.rsplit("@", 1)[-1]
    return _join_url(parts.scheme, netloc, parts.path)


def _join_url(scheme: str, netloc: str, path: str) -> str:
    """``scheme://netloc/path``, keeping the ``//`` of an empty authority.

    ``urllib.parse.urlunsplit`` drops it for schemes it does not know (``memory:///t``
    would become ``memory:/t``, which fsspec then opens as a local relative folder).
    """
    return f"{scheme}://{netloc}{path}"


def _collect_secrets(options, out: set[str], depth: int = 0) -> None:
    """Every string value under a credential-like option name, at any nesting depth."""
    if depth > 6:
        return
    if isinstance(options, dict):
        for name, value in options.items():
            lname = str(name).lower()
            if isinstance(value, str) and any(w in lname for w in _SECRET_WORDS) and "url" not in lname:
                out.add(value)
            elif isinstance(value, (dict, list, tuple)):
                _collect_secrets(value, out, depth + 1)
    elif isinstance(options, (list, tuple)):
        for value in options:
            _collect_secrets(value, out, depth + 1)


# ----------------------------------------------------------------------------- error classes


def _s3_error(e: BaseException) -> dict:
    """The S3 error dict of ``e`` or of its cause (s3fs chains the botocore ClientError)."""
    for err in (e, e.__cause__, e.__context__):
        response = getattr(err, "response", None)
        if isinstance(response, dict):
            error = dict(response.get("Error") or {})
            error.setdefault("Status", (response.get("ResponseMetadata") or {}).get("HTTPStatusCode"))
            return error
    return {}


def _is_precondition(e: BaseException) -> bool:
    err = _s3_error(e)
    return (err.get("Code") in ("PreconditionFailed", "412", "ConditionalRequestConflict")
            or err.get("Status") in (409, 412) or "pre-condition" in str(e))


def _is_transient(e: BaseException) -> bool:
    if isinstance(e, (FileNotFoundError, FileExistsError, PermissionError, IsADirectoryError,
                      NotADirectoryError, SketchmergeError)):
        return False
    if isinstance(e, (ConnectionError, TimeoutError, InterruptedError)):
        return True
    if any(cls.__name__ in _TRANSIENT_NAMES for cls in type(e).__mro__):
        return True
    err = _s3_error(e)
    if err:
        status = err.get("Status")
        return err.get("Code") in _TRANSIENT_S3_CODES or (isinstance(status, int) and status >= 500)
    return isinstance(e, OSError) and e.errno in _TRANSIENT_ERRNOS


class _MissingRoot(FileNotFoundError):
    """The bucket (or other root container) of the table does not exist."""


@dataclass(frozen=True)
class _Entry:
    name: str      # base name inside the listed folder
    size: int
    mtime: float   # seconds since the epoch


def _entry_time(info: dict) -> float:
    for field in ("mtime", "LastModified", "last_modified", "created", "updated", "timeCreated"):
        value = info.get(field)
        if value is None:
            continue
        if hasattr(value, "timestamp"):
            return float(value.timestamp())
        try:
            return float(value)
        except (TypeError, ValueError):
            continue
    # unknown age counts as brand new: nothing is ever removed by an age rule it cannot check
    return math.inf


# ----------------------------------------------------------------------------- backends
# Each backend implements the same primitives over names relative to TABLE.
# create() is create-only and raises FileExistsError when the name is taken;
# replace_if() swaps the pointer only if it still has the tag read_tagged()
# returned (None = absent) and reports False when it lost.


class _LocalBackend:
    """A local (POSIX) directory: staged in TABLE/tmp, published by os.link / os.replace."""

    mode = "local-link"

    def __init__(self, root: str):
        self.root = root

    def _path(self, name: str) -> str:
        return os.path.join(self.root, *name.split("/"))

    def _stage(self, name: str, data: bytes, sync: bool = True) -> str:
        folder = self._path(TMP_DIR)
        os.makedirs(folder, exist_ok=True)
        tmp = os.path.join(folder, f"{secrets.token_hex(8)}-{name.rsplit('/', 1)[-1]}.tmp")
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_BINARY", 0), 0o666)
        try:
            with os.fdopen(fd, "wb") as f:
                f.write(data)
                f.flush()
                if sync:
                    os.fsync(f.fileno())  # content durable before the name becomes visible
        except BaseException:
            with contextlib.suppress(OSError):
                os.remove(tmp)
            raise
        return tmp

    @staticmethod
    def _fsync_dir(folder: str) -> None:
        with contextlib.suppress(OSError):  # not every platform can open a directory
            fd = os.open(folder, os.O_RDONLY)
            try:
                os.fsync(fd)
            finally:
                os.close(fd)

    def read(self, name: str) -> bytes:
        with open(self._path(name), "rb") as f:
            return f.read()

    def read_tagged(self, name: str):
        try:
            data = self.read(name)
        except FileNotFoundError:
            return None, None
        return data, data  # the pointer is tiny: its bytes are its tag

    def write(self, name: str, data: bytes, sync: bool = True) -> None:
        """Atomic replace; ``sync=False`` (cache entries) skips both fsyncs: a crash can
        then lose or tear the file, which its reader detects (blobs carry a CRC-32)."""
        dest = self._path(name)
        os.makedirs(os.path.dirname(dest), exist_ok=True)
        tmp = self._stage(name, data, sync)
        try:
            os.replace(tmp, dest)
        except BaseException:
            with contextlib.suppress(OSError):
                os.remove(tmp)
            raise
        if sync:
            self._fsync_dir(os.path.dirname(dest))

    def create(self, name: str, data: bytes) -> None:
        dest = self._path(name)
        os.makedirs(os.path.dirname(dest), exist_ok=True)
        tmp = self._stage(name, data)
        try:
            os.link(tmp, dest)  # atomic and create-only: FileExistsError when taken
        finally:
            with contextlib.suppress(OSError):
                os.remove(tmp)
        self._fsync_dir(os.path.dirname(dest))

    @contextlib.contextmanager
    def _locked(self):
        try:
            import fcntl
        except ImportError:  # pragma: no cover - non-POSIX: in-process lock only (docs/STORE.md)
            with _process_lock(self.root):
                yield
            return
        os.makedirs(self.root, exist_ok=True)
        # the lock file is never deleted: removing a held lock file would let a
        # second writer lock a new inode while the first still holds the old one
        fd = os.open(self._path(LOCK_NAME), os.O_RDWR | os.O_CREAT, 0o666)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX)  # released by the kernel if the holder dies
            yield
        finally:
            os.close(fd)

    def replace_if(self, name: str, data: bytes, tag) -> bool:
        with self._locked():
            current, _ = self.read_tagged(name)
            if current != tag:
                return False
            self.write(name, data)
            return True

    def exists(self, name: str) -> bool:
        return os.path.isfile(self._path(name))

    def list(self, folder: str) -> list[_Entry]:
        try:
            it = os.scandir(self._path(folder))
        except (FileNotFoundError, NotADirectoryError):
            return []
        out = []
        with it:
            for entry in it:
                with contextlib.suppress(FileNotFoundError):  # removed while listing
                    if entry.is_file(follow_symlinks=False):
                        st = entry.stat(follow_symlinks=False)
                        out.append(_Entry(entry.name, st.st_size, st.st_mtime))
        return out

    def delete(self, names: list[str]) -> None:
        for name in names:
            with contextlib.suppress(FileNotFoundError):
                os.remove(self._path(name))

    def read_many(self, names: list[str]) -> dict[str, bytes | BaseException]:
        out: dict[str, bytes | BaseException] = {}
        for name in names:
            try:
                out[name] = self.read(name)
            except OSError as e:
                out[name] = e
        return out


_PROCESS_LOCKS: dict[str, threading.Lock] = {}
_PROCESS_LOCKS_GUARD = threading.Lock()


def _process_lock(key: str) -> threading.Lock:
    with _PROCESS_LOCKS_GUARD:
        return _PROCESS_LOCKS.setdefault(key, threading.Lock())


class _FsspecBackend:
    """Any fsspec filesystem without conditional writes (e.g. ``memory://``).

    Create-only is exists-check, write, read-back verify, serialised by a lock
    within this process; across processes the check and the write are not
    atomic (docs/STORE.md, "Fallback").
    """

    mode = "fallback-verify"

    def __init__(self, fs, root: str):
        self.fs = fs
        self.root = root.rstrip("/")
        self.lock = _process_lock(f"{fs.protocol}:{self.root}")

    def _path(self, name: str) -> str:
        return f"{self.root}/{name}"

    def read(self, name: str) -> bytes:
        return self.fs.cat_file(self._path(name))

    def read_tagged(self, name: str):
        try:
            data = self.read(name)
        except FileNotFoundError:
            return None, None
        return data, data

    def write(self, name: str, data: bytes) -> None:
        path = self._path(name)
        with contextlib.suppress(Exception):  # object stores have no folders to make
            self.fs.makedirs(path.rsplit("/", 1)[0], exist_ok=True)
        self.fs.pipe_file(path, data)
        self.fs.invalidate_cache(path)

    def create(self, name: str, data: bytes) -> None:
        path = self._path(name)
        with self.lock:
            self.fs.invalidate_cache(path)
            if self.fs.exists(path):
                raise FileExistsError(errno.EEXIST, "already exists", name)
            self.write(name, data)
            if self.read(name) != data:  # another process wrote between check and write
                raise FileExistsError(errno.EEXIST, "overwritten by another writer", name)

    def replace_if(self, name: str, data: bytes, tag) -> bool:
        with self.lock:
            current, _ = self.read_tagged(name)
            if current != tag:
                return False
            self.write(name, data)
            return True

    def exists(self, name: str) -> bool:
        path = self._path(name)
        self.fs.invalidate_cache(path)
        return self.fs.isfile(path)

    def list(self, folder: str) -> list[_Entry]:
        path = self._path(folder)
        self.fs.invalidate_cache(path)
        try:
            infos = self.fs.ls(path, detail=True)
        except (FileNotFoundError, NotADirectoryError):
            return []
        return [_Entry(info["name"].rstrip("/").rsplit("/", 1)[-1], int(info.get("size") or 0), _entry_time(info))
                for info in infos if info.get("type") == "file"]

    def delete(self, names: list[str]) -> None:
        for name in names:
            with contextlib.suppress(FileNotFoundError):
                self.fs.rm_file(self._path(name))
        self.fs.invalidate_cache(self.root)

    def read_many(self, names: list[str]) -> dict[str, bytes | BaseException]:
        if not names:
            return {}
        got = self.fs.cat([self._path(n) for n in names], on_error="return")
        return {n: got.get(self._path(n), FileNotFoundError(n)) for n in names}


async def _s3_get(fs, bucket: str, key: str):
    resp = await fs._call_s3("get_object", Bucket=bucket, Key=key)
    body = resp["Body"]
    try:
        data = await body.read()
    finally:
        body.close()
    return data, resp.get("ETag")


async def _s3_get_many(fs, bucket: str, keys: list[str], limit: int):
    gate = asyncio.Semaphore(limit)

    async def one(key):
        async with gate:
            try:
                return (await _s3_get(fs, bucket, key))[0]
            except Exception as e:  # handed back per key; the store classifies
                return e

    return await asyncio.gather(*(one(k) for k in keys))


class _S3Backend:
    """S3 with conditional writes: ``If-None-Match: *`` to create, ``If-Match: <etag>`` to swap."""

    mode = "s3-conditional"

    def __init__(self, fs, bucket: str, prefix: str):
        self.fs = fs
        self.bucket = bucket
        self.prefix = prefix.strip("/")

    def _key(self, name: str) -> str:
        return f"{self.prefix}/{name}" if self.prefix else name

    def _get(self, name: str):
        from fsspec.asyn import sync

        return sync(self.fs.loop, _s3_get, self.fs, self.bucket, self._key(name))

    def read(self, name: str) -> bytes:
        return self._get(name)[0]

    def read_tagged(self, name: str):
        try:
            return self._get(name)  # bytes and ETag from one GET: never a mismatched pair
        except FileNotFoundError:
            return None, None

    def write(self, name: str, data: bytes) -> None:
        self.fs.call_s3("put_object", Bucket=self.bucket, Key=self._key(name), Body=data)

    def create(self, name: str, data: bytes) -> None:
        self.fs.call_s3("put_object", Bucket=self.bucket, Key=self._key(name), Body=data, IfNoneMatch="*")
        # read back: some S3-compatible stores accept If-None-Match and ignore it,
        # and a lost race there shows up as somebody else's bytes under our name
        if hashlib.sha256(self.read(name)).digest() != hashlib.sha256(data).digest():
            raise FileExistsError(errno.EEXIST, "overwritten by another writer", name)

    def replace_if(self, name: str, data: bytes, tag) -> bool:
        condition = {"IfNoneMatch": "*"} if tag is None else {"IfMatch": tag}
        try:
            self.fs.call_s3("put_object", Bucket=self.bucket, Key=self._key(name), Body=data, **condition)
        except (FileExistsError, FileNotFoundError):
            return False  # created meanwhile / deleted meanwhile: re-read and decide again
        except OSError as e:
            if _is_precondition(e):
                return False
            raise
        return True

    def exists(self, name: str) -> bool:
        try:
            self.fs.call_s3("head_object", Bucket=self.bucket, Key=self._key(name))
        except FileNotFoundError:
            return False
        return True

    def list(self, folder: str) -> list[_Entry]:
        prefix = self._key(folder).rstrip("/") + "/"
        out: list[_Entry] = []
        kwargs = {"Bucket": self.bucket, "Prefix": prefix, "Delimiter": "/"}
        while True:
            try:
                resp = self.fs.call_s3("list_objects_v2", **kwargs)
            except FileNotFoundError as e:  # only the bucket can be missing for a listing
                raise _MissingRoot(errno.ENOENT, f"bucket {self.bucket!r} does not exist") from e
            out.extend(_Entry(item["Key"][len(prefix):], int(item.get("Size", 0)), _entry_time(item))
                       for item in resp.get("Contents", ()))
            if not resp.get("IsTruncated"):
                return out
            kwargs["ContinuationToken"] = resp["NextContinuationToken"]

    def delete(self, names: list[str]) -> None:
        for start in range(0, len(names), 1000):  # S3's per-request limit
            chunk = names[start:start + 1000]
            resp = self.fs.call_s3("delete_objects", Bucket=self.bucket,
                                   Delete={"Objects": [{"Key": self._key(n)} for n in chunk], "Quiet": True})
            errors = [e for e in resp.get("Errors", ()) if e.get("Code") != "NoSuchKey"]
            if errors:
                raise OSError(errno.EIO, f"delete refused for {len(errors)} objects, first: "
                                         f"{errors[0].get('Code')}: {errors[0].get('Message')}")

    def read_many(self, names: list[str]) -> dict[str, bytes | BaseException]:
        from fsspec.asyn import sync

        got = sync(self.fs.loop, _s3_get_many, self.fs, self.bucket, [self._key(n) for n in names], 32)
        return dict(zip(names, got))


# ----------------------------------------------------------------------------- the store


class TableStore:
    """Published versions, manifests, pointer and cached blobs of one cut table.

    Parameters
    ----------
    url : str
        The TABLE URL: a local directory, ``s3://bucket/prefix`` or another
        fsspec URL (``memory://...``).  Credentials in the URL are accepted for
        S3 (moved into the storage options) and never shown.
    storage_options : dict, optional
        Passed to the fsspec filesystem; never shown in reprs or messages and
        never written.
    mode : {"auto", "fallback"}, keyword-only
        ``"auto"`` picks the commit protocol of the store (local links, S3
        conditional writes, or the verify fallback); ``"fallback"`` forces the
        verify fallback (for stores that claim conditional writes they lack).
    retries : int, keyword-only
        How many times a transient storage failure is retried before
        :class:`StorageError` is raised.
    backoff_seconds : float, keyword-only
        First retry delay; it grows four-fold per retry, with jitter.

    Attributes
    ----------
    url : str
        The TABLE URL without credentials or query string.
    mode : str
        ``"local-link"``, ``"s3-conditional"`` or ``"fallback-verify"``.

    Examples
    --------
    >>> import tempfile, os
    >>> store = TableStore(os.path.join(tempfile.mkdtemp(), "t"))
    >>> store.publish(1, b"one", [])
    >>> store.publish(2, b"two", [])
    >>> store.versions(), store.current(), store.read_version(1)
    ([1, 2], 2, (1, b'one'))
    """

    def __init__(self, url: str, storage_options: dict | None = None, *, mode: str = "auto",
                 retries: int = 3, backoff_seconds: float = 0.1):
        if not isinstance(url, str) or not url.strip():
            raise InputError(f"table url: expected a non-empty string, got {type(url).__name__}")
        if mode not in ("auto", "fallback"):
            raise InputError(f"mode: expected 'auto' or 'fallback', got {_short(mode)}")
        options = dict(storage_options or {})
        hidden: set[str] = set()
        _collect_secrets(options, hidden)
        open_url = url
        if "://" in url:
            parts = urllib.parse.urlsplit(url)
            for value in (parts.username, parts.password, *(v for _, v in urllib.parse.parse_qsl(parts.query))):
                if value:
                    hidden.update({value, urllib.parse.unquote(value)})
            # a table root is a prefix: a query string means nothing to it and
            # may carry a signed token, so it is dropped from what is opened too
            open_url = _join_url(parts.scheme, parts.netloc, parts.path)
            if parts.scheme in ("s3", "s3a") and parts.username:
                options.setdefault("key", urllib.parse.unquote(parts.username))
                if parts.password:
                    options.setdefault("secret", urllib.parse.unquote(parts.password))
                open_url = redact_url(open_url)
        self._hidden = tuple(sorted((h for h in hidden if len(h) >= 3), key=len, reverse=True))
        self.url = self._scrub(redact_url(url).rstrip("/") or redact_url(url))
        self._retries = max(0, int(retries))
        self._backoff = float(backoff_seconds)
        try:
            import fsspec.core

            fs, root = fsspec.core.url_to_fs(open_url, **options)
        except ImportError as e:
            raise InputError(self._scrub(f"table {self.url}: expected an installed filesystem for this "
                                         f"URL, got ImportError: {e} (for s3:// install sketchmerge[s3])")) from e
        except (ValueError, TypeError) as e:
            raise InputError(self._scrub(f"table {self.url}: expected a usable URL and storage options, "
                                         f"got {type(e).__name__}: {e}")) from e
        protocols = (fs.protocol,) if isinstance(fs.protocol, str) else tuple(fs.protocol)
        root = root.rstrip("/")
        if mode == "fallback":
            self._b = _FsspecBackend(fs, root)
        elif "file" in protocols or "local" in protocols:
            self._b = _LocalBackend(root)
        elif "s3" in protocols or "s3a" in protocols:
            bucket, _, prefix = root.partition("/")
            if not bucket:
                raise InputError(f"table {self.url}: expected s3://bucket/prefix, got no bucket")
            self._b = _S3Backend(fs, bucket, prefix)
        else:
            self._b = _FsspecBackend(fs, root)
        self.mode = self._b.mode

    def __repr__(self) -> str:
        return f"TableStore({self.url!r}, mode={self.mode!r})"

    # --------------------------------------------------------------- plumbing

    def _scrub(self, text: str) -> str:
        for secret in getattr(self, "_hidden", ()):
            text = text.replace(secret, "***")
        return text

    def _where(self, name: str) -> str:
        return f"{self.url}/{name}"

    def _io(self, op: str, name: str, fn, *args):
        """Run one storage primitive with retries; translate failures at this boundary."""
        delay = self._backoff
        for attempt in range(self._retries + 1):
            try:
                return fn(*args)
            except _MissingRoot as e:
                raise NoInputError(self._scrub(f"table {self.url}: expected an existing bucket or root, "
                                               f"got {e.strerror or e}")) from e
            except (FileNotFoundError, FileExistsError, SketchmergeError):
                raise
            except Exception as e:
                transient = _is_transient(e)
                if not transient and not isinstance(e, OSError):
                    raise  # a programming error, not a storage failure
                if transient and attempt < self._retries:
                    time.sleep(delay * (0.5 + random.random()))
                    delay *= 4
                    continue
                tries = f" after {attempt + 1} attempts" if transient else ""
                raise StorageError(self._scrub(
                    f"{op} {self._where(name)}: expected the storage to complete the request, "
                    f"got {type(e).__name__}: {e}{tries}")) from e
        raise AssertionError("unreachable")  # pragma: no cover

    def _write_op(self, op: str, name: str, fn, *args):
        """A write: a missing parent (bucket) is a missing table, named as such."""
        try:
            return self._io(op, name, fn, *args)
        except FileNotFoundError as e:
            if isinstance(e, SketchmergeError):
                raise
            raise NoInputError(self._scrub(f"table {self.url}: expected an existing bucket or root to "
                                           f"write {name} into, got {type(e).__name__}: {e}")) from e

    def _read_pointer(self):
        raw, tag = self._io("read", POINTER_NAME, self._b.read_tagged, POINTER_NAME)
        if raw is None:
            return None, None, None
        return decode_pointer(raw, self._where(POINTER_NAME)), raw, tag

    def _list(self, folder: str) -> list[_Entry]:
        return self._io("list", folder + "/", self._b.list, folder)

    def _scan_versions(self):
        """One listing of versions/: documents, canonical manifests, attempt manifests."""
        docs: dict[int, _Entry] = {}
        canonical: dict[int, _Entry] = {}
        attempts: dict[int, list[tuple[str, _Entry]]] = {}
        for entry in self._list(VERSIONS_DIR):
            if m := _DOC_RE.fullmatch(entry.name):
                docs[int(m.group(1))] = entry
            elif m := _CANONICAL_RE.fullmatch(entry.name):
                canonical[int(m.group(1))] = entry
            elif m := _ATTEMPT_RE.fullmatch(entry.name):
                attempts.setdefault(int(m.group(1)), []).append((m.group(2), entry))
        return docs, canonical, attempts

    def _missing_version(self, v: int) -> NoInputError:
        published = self.versions()
        have = (f"published versions: {published[0]}..{published[-1]} ({len(published)})"
                if published else "nothing is published")
        return NoInputError(f"table {self.url}: expected version {v} to exist, got no {_doc_name(v)} ({have})")

    # --------------------------------------------------------------- reading

    def versions(self) -> list[int]:
        """Complete published versions, ascending (one listing).

        A version document is visible only once complete, so every listed
        number is readable (until gc removes it).
        """
        docs, _, _ = self._scan_versions()
        return sorted(docs)

    def current(self) -> int | None:
        """The newest published version, or None when nothing is published.

        Reads the pointer, then probes for newer complete versions, so a
        pointer that lags (its writer lost a race or died) never hides a
        published version.  A pointer with bad bytes raises :class:`FormatError`.
        """
        return self._resolve_current(self._read_pointer()[0])

    def _resolve_current(self, pointer: Pointer | None) -> int | None:
        if pointer is None:  # never published, or CURRENT removed by an operator: list
            published = self.versions()
            return published[-1] if published else None
        v = pointer.version
        # versions are created without gaps, so probing upwards finds the newest
        while v < MAX_VERSION and self._io("probe", _doc_name(v + 1), self._b.exists, _doc_name(v + 1)):
            v += 1
        return v

    def read_version(self, version: int | None = None) -> tuple[int, bytes]:
        """Return ``(version, document bytes)``; ``None`` reads the current version.

        Raises
        ------
        NoInputError
            (a FileNotFoundError) when the version, or any published version, is missing.
        FormatError
            when the current document does not match the checksum the pointer recorded.
        """
        if version is None:
            pointer, _, _ = self._read_pointer()
            v = self._resolve_current(pointer)
            if v is None:
                raise NoInputError(f"table {self.url}: expected a published version, got none "
                                   f"(no {POINTER_NAME} and no {VERSIONS_DIR}/*.cuts)")
        else:
            pointer, v = None, _check_version(version)
        try:
            data = self._io("read", _doc_name(v), self._b.read, _doc_name(v))
        except FileNotFoundError as e:
            raise self._missing_version(v) from e
        if pointer is not None and pointer.version == v:
            digest = hashlib.sha256(data).hexdigest()
            if digest != pointer.document_sha256:
                raise FormatError(f"{self._where(_doc_name(v))}: expected sha256 {pointer.document_sha256} "
                                  f"recorded in {POINTER_NAME}, got {digest}")
        return v, data

    def _attempt_manifests(self, v: int, attempts) -> list[Manifest]:
        out = []
        for token, _ in attempts:
            name = _attempt_name(v, token)
            try:
                raw = self._io("read", name, self._b.read, name)
            except FileNotFoundError:
                continue  # its writer removed it meanwhile
            m = decode_manifest(raw, self._where(name))
            if m.version != v or m.attempt != token:
                raise FormatError(f"{self._where(name)}: expected version {v} attempt {token}, "
                                  f"got version {m.version} attempt {m.attempt}")
            out.append(m)
        return out

    def _read_canonical(self, v: int) -> Manifest | None:
        name = _canonical_name(v)
        try:
            raw = self._io("read", name, self._b.read, name)
        except FileNotFoundError:
            return None
        m = decode_manifest(raw, self._where(name))
        if m.version != v:
            raise FormatError(f"{self._where(name)}: expected version {v}, got {m.version}")
        return m

    def _resolve_manifest(self, v: int) -> tuple[Manifest, bytes | None]:
        """The manifest of published version ``v``; second item: bytes to promote, if not canonical."""
        canonical = self._read_canonical(v)
        if canonical is not None:
            return canonical, None
        # the winner died between its commit and promoting its manifest: find the
        # attempt manifests whose recorded checksum matches the published document
        try:
            document = self._io("read", _doc_name(v), self._b.read, _doc_name(v))
        except FileNotFoundError as e:
            raise self._missing_version(v) from e
        digest = hashlib.sha256(document).hexdigest()
        _, _, attempts = self._scan_versions()
        matching = [m for m in self._attempt_manifests(v, attempts.get(v, ()))
                    if m.document_sha256 == digest and m.document_size == len(document)]
        if not matching:
            # the winner may have promoted its attempt (and removed it) meanwhile
            canonical = self._read_canonical(v)
            if canonical is not None:
                return canonical, None
            raise NoInputError(f"table {self.url}: expected a manifest for version {v} "
                               f"({_canonical_name(v)} or an attempt matching sha256 {digest}), got none")
        # identical documents from racing builders: keep every key any of them
        # listed (conservative for gc; each set describes the same document)
        keys = sorted(set().union(*(m.keys for m in matching)))
        first = min(matching, key=lambda m: (m.created, m.attempt))
        merged = Manifest(v, first.attempt, digest, len(document), tuple(keys), first.created)
        return merged, encode_manifest(v, first.attempt, document, keys, first.created)

    def manifest(self, version: int) -> list[str]:
        """The blob keys published version ``version`` needs (sorted, unique)."""
        m, _ = self._resolve_manifest(_check_version(version))
        return list(m.keys)

    def document_sha256(self, version: int) -> str:
        """SHA-256 (hex) of published version ``version``'s document, from its manifest.

        Lets a reader check a cached copy without downloading the document again.
        """
        m, _ = self._resolve_manifest(_check_version(version))
        return m.document_sha256

    # --------------------------------------------------------------- publishing

    def publish(self, version: int, data: bytes, blob_keys: list[str]) -> None:
        """Publish ``data`` as version ``version`` (create-only), then advance the pointer.

        ``version`` must be ``current() + 1``.  Publishing the same bytes under
        the same number again is a no-op success, so a retried publish whose
        first answer was lost does not report a race it won.

        Raises
        ------
        PublishRaceError
            (a FileExistsError) when another builder published ``version`` first.
        InputError
            for a bad version number, bad keys, or a version that would leave a gap.
        """
        v = _check_version(version)
        if not isinstance(data, (bytes, bytearray, memoryview)):
            raise InputError(f"publish data: expected bytes, got {type(data).__name__}")
        data = bytes(data)
        keys = _check_keys(blob_keys)
        cur = self.current()
        if cur is not None and v <= cur:
            if v == cur or self._io("probe", _doc_name(v), self._b.exists, _doc_name(v)):
                if self._same_document(v, data):
                    self._advance_pointer(v, data)
                    return
            raise self._race(v, cur)
        if v != (cur or 0) + 1:
            raise InputError(f"table {self.url}: expected version {(cur or 0) + 1} (current() + 1), got {v}")
        token = secrets.token_hex(8)
        manifest = encode_manifest(v, token, data, keys)
        attempt = _attempt_name(v, token)
        # the manifest goes first, under a name only this attempt uses: a visible
        # version always has its keys on record, and racing writers never
        # overwrite each other's manifests
        self._write_op("write", attempt, self._b.write, attempt, manifest)
        try:
            self._write_op("create", _doc_name(v), self._b.create, _doc_name(v), data)
        except FileExistsError as e:
            if self._same_document(v, data):  # ours, from a retried request, or identical bytes
                self._finish(v, data, manifest, attempt)
                return
            self._delete_quietly([attempt])
            raise self._race(v, cur) from e
        except BaseException:
            self._delete_quietly([attempt])
            raise
        self._finish(v, data, manifest, attempt)

    def _same_document(self, v: int, data: bytes) -> bool:
        try:
            existing = self._io("read", _doc_name(v), self._b.read, _doc_name(v))
        except FileNotFoundError:
            return False
        return hashlib.sha256(existing).digest() == hashlib.sha256(data).digest()

    def _race(self, v: int, cur: int | None) -> PublishRaceError:
        return PublishRaceError(
            f"table {self.url}: expected version {v} to be free, got it already published by another "
            f"builder (current was {cur}); re-read the current version and publish on top of it")

    def _finish(self, v: int, data: bytes, manifest: bytes, attempt: str) -> None:
        """After the commit: promote the manifest, drop the attempt name, advance the pointer."""
        # FileExistsError: a cleaner promoted our attempt already (same bytes), or
        # an identical-document racer promoted its own; either way it is on record
        with contextlib.suppress(FileExistsError):
            self._write_op("create", _canonical_name(v), self._b.create, _canonical_name(v), manifest)
        self._delete_quietly([attempt])
        self._advance_pointer(v, data)

    def _advance_pointer(self, v: int, data: bytes) -> None:
        """Move CURRENT forward to ``v`` unless it is already at ``v`` or later; never backward."""
        new = encode_pointer(v, hashlib.sha256(data).hexdigest())
        delay = 0.005
        for _ in range(100):
            pointer, raw, tag = self._read_pointer()
            if pointer is not None and pointer.version >= v:
                return  # a later publish moved it on: leave it
            # compare-and-swap; after a win the loop reads once more, which also
            # repairs a store whose conditional write was not really atomic
            if not self._write_op("swap", POINTER_NAME, self._b.replace_if, POINTER_NAME, new, tag):
                time.sleep(delay * (0.5 + random.random()))
                delay = min(delay * 2, 0.25)
        raise StorageError(f"swap {self._where(POINTER_NAME)}: expected to advance the pointer to version {v}, "
                           f"got 100 lost compare-and-swap rounds; the version is published and readers find it")

    def _delete_quietly(self, names: list[str]) -> None:
        with contextlib.suppress(OSError):
            self._io("delete", names[0] if names else "", self._b.delete, names)

    # --------------------------------------------------------------- blobs

    def put_blob(self, key: str, data: bytes) -> None:
        """Store a blob atomically under ``blobs/<key>``.

        Idempotent: the same key always carries the same bytes, and writing it
        again renews its age, which keeps gc's grace period from removing a
        blob an in-flight build reuses.
        """
        key = check_blob_key(key)
        if not isinstance(data, (bytes, bytearray, memoryview)):
            raise InputError(f"blob {key}: expected bytes, got {type(data).__name__}")
        name = f"{BLOBS_DIR}/{key}"
        if isinstance(self._b, _LocalBackend):
            # a blob is a cache entry, not published state: no fsync (two per blob cost
            # 5 ms each on local disks, a tenth of a unit's sketch).  A blob a crash loses
            # or tears is found by its CRC when reused, and the build sketches it again
            # (job.build); versions, manifests and the pointer stay fsynced.
            self._write_op("write", name, self._b.write, name, bytes(data), False)
        else:
            self._write_op("write", name, self._b.write, name, bytes(data))

    def get_blob(self, key: str) -> bytes | None:
        """The bytes of blob ``key``, or None when it is not stored."""
        key = check_blob_key(key)
        name = f"{BLOBS_DIR}/{key}"
        try:
            return self._io("read", name, self._b.read, name)
        except FileNotFoundError:
            return None

    def get_blobs(self, keys: list[str]) -> dict[str, bytes]:
        """Fetch many blobs (concurrently where the store allows); missing keys are absent."""
        wanted = _check_keys(keys)
        out: dict[str, bytes] = {}
        todo = [f"{BLOBS_DIR}/{k}" for k in wanted]
        delay = self._backoff
        for attempt in range(self._retries + 1):
            if not todo:
                break
            got = self._io("read", f"{BLOBS_DIR}/", self._b.read_many, todo)
            retry = []
            for name, value in got.items():
                if isinstance(value, (bytes, bytearray)):
                    out[name[len(BLOBS_DIR) + 1:]] = bytes(value)
                elif isinstance(value, FileNotFoundError):
                    continue
                elif _is_transient(value) and attempt < self._retries:
                    retry.append(name)
                else:
                    raise StorageError(self._scrub(f"read {self._where(name)}: expected the storage to complete "
                                                   f"the request, got {type(value).__name__}: {value}")) from value
            todo = retry
            if todo:
                time.sleep(delay * (0.5 + random.random()))
                delay *= 4
        return out

    def existing_blobs(self, keys: list[str] | None = None) -> set[str]:
        """Keys of stored blobs (one listing), restricted to ``keys`` when given."""
        present = {e.name for e in self._list(BLOBS_DIR) if _KEY_RE.fullmatch(e.name)}
        return present if keys is None else present & set(_check_keys(keys))

    # --------------------------------------------------------------- housekeeping

    def clean_leftovers(self, older_than_seconds: float = 3600) -> int:
        """Remove what killed or beaten writers left behind; return how many objects went.

        Staging files and attempt manifests older than ``older_than_seconds``
        go; an attempt manifest of a published version that lacks its
        canonical manifest is promoted first.  Younger leftovers may belong to
        a writer that is still running and stay.
        """
        now = time.time()
        old = float(older_than_seconds)
        stale_tmp = [f"{TMP_DIR}/{e.name}" for e in self._list(TMP_DIR) if now - e.mtime >= old]
        docs, canonical, attempts = self._scan_versions()
        doomed = list(stale_tmp)
        for v, atts in attempts.items():
            if v in docs and v not in canonical:
                try:
                    _, promote = self._resolve_manifest(v)
                except NoInputError:
                    promote = None  # no attempt matches: leave them for an operator to look at
                if promote is None:
                    continue
                with contextlib.suppress(FileExistsError):
                    self._write_op("create", _canonical_name(v), self._b.create, _canonical_name(v), promote)
                canonical[v] = _Entry(_canonical_name(v), len(promote), now)
            if v in canonical or v not in docs:
                doomed.extend(_attempt_name(v, token) for token, e in atts if now - e.mtime >= old)
        # a canonical manifest is written only after its document, so one without
        # a document is what an interrupted gc left
        doomed.extend(_canonical_name(v) for v, e in canonical.items() if v not in docs and now - e.mtime >= old)
        if doomed:
            self._io("delete", doomed[0], self._b.delete, doomed)
        return len(doomed)

    def gc(self, keep: int = 10, grace_seconds: float = 6 * 3600) -> dict:
        """Keep the newest ``keep`` versions and the blobs they need; remove the rest.

        Never removes the current version, nor a blob younger than
        ``grace_seconds`` (an in-flight build writes blobs before it publishes
        the manifest that names them), nor blobs named by an attempt manifest
        younger than ``grace_seconds``.  Leftovers older than the grace period
        are cleaned too.

        Returns
        -------
        dict
            ``kept`` (versions), ``versions_removed``, ``manifests_removed``,
            ``blobs_removed``, ``blob_bytes_removed``, ``bytes_removed`` (all
            removed objects) and ``leftovers_removed``.
        """
        if isinstance(keep, bool) or not isinstance(keep, int) or keep < 1:
            raise InputError(f"gc keep: expected an integer >= 1 (the current version is always kept), got {_short(keep)}")
        grace = float(grace_seconds)
        if grace < 0:
            raise InputError(f"gc grace_seconds: expected >= 0, got {grace}")
        now = time.time()
        # blobs are listed before manifests are read: a blob written after this
        # listing is not a candidate at all
        blobs = [e for e in self._list(BLOBS_DIR) if _KEY_RE.fullmatch(e.name)]
        docs, canonical, attempts = self._scan_versions()
        kept = sorted(docs)[-keep:]
        needed: set[str] = set()
        for v in kept:  # every needed key is known before anything is deleted
            needed.update(self._resolve_manifest(v)[0].keys)
        for v, atts in attempts.items():
            young = [(t, e) for t, e in atts if now - e.mtime < grace]
            for m in self._attempt_manifests(v, young):
                needed.update(m.keys)
        old_versions = sorted(set(docs) - set(kept))
        removed_bytes = 0
        doc_names = [_doc_name(v) for v in old_versions]
        manifest_names = [_canonical_name(v) for v in old_versions if v in canonical]
        manifest_names += [_attempt_name(v, t) for v in old_versions for t, _ in attempts.get(v, ())]
        # documents first: an interrupted gc leaves manifests without documents
        # (leftovers), never a document without its manifest
        if doc_names:
            self._io("delete", doc_names[0], self._b.delete, doc_names)
            removed_bytes += sum(docs[v].size for v in old_versions)
        if manifest_names:
            self._io("delete", manifest_names[0], self._b.delete, manifest_names)
            removed_bytes += sum(canonical[v].size for v in old_versions if v in canonical)
            removed_bytes += sum(e.size for v in old_versions for _, e in attempts.get(v, ()))
        doomed = [e for e in blobs if e.name not in needed and now - e.mtime >= grace]
        if doomed:
            names = [f"{BLOBS_DIR}/{e.name}" for e in doomed]
            self._io("delete", names[0], self._b.delete, names)
        blob_bytes = sum(e.size for e in doomed)
        leftovers = self.clean_leftovers(older_than_seconds=grace)
        return {"kept": kept, "versions_removed": len(doc_names), "manifests_removed": len(manifest_names),
                "blobs_removed": len(doomed), "blob_bytes_removed": blob_bytes,
                "bytes_removed": removed_bytes + blob_bytes, "leftovers_removed": leftovers}
