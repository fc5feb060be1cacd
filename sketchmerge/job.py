"""The distributed build: from a dataset URL to a published cut table, on Dask.

Flow (docs/TREE.md has the reduction tree and its cost):

1. The driver lists the dataset and plans work units (:mod:`sketchmerge.sources`).
2. Each unit gets a cache key: a hash of its fingerprint and of every build
   option that affects summaries.  Units whose blob is already cached under
   TABLE are reused, the others become sketch tasks.
3. Sketch tasks run on the workers: each opens its unit itself, reads only the
   selected columns, computes row weights, builds one pruned summary per
   feature and returns one summary-set blob (and caches it).  Arrays never
   travel; only the unit's address goes out and a blob comes back.
4. Merge tasks (fan-in ``fan_in``) merge and prune on the workers, bottom-up
   over a tree fixed by the sorted unit addresses; cached merge nodes are
   reused whole.  The driver receives only the root blob.
5. The driver derives edges, encodes the table and publishes it as a new
   immutable version (:mod:`sketchmerge.store`), unless nothing changed.

Task keys are hashes of their inputs, so retries and reruns are the same work
and the published content is byte-identical whatever the worker count or the
scheduling order.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import sys
import threading
import time
from dataclasses import dataclass, field

import numpy as np

from . import config
from ._version import __version__
from .blob import FORMAT_VERSION, decode_summary_set, encode_summary_set, open_summary_set
from .cuts import decode_table, default_rank_error, encode_table, feature_cuts
from .errors import FormatError, InputError, PublishRaceError, SchedulerUnavailableError, StorageError
from .summary import Summary
from .tree import a_priori_bound, plan_tree
from .weights import validate_loss

__all__ = ["BuildSpec", "build", "sketch_unit", "merge_blobs"]

log = logging.getLogger("sketchmerge")

#: bumped whenever the per-unit sketch algorithm changes what it produces
SKETCH_ALGORITHM = 1


@dataclass(frozen=True)
class BuildSpec:
    """What every sketch task needs besides its unit (pickled to the workers)."""

    features: tuple[str, ...]
    weight_column: str | None
    hessian: str | None
    prediction_column: str | None
    prediction_scale: str | None
    missing_weight: str
    leaf_capacity: int
    protocol: str
    dtypes: tuple = ()  # (feature, unified source type) pairs: files lacking a column report no type
    storage_options: dict = field(default_factory=dict, repr=False, compare=False)
    table_url: str = ""
    table_options: dict = field(default_factory=dict, repr=False, compare=False)

    def summary_options(self) -> dict:
        """The options that change what a unit's summaries are (no credentials)."""
        return {"features": list(self.features), "weight_column": self.weight_column,
                "hessian": self.hessian, "prediction_column": self.prediction_column,
                "prediction_scale": self.prediction_scale, "missing_weight": self.missing_weight,
                "leaf_capacity": self.leaf_capacity, "dtypes": [list(p) for p in self.dtypes],
                "algorithm": SKETCH_ALGORITHM,
                "format": FORMAT_VERSION}

    def options_hash(self) -> str:
        return hashlib.sha256(json.dumps(self.summary_options(), sort_keys=True).encode()).hexdigest()

    def columns_to_read(self) -> list[str]:
        cols = list(self.features)
        for c in (self.weight_column, self.prediction_column if self.hessian not in (None, "squared") else None):
            if c and c not in cols:
                cols.append(c)
        return cols


# --------------------------------------------------------------------------- worker side
_STORES: dict = {}


def _store(url: str, options: dict):
    from .store import TableStore

    k = (url, json.dumps(options, sort_keys=True, default=str))
    st = _STORES.get(k)
    if st is None:
        st = _STORES[k] = TableStore(url, storage_options=options or None)
    return st


def _row_weights(arrays: dict, spec: BuildSpec, where: str, rows: int) -> np.ndarray | None:
    from .summary import check_weights
    from .weights import hessian

    w = None
    if spec.weight_column:
        w = arrays[spec.weight_column]
        bad = np.isnan(w)
        if bad.any():
            if spec.missing_weight == "error":
                raise InputError(f"{where}: weight column {spec.weight_column!r} is missing at row "
                                 f"{int(np.argmax(bad))} (use --missing-weight zero to give such rows no weight)")
            w = np.where(bad, 0.0, w)
        w = check_weights(w, rows, f"{where}: weight column {spec.weight_column!r}")
    checked = w
    if spec.hessian and spec.hessian != "squared":
        p = arrays[spec.prediction_column]
        bad = np.isnan(p)
        if bad.any():
            if spec.missing_weight == "error":
                raise InputError(f"{where}: prediction column {spec.prediction_column!r} is missing at row "
                                 f"{int(np.argmax(bad))} (use --missing-weight zero to give such rows no weight)")
        h = hessian(spec.hessian, np.where(bad, 0.5 if spec.hessian == "logistic" else 0.0, p),
                    spec.prediction_scale, where=f"{where}: prediction column {spec.prediction_column!r}")
        if bad.any():
            h = np.where(bad, 0.0, h)
        if w is not None:
            with np.errstate(over="ignore"):  # an overflow is caught by the check below
                w = w * h
        else:
            w = h
    if w is not None and w is not checked:  # once per unit: the features' sketches trust it
        w = check_weights(w, rows, f"{where}: row weights")
    return w


def with_retries(fn, what: str, attempts: int | None = None, base_delay: float = 0.2):
    """Call ``fn``, retrying transient storage errors (StorageError) with exponential backoff.

    Bad input (InputError, FormatError...) is deterministic and fails at once: retrying it
    would only repeat the same error, which is why dask's own task retries stay off.
    """
    n = int(config.get("retries", attempts)) + 1
    for i in range(n):
        try:
            return fn()
        except StorageError as e:
            if i == n - 1:
                raise StorageError(f"{what}: still failing after {n} attempts: {e}") from e
            delay = base_delay * (2 ** i)
            log.warning("%s: transient storage error (%s); retrying in %.1f s", what, e, delay)
            time.sleep(delay)


def _with_dtype(s: Summary, dtype: str) -> Summary:
    if s.dtype == dtype:
        return s
    return Summary(s.values, s.rmin, s.rmax, s.weights, total_weight=s.total_weight, count=s.count,
                   missing_count=s.missing_count, missing_weight=s.missing_weight, bound=s.bound,
                   exact=s.is_exact, dtype=dtype)


def _leaf(x: np.ndarray, w, capacity: int) -> Summary:
    """``Summary.from_values(x, w, capacity=capacity)`` for weights :func:`_row_weights`
    has validated already (once per unit rather than once per feature)."""
    from .summary import _check_capacity, check_values

    raw = np.asarray(x)
    return Summary._from_checked(check_values(raw), w, raw.dtype.name, _check_capacity(capacity))


_POOL = None
_POOL_LOCK = threading.Lock()
_ACTIVE = [0]  # sketch and merge tasks running in this process
_THREADS = [None]  # threads the embedded scheduler was given (None: one per core)
_CPUS = os.cpu_count() or 1


def _feature_pool():
    """The process's pool for per-feature work (one thread per core, shared by every task).

    A task hands its features to it only while fewer tasks than cores are running (the
    new unit of a nightly refresh, the merges on its path): then one task uses every
    core.  When every core has a task of its own, features run in the task's thread, since
    more threads than cores only fight over the GIL.  The sketch core and the merge
    release the GIL in their compiled kernels.
    """
    global _POOL
    with _POOL_LOCK:
        if _POOL is None:
            from concurrent.futures import ThreadPoolExecutor

            _POOL = ThreadPoolExecutor(max_workers=max(1, os.cpu_count() or 1),
                                       thread_name_prefix="sketchmerge-feature")
        return _POOL


class _Running:
    """Counts a task as running; ``spare`` tells whether a core has no task of its own."""

    def __enter__(self):
        with _POOL_LOCK:
            _ACTIVE[0] += 1
        return self

    def __exit__(self, *exc):
        with _POOL_LOCK:
            _ACTIVE[0] -= 1

    @staticmethod
    def spare() -> bool:
        return _ACTIVE[0] < _threads_here()


def _threads_here() -> int:
    """Threads this process runs tasks on: the embedded scheduler's, a Dask worker's
    ``nthreads``, or one per core."""
    if _THREADS[0]:
        return _THREADS[0]
    if "distributed" in sys.modules:
        try:
            from distributed import get_worker

            wk = get_worker()
            n = getattr(getattr(wk, "state", None), "nthreads", None) or getattr(wk, "nthreads", None)
            if n:
                return int(n)
        except Exception:  # noqa: BLE001 - not inside a worker
            pass
    return _CPUS


class _Now:
    """A finished future: the inline stand-in for a pool submission."""

    def __init__(self, fn, *args):
        self._fn, self._args = fn, args

    def result(self):
        return self._fn(*self._args)

    def cancel(self):
        return True


def _submit(parallel: bool, fn, *args):
    return _feature_pool().submit(fn, *args) if parallel else _Now(fn, *args)


def _sketch_one(name, a, w, capacity, dtype, where):
    try:
        s = _leaf(a, w, capacity)
    except InputError as e:
        raise InputError(f"{where}, column {name!r}: {e}") from None
    return _with_dtype(s, dtype)


def _sketch_part(unit, spec: BuildSpec, names: list, w, rows: int, where: str) -> dict:
    """Read and sketch some of a unit's feature columns, one at a time, in this thread
    (with a reader of its own: two threads never share one open file)."""
    from .sources import iter_unit

    cols = iter_unit(unit, names, protocol=spec.protocol,
                     storage_options=spec.storage_options or None, views=frozenset(names))
    unified = dict(spec.dtypes)
    out = {}
    try:
        n = next(cols)
        if n != rows:
            raise InputError(f"{where}: expected {rows} rows, got {n} on a second read: "
                             "the file changed during the build")
        for name, a, dtype in cols:
            out[name] = _sketch_one(name, a, w, spec.leaf_capacity,
                                    unified.get(name) or dtype or "float64", where)
            del a
    finally:
        cols.close()
    return out


def _sketch_columns(unit, spec: BuildSpec, where: str) -> tuple[dict, int]:
    """Summaries of one unit's features, reading the weight inputs first and then one
    feature column at a time, each dropped once its summary is built: a task holds the
    weights, one or two feature columns and the summaries, not every selected column.

    When this process has a core without a task of its own (the new unit of a nightly
    refresh, the last units of a build), every other feature is read and sketched by a
    pool thread with its own reader, so the two halves run side by side; otherwise all
    of it runs in the task's thread, since more threads than cores only fight over the
    GIL.  Either way the summaries, and so the blob, are the same.
    """
    from .sources import iter_unit

    feats = list(spec.features)
    side = [c for c in spec.columns_to_read() if c not in spec.features]
    other = feats[1::2] if len(feats) > 1 and _Running.spare() else []
    mine = [f for f in feats if f not in set(other)]
    cols = iter_unit(unit, side + mine, protocol=spec.protocol,
                     storage_options=spec.storage_options or None,
                     views=frozenset(mine))  # the side columns are kept: copies
    unified = dict(spec.dtypes)
    sums, fut = {}, None
    try:
        rows = next(cols)
        arrays = {}
        for _ in side:
            name, a, _dtype = next(cols)
            arrays[name] = a
        w = _row_weights(arrays, spec, where, rows)
        del arrays
        if other:
            fut = _feature_pool().submit(_sketch_part, unit, spec, other, w, rows, where)
        for name, a, dtype in cols:
            sums[name] = _sketch_one(name, a, w, spec.leaf_capacity,
                                     unified.get(name) or dtype or "float64", where)
            del a
        if fut is not None:
            f, fut = fut, None
            sums.update(f.result())
    finally:
        if fut is not None:  # an error on this side: let the other half finish first
            fut.exception()
        cols.close()
    return {f: sums[f] for f in feats}, rows


def sketch_unit(unit, spec: BuildSpec, key: str):
    """Worker task: read one unit, sketch every feature and cache the blob in TABLE.

    Returns ``("stored", key)``: the merge above reads the blob back from the table, so
    the scheduler holds a key per finished task instead of its blob (a level of the tree
    waiting for its parent held every one of its blobs).  Without a table, the blob.
    """
    where = f"unit {unit.address}"
    with _Running():
        sums, rows = with_retries(lambda: _sketch_columns(unit, spec, where),
                                  f"reading unit {unit.address}")
    blob = encode_summary_set(sums, {"rows": int(rows)})
    if spec.table_url:
        _store(spec.table_url, spec.table_options).put_blob(key, blob)
        return ("stored", key)
    return blob


def _merge_one(sets: list, i: int, capacity: int) -> Summary:
    parts = [s.summary(i) for s in sets]  # this feature's summaries only
    return parts[0].merge(*parts[1:]).prune(capacity)


def merge_blobs(blobs: list[bytes], capacity: int) -> bytes:
    """Merge summary-set blobs feature by feature and prune to ``capacity``.

    Children are opened (checked) first and each feature's summaries are decoded only
    when that feature is merged, so a merge holds one or two features' decoded children
    at a time, not all of them.
    """
    sets = [open_summary_set(b) for b in blobs]
    names = sets[0].names
    for s in sets[1:]:
        if s.names != names:
            raise FormatError(f"merge: expected the same features in every child, got {s.names} and {names}")
    parallel = _Running.spare()
    futs = [_submit(parallel, _merge_one, sets, i, capacity) for i in range(len(names))]
    out = {}
    for n, f in zip(names, futs):
        out[n] = f.result()
    rows = sum(int(s.meta.get("rows", 0)) for s in sets)
    return encode_summary_set(out, {"rows": rows})


def _is_ref(c) -> bool:
    return isinstance(c, tuple) and len(c) == 2 and c[0] in ("cached", "stored")


class UnreadableCacheError(FormatError):
    """A blob reused from the table's cache is missing or fails its checks.

    Blobs are cache entries written without fsync (store.put_blob), so a crash can lose
    or tear one; :func:`build` then sketches that subtree again instead of failing.
    """

    def __init__(self, message: str, key: str):
        super().__init__(message)
        self.key = key

    def __reduce__(self):  # picklable from a worker process
        return (type(self), (str(self), self.key))


def merge_task(children: list, capacity: int, key: str, table_url: str, table_options: dict):
    """Worker task: merge children (blobs, or keys of blobs in TABLE: cached by an earlier
    build or stored by this one) and cache the result; returns ``("stored", key)`` (or,
    without a table, the blob)."""
    st = _store(table_url, table_options) if table_url else None
    want = [c[1] for c in children if _is_ref(c)]
    fetched = st.get_blobs(want) if (want and st is not None) else {}
    blobs = []
    for c in children:
        if _is_ref(c):
            b = fetched.pop(c[1], None)
            if b is None:
                if c[0] == "cached":
                    raise UnreadableCacheError(f"cached blob {c[1]} is missing from the table store",
                                               c[1])
                raise FormatError(f"stored blob {c[1]} vanished from the table store during the build")
            blobs.append(b)
        else:
            blobs.append(c)
    try:
        with _Running():
            out = merge_blobs(blobs, capacity)
    except FormatError as e:
        for c, b in zip(children, blobs):  # a reused blob that fails its checks: say which
            if _is_ref(c) and c[0] == "cached":
                try:
                    open_summary_set(b)
                except FormatError as bad:
                    raise UnreadableCacheError(f"cached blob {c[1]} is unreadable: {bad}",
                                               c[1]) from e
        raise
    del blobs
    if st is not None:
        st.put_blob(key, out)
        return ("stored", key)
    return out


# --------------------------------------------------------------------------- cluster
class _Cluster:
    """A client for the build: an existing scheduler or an embedded local cluster."""

    def __init__(self, client=None, scheduler=None, scheduler_file=None, workers=None):
        self.own = None
        self.made = client is None  # a client we connect here is ours to close
        if client is not None:
            self.client = client
            return
        from distributed import Client

        scheduler = scheduler or (None if scheduler_file else os.environ.get("DASK_SCHEDULER_ADDRESS"))
        try:
            if scheduler_file:
                self.client = Client(scheduler_file=scheduler_file, timeout="20s")
            elif scheduler:
                self.client = Client(scheduler, timeout="20s")
            else:
                from distributed import LocalCluster

                n = int(workers or os.cpu_count() or 1)
                # threads: starts in well under a second, and the sketch core spends its
                # time in numpy and pyarrow code that releases the GIL
                # every listening socket on loopback only
                self.own = LocalCluster(n_workers=1, threads_per_worker=n, processes=False,
                                        dashboard_address="127.0.0.1:0",
                                        worker_dashboard_address="127.0.0.1:0",
                                        silence_logs=logging.DEBUG if log.isEnabledFor(logging.DEBUG)
                                        else logging.ERROR)
                self.client = Client(self.own)
        except (OSError, TimeoutError) as e:
            where = scheduler_file or scheduler
            raise SchedulerUnavailableError(f"cannot reach the Dask scheduler at {where}: {e}") from e

    def close(self):
        if self.made:
            self.client.close()
        if self.own is not None:
            self.own.close()


def _progress(futures: list, total: int, json_mode: bool, interval: float, root=None):
    """Wait for leaf futures, logging "n/total units" lines (or dask's bar in a terminal).

    Empties ``futures``: a leaf's future is dropped once counted, so the scheduler frees
    the leaf's blob as soon as its merge node has run (holding every leaf future to the
    end kept every leaf blob of the build in worker memory at once).
    """
    from distributed import as_completed

    if not futures:
        return
    if sys.stderr.isatty() and not json_mode and root is not None:
        try:
            import contextlib

            from distributed.diagnostics.progressbar import TextProgressBar

            futures.clear()
            # dask's bar writes to stdout; human output belongs on stderr
            with contextlib.redirect_stdout(sys.stderr):
                TextProgressBar([root], complete=True, start=True)  # every task below the root
                sys.stderr.write("\n")
            return
        except Exception:  # pragma: no cover - fall back to log lines
            pass
    pending = as_completed(futures, with_results=False)
    futures.clear()  # as_completed holds each future only until it yields it
    done, last = 0, time.monotonic()
    for _ in pending:
        done += 1
        now = time.monotonic()
        if now - last >= interval or done == total:
            log.info("%d/%d units sketched", done, total)
            last = now


# --------------------------------------------------------------------------- driver
def _resolve_options(opts: dict) -> dict:
    bins = int(config.get("bins", opts.get("bins")))
    if not 1 <= bins <= 65535:
        raise InputError(f"bins: expected 1 to 65535, got {bins}")
    re_ = opts.get("rank_error")
    rank_error = default_rank_error(bins) if re_ is None else float(re_)
    if not 0.0 < rank_error < 0.5:
        raise InputError(f"rank error: expected a number in (0, 0.5), got {rank_error!r}")
    hess = opts.get("hessian")
    scale = opts.get("prediction_scale")
    if hess:
        scale = validate_loss(hess, scale)
        if hess != "squared" and not opts.get("prediction_column"):
            raise InputError(f"--hessian {hess} needs --prediction-column")
    elif opts.get("prediction_scale"):
        raise InputError("--prediction-scale needs --hessian")
    mw = config.get("missing_weight", opts.get("missing_weight"))
    if mw not in ("error", "zero"):
        raise InputError(f"missing weight policy: expected error or zero, got {mw!r}")
    fan_in = int(config.get("fan_in", opts.get("fan_in")))
    if fan_in < 2:
        raise InputError(f"fan-in: expected at least 2, got {fan_in}")
    return dict(bins=bins, rank_error=rank_error, hessian=hess, prediction_scale=scale,
                missing_weight=mw, fan_in=fan_in)


def build(source: str, out: str, *, bins: int | None = None, rank_error: float | None = None,
          columns=None, exclude=None, weight_column: str | None = None,
          label_column: str | None = None, hessian: str | None = None,
          prediction_column: str | None = None, prediction_scale: str | None = None,
          missing_weight: str | None = None, format: str | None = None,
          storage_options: dict | None = None, table_storage_options: dict | None = None,
          client=None, scheduler: str | None = None, scheduler_file: str | None = None,
          workers: int | None = None, fan_in: int | None = None, byte_budget: int | None = None,
          full: bool = False, keep: int | None = None, json_mode: bool = False) -> dict:
    """Build (or refresh) the cut table of a dataset and publish it.

    Parameters mirror ``sketchmerge build`` (see ``sketchmerge build --help``).
    ``storage_options`` go to fsspec for the source and, unless
    ``table_storage_options`` is given, for the table too.

    Returns
    -------
    dict
        The build report: ``version``, ``changed``, ``partitions_total``,
        ``partitions_sketched``, ``partitions_reused``, ``files`` (``total``,
        ``metadata_read``: files whose footer or header was read,
        ``planned_from_previous``: files planned from the current version's stored
        plan), ``rows``, ``features`` (per feature ``name``, ``edges_count``,
        ``rank_error``, ``missing_weight`` and more), ``skipped``, ``seconds``.
    """
    from .sources import _secret_values, open_dataset, redact, select_features
    from .store import TableStore

    t0 = time.perf_counter()
    o = _resolve_options(dict(bins=bins, rank_error=rank_error, hessian=hessian,
                              prediction_column=prediction_column,
                              prediction_scale=prediction_scale, missing_weight=missing_weight,
                              fan_in=fan_in))
    so = dict(storage_options or {})
    tso = dict(table_storage_options if table_storage_options is not None else so)
    table: dict = {}

    def stored_plan():
        # called by open_dataset once the source is listed, so that a bad source is
        # reported before the table is touched; the current version's stored plan spares
        # the footer reads of unchanged files, and --full plans every file from its metadata
        if not table:
            table["store"] = st = TableStore(out, storage_options=tso or None)
            table["current"] = cur = st.current()
            table["doc"] = table["previous"] = None
            if cur is not None:
                try:
                    table["doc"] = st.read_version(cur)[1]
                    table["previous"] = decode_table(table["doc"])
                except FormatError as e:
                    log.warning("current version %s of %s is unreadable (%s); building in full",
                                cur, st.url, e)
        prev = table["previous"]
        return prev.content if prev is not None and not full else None

    # listing and footer reads run on the driver: a transient failure there is retried
    # like one inside a task, instead of failing the whole build
    ds = with_retries(lambda: open_dataset(source, fmt=format, storage_options=so or None,
                                           byte_budget=int(config.get("byte_budget", byte_budget)),
                                           previous=stored_plan),
                      f"listing {redact(str(source), _secret_values(so))}")
    stored_plan()
    store, current, current_doc, previous = (table[k] for k in ("store", "current", "doc", "previous"))
    for role, col in (("weight", weight_column), ("prediction", prediction_column),
                      ("label", label_column)):
        if col and col not in ds.columns:
            raise InputError(f"{role} column {col!r} is not in {ds.source} "
                             f"(columns: {', '.join(ds.columns)})")
    reserved = tuple(c for c in (weight_column, label_column,
                                 prediction_column if o["hessian"] else None) if c)
    features, skipped = select_features(ds, columns=columns, exclude=exclude, reserved=reserved)
    if prediction_column and not o["hessian"] and prediction_column not in reserved:
        features = [f for f in features if f != prediction_column]
        skipped.append({"column": prediction_column, "reason": "prediction column"})
    if not features:
        raise InputError(f"no numeric or boolean feature columns to sketch in {ds.source}")

    units = sorted(ds.units, key=lambda u: u.address)
    addresses = [u.address for u in units]
    # the leaf capacity depends only on the rank error, so it can be fixed first
    from .tree import capacities

    leaf_cap, _ = capacities(o["rank_error"], 0)
    spec = BuildSpec(features=tuple(features), weight_column=weight_column, hessian=o["hessian"],
                     prediction_column=prediction_column if o["hessian"] not in (None, "squared") else None,
                     prediction_scale=o["prediction_scale"] if o["hessian"] else None,
                     missing_weight=o["missing_weight"], leaf_capacity=leaf_cap,
                     protocol=ds.protocol, dtypes=tuple((f, str(ds.columns.get(f, "float64"))) for f in features),
                     storage_options=so, table_url=out, table_options=tso)
    oh = spec.options_hash()
    leaf_keys = [hashlib.sha256(f"unit|{oh}|{u.fingerprint}".encode()).hexdigest() for u in units]
    plan = plan_tree(leaf_keys, addresses, o["fan_in"], o["rank_error"], oh)

    # reuse only blobs the current version's manifest names: gc never deletes those, while an
    # unreferenced blob (say, from a build that died before publishing) may vanish under a
    # concurrent gc between this check and our publish
    if full or current is None:
        cached = set()
    else:
        try:
            kept = set(store.manifest(current))
        except Exception as e:  # an unreadable manifest only costs a full build
            log.warning("manifest of version %s of %s is unreadable (%s); building in full", current, store.url, e)
            kept = set()
        cached = store.existing_blobs([k for k in plan.all_keys() if k in kept])
    by_key = {n.key: n for n in plan.leaves}
    for lvl in plan.levels:
        by_key.update({n.key: n for n in lvl})
    root = plan.root
    unit_of = dict(zip(leaf_keys, units))

    def needed_nodes() -> set:
        need: set[str] = set()
        stack = [root] if root else []
        while stack:  # walk top-down: a cached node hides its whole subtree
            k = stack.pop()
            if k in cached:
                continue
            need.add(k)
            stack.extend(by_key[k].children)
        return need

    def unreadable(keys) -> set:
        """Of cached ``keys``, those missing or failing their checks."""
        got = store.get_blobs(sorted(keys))
        bad = set(keys) - set(got)
        for k, b in got.items():
            try:
                open_summary_set(b)
            except FormatError:
                bad.add(k)
        return bad

    root_blob = None
    attempts = len(cached) + 2  # every retry drops at least one cached blob
    for attempt in range(attempts):
        needed = needed_nodes()
        try:
            if root is None:
                root_blob = encode_summary_set({f: Summary.empty() for f in features}, {"rows": 0})
            elif root in cached:
                root_blob = store.get_blob(root)
                if root_blob is None:
                    raise UnreadableCacheError(f"cached root blob {root} is missing from {store.url}", root)
                try:
                    open_summary_set(root_blob)
                except FormatError as e:
                    raise UnreadableCacheError(f"cached root blob {root} is unreadable: {e}", root) from e
            else:
                root_blob = _run_graph(plan, needed, unit_of, spec, cached, client, scheduler,
                                       scheduler_file, workers, json_mode)
                if _is_ref(root_blob):
                    key = root_blob[1]
                    root_blob = store.get_blob(key)
                    if root_blob is None:
                        raise FormatError(f"root blob {key} vanished from {store.url} during the build")
            break
        except UnreadableCacheError as e:
            if attempt == attempts - 1 or e.key not in cached:
                raise
            # a crash can lose or tear cache entries (blobs are written without fsync),
            # usually several: check every cached blob the graph reads, drop the bad
            # ones and sketch what they covered again (a key always gets the same bytes)
            cached.discard(e.key)
            reads = {c for k in needed_nodes() for c in by_key[k].children if c in cached}
            if root in cached:
                reads.add(root)
            bad = unreadable(reads)
            log.warning("%s; %d more cached blob(s) unreadable; sketching the units under "
                        "them again", e, len(bad))
            cached -= bad
    sketch = [n for n in plan.leaves if n.key in needed]
    reused_leaves = len(plan.leaves) - len(sketch)
    sets, meta = decode_summary_set(root_blob)
    rows = int(meta.get("rows", 0))
    if rows == 0:
        # a table without rows has no edges: publishing it would silently replace good cuts
        raise InputError(f"{redact(ds.source)}: expected at least one row to sketch, got none in "
                         f"{len(ds.files)} data file(s); nothing published")
    weighted = bool(weight_column) or o["hessian"] not in (None, "squared")
    if weighted and all(s.total_weight + s.missing_weight == 0 for s in sets.values()):
        # every row weighs 0: no quantile means anything, and the cuts would be min and max
        what = (f"weight column {weight_column!r}" if weight_column else
                f"{o['hessian']} hessian at prediction column {prediction_column!r}")
        raise InputError(f"{redact(ds.source)}: {what}: expected a positive total weight, got 0 "
                         f"over {rows} rows; nothing published")
    feats = [feature_cuts(n, sets[n], o["bins"], o["rank_error"]) for n in features]

    options = {"bins": o["bins"], "rank_error": o["rank_error"], "weight_column": weight_column,
               "label_column": label_column, "hessian": o["hessian"],
               "prediction_column": prediction_column, "prediction_scale": spec.prediction_scale,
               "missing_weight": o["missing_weight"], "fan_in": o["fan_in"],
               "leaf_capacity": plan.leaf_capacity, "node_capacity": plan.node_capacity,
               "depth": plan.depth, "a_priori_bound": a_priori_bound(o["rank_error"], plan.depth),
               "columns": list(columns) if columns else None,
               "exclude": list(exclude) if exclude else None, "format": format}
    content = {"source": redact(ds.source), "options": options, "rows": rows, "root": root or "",
               "skipped": skipped,
               "units": {"address": addresses, "fingerprint": [u.fingerprint for u in units],
                         "rows": [int(u.rows) for u in units], "nbytes": [int(u.nbytes) for u in units]},
               "plan": ds.plan_record()}
    report = {
        "table": store.url, "source": redact(ds.source),
        "partitions_total": len(units), "partitions_sketched": len(sketch),
        "partitions_reused": reused_leaves, "rows": rows,
        "files": {"total": len(ds.files), "metadata_read": ds.metadata_reads,
                  "planned_from_previous": ds.plan_reused},
        "features": [dict(f.info(), edges_count=int(f.edges.size)) for f in feats],
        "skipped": skipped,
    }
    changed = True
    if previous is not None and previous.content.get("root") == content["root"] \
            and previous.content.get("options") == options and previous.content.get("source") == content["source"]:
        changed = False
    if changed:
        version, published = _publish(store, feats, content, previous, units, plan, o)
    else:
        version = current
        # a publisher killed after its commit point can leave the pointer behind and its
        # manifest unpromoted (docs/STORE.md, "A killed writer"); with nothing to publish,
        # nothing else would repair them. Publishing the same bytes again is a no-op that
        # only moves a lagging pointer forward. Housekeeping never fails the run.
        try:
            store.publish(current, current_doc, plan.all_keys())
            store.clean_leftovers(older_than_seconds=float(config.get("gc_grace_seconds")))
        except Exception as e:  # noqa: BLE001
            log.warning("housekeeping of %s failed: %s", store.url, e)
    report.update(version=version, changed=changed)
    if previous is not None and changed:
        try:
            from .drift import drift_between

            report["drift"] = drift_between(previous, decode_table(published))
        except Exception as e:  # drift is a report: never fail a published build on it
            log.warning("drift against version %s could not be computed: %s", current, e)
    if changed:
        try:
            report["gc"] = store.gc(keep=int(config.get("keep", keep)),
                                    grace_seconds=float(config.get("gc_grace_seconds")))
        except Exception as e:  # gc is housekeeping: never fail a published build on it
            log.warning("gc after publish failed: %s", e)
    report["seconds"] = round(time.perf_counter() - t0, 3)
    return report


def _changes(previous, units) -> dict:
    if previous is None:
        return {"units_added": len(units), "units_removed": 0, "units_changed": 0}
    old = dict(zip(previous.content["units"]["address"], previous.content["units"]["fingerprint"]))
    new = {u.address: u.fingerprint for u in units}
    added = sum(1 for a in new if a not in old)
    removed = sum(1 for a in old if a not in new)
    changed = sum(1 for a in new if a in old and old[a] != new[a])
    return {"units_added": added, "units_removed": removed, "units_changed": changed}


def _created() -> str:
    # SOURCE_DATE_EPOCH (reproducible-builds convention) pins the creation time
    epoch = os.environ.get("SOURCE_DATE_EPOCH")
    t = time.gmtime(int(epoch)) if epoch else time.gmtime()
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", t)


def _read_base(store, version):
    """The cut table of ``version`` (None for none, or when it cannot be decoded)."""
    if version is None:
        return None
    try:
        return decode_table(store.read_version(version)[1])
    except FormatError as e:
        log.warning("version %s of %s is unreadable (%s); counting every unit as added",
                    version, store.url, e)
        return None


def _publish(store, feats, content, previous, units, plan, o) -> tuple[int, bytes]:
    attempts = int(config.get("publish_attempts"))
    last_err = None
    # the changes are counted against the version this one is published on top of: the
    # one the build started from, or, after a lost race, the newer one that won it
    base, base_version = previous, (previous.version if previous is not None else None)
    for _ in range(attempts):
        current = store.current()
        if current != base_version:
            base, base_version = _read_base(store, current), current
        version = 1 if current is None else current + 1
        record = {"created": _created(), "tool": f"sketchmerge {__version__}",
                  "previous_version": current, "changes": _changes(base, units)}
        data = encode_table(feats, version=version, content_extra=content, record=record)
        try:
            store.publish(version, data, plan.all_keys())
            return version, data
        except PublishRaceError as e:
            last_err = e
            log.warning("version %d of %s was published by another builder; publishing on top", version, store.url)
    raise PublishRaceError(f"lost the publish race on {store.url} {attempts} times; "
                           f"retry the build ({last_err})")


def _run_graph(plan, needed, unit_of, spec, cached, client, scheduler, scheduler_file, workers,
               json_mode) -> bytes:
    dsk = {}
    leaf_keys = []

    def ref(k):
        return ("cached", k) if k in cached else "sm-" + k

    for n in plan.leaves:
        if n.key in needed:
            dk = "sm-" + n.key
            dsk[dk] = (sketch_unit, unit_of[n.key], spec, n.key)
            leaf_keys.append(dk)
    for lvl in plan.levels:
        for n in lvl:
            if n.key in needed:
                dsk["sm-" + n.key] = (merge_task, [ref(c) for c in n.children], plan.node_capacity,
                                      n.key, spec.table_url, spec.table_options)
    root_key = "sm-" + plan.root
    if client is None and not scheduler and not scheduler_file \
            and not os.environ.get("DASK_SCHEDULER_ADDRESS"):
        return _run_local(dsk, root_key, set(leaf_keys), workers, json_mode)
    cl = _Cluster(client, scheduler, scheduler_file, workers)
    try:
        # no dask-level retries: transient storage errors are retried inside the tasks, and a
        # lost worker's tasks are recomputed by the scheduler anyway
        futs = cl.client.get(dsk, [root_key] + leaf_keys, sync=False)
        root_fut, leaf_futs = futs[0], futs[1:]
        del futs
        _progress(leaf_futs, len(leaf_futs), json_mode, float(config.get("progress_seconds")),
                  root=root_fut)
        return root_fut.result()
    finally:
        cl.close()


def _run_local(dsk: dict, root_key: str, leaf_keys: set, workers, json_mode: bool) -> bytes:
    """Run the graph on dask's in-process threaded scheduler: the embedded default.

    The same graph as on a cluster, without the cost of importing and starting
    distributed (about 0.7 s, as much as sketching a few million values): the
    sketch core releases the GIL in its compiled kernels and pyarrow in its
    reads, so threads keep the cores busy.  Each leaf blob is dropped once its
    merge node has run (only the root is asked for).
    """
    import dask.threaded
    from dask.callbacks import Callback

    n = int(workers or os.cpu_count() or 1)
    total = len(leaf_keys)
    interval = float(config.get("progress_seconds"))
    bar = sys.stderr.isatty() and not json_mode

    class _Progress(Callback):
        def __init__(self):
            super().__init__()
            self.done, self.last = 0, time.monotonic()

        def _posttask(self, key, result, dsk, state, worker_id):
            if key not in leaf_keys:
                return
            self.done += 1
            now = time.monotonic()
            if bar:
                width = 40
                filled = width * self.done // max(total, 1)
                sys.stderr.write(f"\r[{'#' * filled}{' ' * (width - filled)}] "
                                 f"{self.done}/{total} units")
                if self.done == total:
                    sys.stderr.write("\n")
                sys.stderr.flush()
            elif now - self.last >= interval or self.done == total:
                log.info("%d/%d units sketched", self.done, total)
                self.last = now

    _THREADS[0] = n  # --workers bounds the feature pool's use too
    try:
        with _Progress():
            return dask.threaded.get(dsk, root_key, num_workers=n)
    finally:
        _THREADS[0] = None
