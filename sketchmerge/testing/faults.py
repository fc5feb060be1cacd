"""A fault-injecting fsspec filesystem for reliability tests.

:class:`FaultyFileSystem` wraps any fsspec filesystem (local disk, ``memory://``,
S3...) and, deterministically from a seed, makes some of its calls fail the way
object storage fails in production:

* **transient errors**: the call raises :class:`ConnectionError`,
  :class:`TimeoutError`, or an :class:`OSError` with errno ``ECONNRESET`` or
  ``ETIMEDOUT`` (Python gives those their subclasses ``ConnectionResetError``
  and ``TimeoutError``);
* **timeouts**: the call hangs for ``timeout_seconds`` and then raises
  :class:`TimeoutError`, like a socket read timeout;
* **short reads**: ``read(n)`` on an open file returns fewer than ``n`` bytes
  although more are available (legal for raw streams; a reader must loop);
* **truncated objects**: an opened object (or ``cat_file``) ends early although
  its listing reports the full size, like a response body cut off mid-transfer;
* **slow storage**: every read of an open file waits ``latency_seconds``;
* **permanent failures**: every call on paths matching ``permanent`` raises
  (:class:`PermissionError` by default), every read of paths matching
  ``truncated`` is cut short.

It is registered with fsspec under the protocol ``faulty`` when this module is
imported, so a test builds from ``faulty://...`` with the wrapper's settings as
storage options.  The path after ``faulty://`` is the *target* filesystem's own
path: ``faulty:///tmp/data`` wraps the local folder ``/tmp/data``,
``faulty:///lake`` with ``target_protocol="memory"`` wraps ``memory://lake``,
and ``faulty://bucket/prefix`` with ``target_protocol="s3"`` wraps
``s3://bucket/prefix``.  Other processes (``dask worker``) must import this
module too, for example with ``dask worker --preload sketchmerge.testing.faults``.

Determinism
-----------
Whether the k-th call of one operation on one path fails depends only on
``(seed, operation, path, k)`` (a SHA-256 of them), not on thread scheduling,
so a build with several worker threads sees the same faults on the same calls
of each path run after run.  ``fail_calls`` fails the N-th call of the whole
filesystem instance (1-based, counted over the chosen operations), which does
depend on call order across threads.

Every setting is plain JSON (numbers, strings, lists), so the settings travel
to Dask workers as ordinary storage options.  All instances with the same
settings in one process (fsspec makes one per thread) share one set of call
counters and statistics; :meth:`FaultyFileSystem.reset` starts them again.

Examples
--------
>>> import fsspec
>>> import sketchmerge.testing.faults as faults
>>> mem = fsspec.filesystem("memory")
>>> mem.pipe_file("/fault-doc/a.bin", b"0123456789")
>>> fs = fsspec.filesystem("faulty", target_protocol="memory", fail_calls=[1],
...                        error_kinds=["reset"], seed=7)
>>> try:
...     fs.cat_file("/fault-doc/a.bin")
... except ConnectionResetError as e:
...     print("injected:", e.errno == faults.errno.ECONNRESET)
injected: True
>>> fs.cat_file("/fault-doc/a.bin")
b'0123456789'
>>> fs.stats["faults"]
1
"""

from __future__ import annotations

import errno
import fnmatch
import hashlib
import io
import json
import threading
import time
from typing import Any

import fsspec
from fsspec.spec import AbstractFileSystem

__all__ = ["ERROR_KINDS", "FaultyFile", "FaultyFileSystem", "OPERATIONS", "PROTOCOL", "register"]

PROTOCOL = "faulty"

#: kinds of injected transient errors
ERROR_KINDS = ("connection", "timeout", "reset", "etimedout", "hang")

#: operation families that faults can be limited to
OPERATIONS = ("list", "info", "open", "read", "write")

_PERMANENT_KINDS = ("permission", "reset", "connection", "timeout")

_OPS = {
    # method name -> operation family
    "ls": "list", "find": "list", "glob": "list", "walk": "list", "du": "list",
    "info": "info", "exists": "info", "isfile": "info", "isdir": "info", "size": "info",
    "modified": "info", "created": "info", "checksum": "info", "ukey": "info",
    "cat_file": "read", "cat_ranges": "read",
    "pipe_file": "write", "rm_file": "write", "rm": "write", "mkdir": "write",
    "makedirs": "write", "rmdir": "write", "touch": "write", "cp_file": "write", "mv": "write",
    "put_file": "write", "get_file": "read",
}


class _State:
    """Call counters and statistics shared by the instances of one settings (per process)."""

    def __init__(self):
        self.lock = threading.Lock()
        self.reset()

    def reset(self) -> None:
        with self.lock:
            self.calls = 0
            self.per_key: dict[tuple[str, str], int] = {}
            self.stats = {"calls": 0, "faults": 0, "short_reads": 0, "truncations": 0, "permanent": 0}
            self.log: list[tuple[int, str, str, str]] = []


_STATES: dict[str, _State] = {}
_STATES_LOCK = threading.Lock()


def _u(seed: int, *parts: Any) -> float:
    """A uniform number in [0, 1) from the seed and the parts (stable across processes)."""
    h = hashlib.sha256("|".join([str(seed), *map(str, parts)]).encode()).digest()
    return int.from_bytes(h[:8], "little") / 2.0**64


def _listed(v):
    """A list setting given as a list, a single value, or comma-separated text."""
    if v is None:
        return None
    if isinstance(v, str):
        return [p for p in (x.strip() for x in v.split(",")) if p]
    if isinstance(v, (int, float)):
        return [v]
    return list(v)


def _make_error(kind: str, what: str) -> OSError:
    msg = f"injected {kind} fault on {what}"
    if kind == "connection":
        e: OSError = ConnectionError(msg)
    elif kind in ("timeout", "hang"):
        e = TimeoutError(msg)
    elif kind == "reset":
        e = OSError(errno.ECONNRESET, msg)        # becomes ConnectionResetError
    elif kind == "etimedout":
        e = OSError(errno.ETIMEDOUT, msg)         # becomes TimeoutError
    elif kind == "permission":
        e = PermissionError(errno.EACCES, msg)
    else:  # pragma: no cover - validated in __init__
        raise ValueError(kind)
    e.injected = True
    return e


class FaultyFileSystem(AbstractFileSystem):
    """Wrap an fsspec filesystem and inject storage faults (see the module notes).

    Parameters
    ----------
    target_protocol : str
        Protocol of the wrapped filesystem (``"file"``, ``"memory"``, ``"s3"``...).
    target_options : dict, optional
        Storage options of the wrapped filesystem (credentials, endpoint).
    seed : int
        Seeds every decision.
    rate : float
        Chance that a call raises a transient error (of a kind from ``error_kinds``).
    List settings also accept one value or comma-separated text (as given by
    ``--storage-option error_kinds=reset,timeout``).  (fsspec's ``url_to_fs``
    keeps some option names for itself, ``errors`` among them, hence the names.)

    error_kinds : list of str
        Kinds to choose from: ``"connection"`` (ConnectionError), ``"timeout"``
        (TimeoutError), ``"reset"`` (OSError ECONNRESET), ``"etimedout"``
        (OSError ETIMEDOUT), ``"hang"`` (sleep ``timeout_seconds``, then
        TimeoutError).  Default: all of them.
    fail_calls : list of int
        Fail exactly these calls of the instance (1-based, over ``ops``).
    short_read_rate : float
        Chance that one ``read(n)`` on an open file returns fewer bytes than
        asked and available.
    truncate_rate : float
        Chance that one opened object, or one ``cat_file``, ends early.
    permanent : list of str
        fnmatch patterns: every call on a matching path raises
        ``permanent_error``.
    permanent_error : str
        ``"permission"`` (PermissionError, default), ``"reset"``,
        ``"connection"`` or ``"timeout"``.
    truncated : list of str
        fnmatch patterns: every read of a matching object ends early.
    ops : list of str
        Operation families that get transient faults: ``"list"``, ``"info"``,
        ``"open"``, ``"read"``, ``"write"``.  Default: all.
    max_faults : int, optional
        Stop injecting transient faults after this many (per instance).
    timeout_seconds : float
        How long a ``"hang"`` lasts.
    latency_seconds : float
        Every ``read`` of an open file and every ``cat_file`` waits this long
        first (slow storage widens race windows in readers).
    """

    protocol = (PROTOCOL,)
    root_marker = ""

    def __init__(self, target_protocol: str = "file", target_options: dict | None = None, *,
                 seed: int = 0, rate: float = 0.0, error_kinds=None, fail_calls=(),
                 short_read_rate: float = 0.0, truncate_rate: float = 0.0, permanent=(),
                 permanent_error: str = "permission", truncated=(), ops=None,
                 max_faults: int | None = None, timeout_seconds: float = 0.05,
                 latency_seconds: float = 0.0, **kwargs):
        super().__init__(**kwargs)
        # from the command line (--storage-option error_kinds=reset,timeout) lists arrive as text
        error_kinds, ops, permanent, truncated, fail_calls = (
            _listed(error_kinds), _listed(ops), _listed(permanent), _listed(truncated), _listed(fail_calls))
        if target_protocol == PROTOCOL:
            raise ValueError("target_protocol: expected another filesystem, got 'faulty'")
        kinds = tuple(error_kinds) if error_kinds is not None else ERROR_KINDS
        bad = [k for k in kinds if k not in ERROR_KINDS]
        if bad or not kinds:
            raise ValueError(f"error_kinds: expected kinds from {list(ERROR_KINDS)}, got {list(kinds)}")
        fams = tuple(ops) if ops is not None else OPERATIONS
        bad = [o for o in fams if o not in OPERATIONS]
        if bad:
            raise ValueError(f"ops: expected families from {list(OPERATIONS)}, got {bad}")
        if permanent_error not in _PERMANENT_KINDS:
            raise ValueError(f"permanent_error: expected one of {list(_PERMANENT_KINDS)}, "
                             f"got {permanent_error!r}")
        for name, r in (("rate", rate), ("short_read_rate", short_read_rate),
                        ("truncate_rate", truncate_rate)):
            if not 0.0 <= float(r) <= 1.0:
                raise ValueError(f"{name}: expected a probability in [0, 1], got {r!r}")
        self.target = fsspec.filesystem(target_protocol, **dict(target_options or {}))
        self.target_protocol = target_protocol
        self.seed = int(seed)
        self.rate = float(rate)
        self.errors = kinds
        self.fail_calls = frozenset(int(n) for n in fail_calls)
        self.short_read_rate = float(short_read_rate)
        self.truncate_rate = float(truncate_rate)
        self.permanent = tuple(permanent)
        self.permanent_error = permanent_error
        self.truncated = tuple(truncated)
        self.ops = fams
        self.max_faults = None if max_faults is None else int(max_faults)
        self.timeout_seconds = float(timeout_seconds)
        self.latency_seconds = float(latency_seconds)
        # fsspec keeps one instance per thread: the counters live in one state per process
        # and settings, so threads of one worker share them (and the N-th call is per process)
        key = json.dumps([target_protocol, target_options, self.seed, self.rate, kinds,
                          sorted(self.fail_calls), self.short_read_rate, self.truncate_rate,
                          self.permanent, permanent_error, self.truncated, fams, self.max_faults,
                          self.timeout_seconds, self.latency_seconds], sort_keys=True, default=str)
        with _STATES_LOCK:
            self._state = _STATES.get(key)
            if self._state is None:
                self._state = _STATES[key] = _State()

    # ------------------------------------------------------------------ bookkeeping
    @property
    def _lock(self) -> threading.Lock:
        return self._state.lock

    @property
    def stats(self) -> dict[str, int]:
        """Counts of ``calls``, ``faults`` (transient), ``short_reads``, ``truncations``, ``permanent``."""
        return self._state.stats

    @property
    def log(self) -> list[tuple[int, str, str, str]]:
        """The first 10,000 injected faults: (call number or -1, operation, path, kind)."""
        return self._state.log

    @property
    def _per_key(self) -> dict[tuple[str, str], int]:
        return self._state.per_key

    def reset(self) -> None:
        """Zero the call counters and statistics (fault decisions start again)."""
        self._state.reset()

    @classmethod
    def _strip_protocol(cls, path):
        if isinstance(path, (list, tuple)):
            return [cls._strip_protocol(p) for p in path]
        path = str(path)
        for prefix in (PROTOCOL + "://", PROTOCOL + "::"):
            if path.startswith(prefix):
                path = path[len(prefix):]
                break
        if len(path) > 1:
            path = path.rstrip("/")
        return path

    def unstrip_protocol(self, name: str) -> str:
        return f"{PROTOCOL}://{name}"

    def _matches(self, path: str, patterns) -> bool:
        return any(fnmatch.fnmatchcase(path, p) for p in patterns)

    def _tick(self, op: str, path: str) -> tuple[int, int]:
        st = self._state
        with st.lock:
            st.calls += 1
            st.stats["calls"] += 1
            k = st.per_key.get((op, path), 0) + 1
            st.per_key[(op, path)] = k
            return st.calls, k

    def _record(self, n: int, op: str, path: str, kind: str, stat: str) -> None:
        with self._lock:
            self.stats[stat] += 1
            if len(self.log) < 10_000:
                self.log.append((n, op, path, kind))

    def _budget_left(self) -> bool:
        return self.max_faults is None or self.stats["faults"] < self.max_faults

    def _check(self, method: str, path, family: str | None = None) -> None:
        """Count one call; raise an injected error if this call is chosen to fail."""
        fam = family or _OPS.get(method, "info")
        p = path if isinstance(path, str) else ",".join(map(str, path)) if path else ""
        if self.permanent and isinstance(path, str) and self._matches(path, self.permanent):
            n, _ = self._tick(method, p)
            self._record(n, method, p, self.permanent_error, "permanent")
            raise _make_error(self.permanent_error, f"{method} {p} (permanent)")
        if fam not in self.ops:
            return
        n, k = self._tick(method, p)
        chosen = n in self.fail_calls or (self.rate > 0 and _u(self.seed, "err", method, p, k) < self.rate)
        if not chosen or not self._budget_left():
            return
        kind = self.errors[int(_u(self.seed, "kind", method, p, k) * len(self.errors))]
        self._record(n, method, p, kind, "faults")
        if kind == "hang":
            time.sleep(self.timeout_seconds)
        raise _make_error(kind, f"{method} {p} (call {n})")

    def _truncate_at(self, path: str, size: int, salt: Any) -> int | None:
        """Where an object read ends early, or None for a whole read."""
        permanent = bool(self.truncated) and self._matches(path, self.truncated)
        if not permanent:
            if self.truncate_rate <= 0 or "read" not in self.ops or not self._budget_left():
                return None
            if _u(self.seed, "trunc", path, salt) >= self.truncate_rate:
                return None
        cut = int(size * _u(self.seed, "cut", path, salt)) if size > 0 else 0
        self._record(-1, "truncate", path, "permanent" if permanent else "transient",
                     "permanent" if permanent else "truncations")
        if not permanent:
            with self._lock:
                self.stats["faults"] += 1
        return cut

    # ------------------------------------------------------------------ delegation
    def _call(self, method: str, path, *args, **kwargs):
        self._check(method, path)
        return getattr(self.target, method)(path, *args, **kwargs)

    def ls(self, path, detail=True, **kwargs):
        return self._call("ls", path, detail=detail, **kwargs)

    def info(self, path, **kwargs):
        return self._call("info", path, **kwargs)

    def find(self, path, maxdepth=None, withdirs=False, detail=False, **kwargs):
        return self._call("find", path, maxdepth=maxdepth, withdirs=withdirs, detail=detail, **kwargs)

    def glob(self, path, maxdepth=None, **kwargs):
        return self._call("glob", path, maxdepth=maxdepth, **kwargs)

    def walk(self, path, *args, **kwargs):
        self._check("walk", path)
        return self.target.walk(path, *args, **kwargs)

    def du(self, path, *args, **kwargs):
        return self._call("du", path, *args, **kwargs)

    def exists(self, path, **kwargs):
        return self._call("exists", path, **kwargs)

    def isfile(self, path):
        return self._call("isfile", path)

    def isdir(self, path):
        return self._call("isdir", path)

    def size(self, path):
        return self._call("size", path)

    def modified(self, path):
        return self._call("modified", path)

    def created(self, path):
        return self._call("created", path)

    def checksum(self, path):
        return self._call("checksum", path)

    def ukey(self, path):
        return self._call("ukey", path)

    def invalidate_cache(self, path=None):
        self.target.invalidate_cache(path)

    def _parent(self, path):
        return self.target._parent(path)

    def cat_file(self, path, start=None, end=None, **kwargs):
        self._check("cat_file", path)
        with self._lock:
            n = self._per_key.get(("cat_file", path), 0)
        if self.latency_seconds > 0:
            time.sleep(self.latency_seconds)
        data = self.target.cat_file(path, start=start, end=end, **kwargs)
        cut = self._truncate_at(path, len(data), ("cat", n, start, end))
        return data if cut is None else data[:cut]

    def cat_ranges(self, paths, starts, ends, max_gap=None, on_error="return", **kwargs):
        out = []
        for p, s, e in zip(paths, starts, ends):
            try:
                out.append(self.cat_file(p, start=s, end=e))
            except Exception as err:  # noqa: BLE001 - per-range errors, like fsspec
                if on_error == "raise":
                    raise
                out.append(err)
        return out

    def pipe_file(self, path, value, **kwargs):
        return self._call("pipe_file", path, value, **kwargs)

    def rm_file(self, path):
        return self._call("rm_file", path)

    def rm(self, path, recursive=False, maxdepth=None):
        self._check("rm", path if isinstance(path, str) else list(path))
        return self.target.rm(path, recursive=recursive, maxdepth=maxdepth)

    def mkdir(self, path, create_parents=True, **kwargs):
        return self._call("mkdir", path, create_parents=create_parents, **kwargs)

    def makedirs(self, path, exist_ok=False):
        return self._call("makedirs", path, exist_ok=exist_ok)

    def rmdir(self, path):
        return self._call("rmdir", path)

    def touch(self, path, truncate=True, **kwargs):
        return self._call("touch", path, truncate=truncate, **kwargs)

    def cp_file(self, path1, path2, **kwargs):
        self._check("cp_file", path1)
        return self.target.cp_file(path1, path2, **kwargs)

    def mv(self, path1, path2, *args, **kwargs):
        self._check("mv", path1)
        return self.target.mv(path1, path2, *args, **kwargs)

    def put_file(self, lpath, rpath, *args, **kwargs):
        self._check("put_file", rpath)
        return self.target.put_file(lpath, rpath, *args, **kwargs)

    def get_file(self, rpath, lpath, *args, **kwargs):
        self._check("get_file", rpath)
        return self.target.get_file(rpath, lpath, *args, **kwargs)

    def _open(self, path, mode="rb", block_size=None, autocommit=True, cache_options=None, **kwargs):
        writing = any(c in mode for c in "wax+")
        self._check("open", path, "write" if writing else "open")
        if block_size is not None:
            kwargs["block_size"] = block_size
        if cache_options is not None:
            kwargs["cache_options"] = cache_options
        inner = self.target.open(path, mode, autocommit=autocommit, **kwargs) \
            if writing else self.target.open(path, mode, **kwargs)
        if writing:
            return inner
        with self._lock:
            opened = self._per_key.get(("open", path), 0)
        size = None
        try:
            size = int(self.target.size(path))
        except Exception:  # noqa: BLE001 - size only matters for truncation
            size = None
        cut = self._truncate_at(path, size, ("open", opened)) if size is not None else None
        return FaultyFile(self, inner, path, cut, opened)


class FaultyFile(io.RawIOBase):
    """A read-only file of :class:`FaultyFileSystem`: delegates to the target's file,
    with injected errors, short reads and early ends."""

    def __init__(self, fs: FaultyFileSystem, inner, path: str, cut: int | None, opened: int):
        super().__init__()
        self.fs = fs
        self.inner = inner
        self.path = path
        self.cut = cut
        self.opened = opened
        self.reads = 0

    # the attributes pyarrow and fsspec callers look at
    @property
    def size(self):
        return getattr(self.inner, "size", None)

    @property
    def mode(self):
        return "rb"

    @property
    def name(self):
        return self.path

    def readable(self) -> bool:
        return True

    def seekable(self) -> bool:
        return True

    def writable(self) -> bool:
        return False

    def tell(self) -> int:
        return self.inner.tell()

    def seek(self, offset, whence=0):
        return self.inner.seek(offset, whence)

    def read(self, size=-1):
        self.reads += 1
        self.fs._check("read", self.path, "read")
        if self.fs.latency_seconds > 0:
            time.sleep(self.fs.latency_seconds)
        pos = self.inner.tell()
        if self.cut is not None:
            if pos >= self.cut:
                return b""
            room = self.cut - pos
            size = room if size is None or size < 0 else min(size, room)
        data = self.inner.read(-1 if size is None else size)
        fs = self.fs
        if (fs.short_read_rate > 0 and len(data) > 1 and "read" in fs.ops and fs._budget_left()
                and _u(fs.seed, "short", self.path, self.opened, self.reads) < fs.short_read_rate):
            keep = 1 + int(_u(fs.seed, "keep", self.path, self.opened, self.reads) * (len(data) - 1))
            self.inner.seek(pos + keep)
            data = data[:keep]
            fs._record(-1, "read", self.path, "short", "short_reads")
            with fs._lock:
                fs.stats["faults"] += 1
        return data

    def readinto(self, b) -> int:
        data = self.read(len(b))
        n = len(data)
        b[:n] = data
        return n

    def readall(self) -> bytes:
        chunks = []
        while True:
            c = self.read(1 << 20)
            if not c:
                return b"".join(chunks)
            chunks.append(c)

    def close(self) -> None:
        if not self.closed:
            try:
                self.inner.close()
            finally:
                super().close()

    def __getattr__(self, name):
        # anything else (e.g. ``details``, ``loc``) comes from the wrapped file
        inner = self.__dict__.get("inner")
        if inner is None:
            raise AttributeError(name)
        return getattr(inner, name)


def register() -> None:
    """Register :class:`FaultyFileSystem` with fsspec under ``faulty`` (idempotent)."""
    fsspec.register_implementation(PROTOCOL, FaultyFileSystem, clobber=True)


register()
