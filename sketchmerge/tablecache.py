"""A local, multi-process cache of downloaded cut-table documents.

Many training processes on one host often load the same version of the same
table.  With a cache folder (``load(..., cache_dir=...)`` or the
``SKETCHMERGE_CACHE_DIR`` environment variable) the document is downloaded
once and read from local disk afterwards.

Layout (inside the cache folder)::

    <table key>/v<version, 8 digits>-<document sha256>.cuts   one cached document
    <table key>/v<version, 8 digits>.lock                      serialises first downloads
    <table key>/.tmp-*                                         a download being written

``<table key>`` is the first 24 hex digits of the sha256 of the table URL as
the store shows it (credentials and query strings removed), so no secret and
no bucket name is written to local disk.

How a load works and why it is safe with many processes:

1. The version is resolved (the newest one unless pinned) and the sha256 of
   its document is read from the table's small manifest, never from the cache:
   the cache key is (table, version, checksum).
2. A cached file with that name is read and its bytes hashed; if they match it
   is used.  If they do not (a truncated or corrupted file), the file is
   replaced by a fresh download (step 3), with a warning: the source still
   holds the good copy, so a damaged cache never stops a training job.
3. Otherwise the process takes an exclusive ``flock`` on the version's lock file
   (only where ``fcntl`` exists: one process downloads, the others wait and
   then read its file), downloads the document, checks its sha256 against the
   manifest, writes it to a temporary file in the same folder, flushes it to
   disk and renames it into place with ``os.replace``.  Readers therefore see
   either no file or a complete one; without ``fcntl`` two processes may both
   download, and the second rename replaces identical bytes.
4. If a file of the same version but another checksum is cached, the table's
   published version has changed since it was cached.  Published versions are
   immutable, so this means the table was deleted and rebuilt, or tampered
   with; :class:`~sketchmerge.FormatError` is raised rather than silently
   serving different edges under the same pinned version number.  Remove the
   old file (the message names it) if the rebuild was intended.

Files can be deleted at any time (a reader then downloads again); nothing
here ever deletes a cached document (a damaged one is overwritten).  Use local
disks: ``flock`` over network file systems is not dependable.
"""

from __future__ import annotations

import contextlib
import hashlib
import logging
import os
import re
import tempfile

from .errors import FormatError, InputError, NoInputError

__all__ = ["ENV_VAR", "read_document", "resolve_cache_dir", "table_key"]

ENV_VAR = "SKETCHMERGE_CACHE_DIR"
log = logging.getLogger("sketchmerge")
_NAME_RE = re.compile(r"v(\d{8})-([0-9a-f]{64})\.cuts")


def resolve_cache_dir(cache_dir=None) -> str | None:
    """The cache folder to use: the argument, else ``$SKETCHMERGE_CACHE_DIR``, else None.

    An empty string (argument or environment) turns the cache off.
    """
    # the environment variable follows the SKETCHMERGE_<NAME> convention of
    # sketchmerge.config; an explicit argument wins over it
    value = os.environ.get(ENV_VAR) if cache_dir is None else cache_dir
    if value is None:
        return None
    value = os.fspath(value)
    if not isinstance(value, str):
        raise InputError(f"cache_dir: expected a folder path, got {type(value).__name__}")
    return value or None


def table_key(url: str) -> str:
    """The folder name of one table inside the cache (a hash of its credential-free URL)."""
    return hashlib.sha256(url.encode("utf-8")).hexdigest()[:24]


def _source_sha256(store, version: int) -> str:
    """sha256 of a published document, as recorded by the table's manifest (no document read)."""
    public = getattr(store, "document_sha256", None)
    if callable(public):
        return public(version)
    # The store keeps the checksum in its manifest; it has no public accessor
    # for it yet, so read it the way the store itself resolves a manifest.
    manifest, _ = store._resolve_manifest(version)
    return manifest.document_sha256


@contextlib.contextmanager
def _locked(path: str):
    try:
        import fcntl
    except ImportError:  # not POSIX: atomic renames alone keep readers safe
        yield
        return
    fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX)
        yield
    finally:
        os.close(fd)  # closing releases the lock


def _read_checked(path: str, sha: str, *, warn: bool = False) -> bytes | None:
    """The file's bytes if they hash to ``sha``, else None (missing or damaged).

    A damaged file is left in place: only the process holding the version's
    lock replaces it (atomically), so no process can delete a good copy that
    another has just written.
    """
    try:
        with open(path, "rb") as f:
            data = f.read()
    except FileNotFoundError:
        return None
    got = hashlib.sha256(data).hexdigest()
    if got == sha:
        return data
    if warn:
        log.warning("cached cut table %s is damaged (expected sha256 %s, got %s); downloading it again",
                    path, sha, got)
    return None


def _write_atomic(folder: str, name: str, data: bytes) -> None:
    fd, tmp = tempfile.mkstemp(prefix=".tmp-", dir=folder)
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, os.path.join(folder, name))
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.remove(tmp)
        raise


def _check_unchanged(folder: str, url: str, v: int, sha: str) -> None:
    try:
        names = os.listdir(folder)
    except FileNotFoundError:
        return
    for n in names:
        m = _NAME_RE.fullmatch(n)
        if m and int(m.group(1)) == v and m.group(2) != sha:
            raise FormatError(
                f"cut table {url} version {v}: expected the document cached as sha256 {m.group(2)}, "
                f"got sha256 {sha} from the table; a published version never changes, so the table "
                f"was rebuilt or altered. If that was intended, remove {os.path.join(folder, n)}")


def read_document(store, version: int | None, cache_dir: str) -> tuple[int, bytes, bool]:
    """``(version, document bytes, served_from_cache)`` of a table, through the cache.

    Parameters
    ----------
    store : sketchmerge.store.TableStore
        The table.
    version : int or None
        A pinned version, or None for the current one.
    cache_dir : str
        The cache folder (created when missing).

    Raises
    ------
    NoInputError
        when nothing, or not that version, is published.
    FormatError
        when the downloaded document does not match its manifest's sha256, or
        when the cache holds another document under the same version.
    """
    if version is None:
        v = store.current()
        if v is None:
            raise NoInputError(f"table {store.url}: expected a published version, got none")
    else:
        v = int(version)
    sha = _source_sha256(store, v)
    folder = os.path.join(os.fspath(cache_dir), table_key(store.url))
    name = f"v{v:08d}-{sha}.cuts"
    path = os.path.join(folder, name)
    data = _read_checked(path, sha)
    if data is not None:
        return v, data, True
    os.makedirs(folder, exist_ok=True)
    _check_unchanged(folder, store.url, v, sha)
    with _locked(os.path.join(folder, f"v{v:08d}.lock")):
        data = _read_checked(path, sha, warn=True)  # another process may have finished meanwhile
        if data is not None:
            return v, data, True
        got_v, data = store.read_version(v)
        got = hashlib.sha256(data).hexdigest()
        if got_v != v or got != sha:
            raise FormatError(f"cut table {store.url} version {v}: expected a document with sha256 {sha} "
                              f"(its manifest), got sha256 {got}")
        _write_atomic(folder, name, data)
    return v, data, False
