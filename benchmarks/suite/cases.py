"""The measurements.  Each function returns a JSON-ready dict of figures.

Whole-process figures (``proc.run``) time a fresh interpreter from start to exit, so a
build pays its imports and its embedded cluster just as a scheduled job does.
In-process figures share one embedded Dask cluster (threads) and time ``build()``
calls only: the view of a long-lived service, and the way to see growth without the
fixed start-up cost in every point.  Every figure is the best of ``repeats`` runs:
on a shared machine the fastest run is the least disturbed one.
"""

from __future__ import annotations

import json
import os
import shutil
import time
from dataclasses import dataclass

import numpy as np

from . import data, proc

W = data.WEIGHT
FEATS = list(data.FEATURES)


@dataclass(frozen=True)
class Config:
    """Sizes of one run; :func:`config` gives the full and the ``--quick`` ones."""

    quick: bool
    files: int               # files in the main dataset
    rows_per_file: int
    row_group: int           # rows per row group (= rows per unit with one row group each)
    repeats: int
    small_rows: int          # the start-up build
    many_rows: int           # rows per unit of the memory-versus-units check
    many_units: tuple        # unit counts of that check
    merge_units: tuple       # synthetic unit counts of the merge scaling
    merge_full_max: int      # up to this many units the whole tree is merged
    merge_sample: int        # nodes timed per level above that
    refresh_units: int       # synthetic units of the refresh-path count
    pool: int                # distinct synthetic summary sets per capacity
    extras: bool             # the side checks (a --quick run skips them to stay short)
    bins: int = 256


def config(quick: bool) -> Config:
    if quick:
        return Config(quick=True, files=16, rows_per_file=8_000, row_group=2_000, repeats=1,
                      small_rows=5_000, many_rows=1_000, many_units=(4, 16),
                      merge_units=(20, 80), merge_full_max=20, merge_sample=2,
                      refresh_units=200, pool=4, extras=False)
    return Config(quick=False, files=16, rows_per_file=1_000_000, row_group=250_000, repeats=3,
                  small_rows=100_000, many_rows=5_000, many_units=(50, 400),
                  merge_units=(1_000, 10_000, 100_000), merge_full_max=1_000, merge_sample=12,
                  refresh_units=10_000, pool=16, extras=True)


@dataclass(frozen=True)
class Paths:
    root: str
    main: str
    quarter: str      # one file, one row group: one unit
    small: str
    tiny: str
    work: str         # scratch: tables, links


def prepare(cfg: Config, root: str) -> Paths:
    """Generate (or reuse) every dataset of the run under ``root``."""
    p = Paths(root=root, main=os.path.join(root, "main"), quarter=os.path.join(root, "quarter"),
              small=os.path.join(root, "small"), tiny=os.path.join(root, "tiny"),
              work=os.path.join(root, "work"))
    data.dataset(p.main, cfg.files, cfg.rows_per_file, cfg.row_group, seed=1)
    data.dataset(p.quarter, 1, cfg.row_group, cfg.row_group, seed=2)
    data.dataset(p.small, 1, cfg.small_rows, cfg.small_rows, seed=3)
    data.dataset(p.tiny, 1, 1_000, 1_000, seed=4)
    os.makedirs(p.work, exist_ok=True)
    return p


def _fresh(path: str) -> str:
    shutil.rmtree(path, ignore_errors=True)
    return path


def _stored_bytes(folder: str) -> int:
    return sum(os.path.getsize(f) for f in data.data_files(folder))


def _tree_bytes(folder: str) -> tuple[int, int]:
    n = b = 0
    for dirpath, _, names in os.walk(folder):
        for name in names:
            n += 1
            b += os.path.getsize(os.path.join(dirpath, name))
    return n, b


def _warm(folder: str) -> None:
    """Read every file of ``folder`` once, untimed, so that each timed run finds the
    page cache as warm as the others (on this shared machine it cools within minutes)."""
    for f in data.data_files(folder):
        with open(f, "rb") as fh:
            while fh.read(8 << 20):
                pass


def _cli_build(source: str, table: str, *args: str, env: dict | None = None) -> proc.Run:
    return proc.run(proc.sketchmerge_cli("build", source, "--out", _fresh(table), "--json",
                                         "--quiet", *args), env=env)


def _best(fn, repeats: int):
    return proc.best([fn(i) for i in range(repeats)])


def _run_dict(r: proc.Run) -> dict:
    return {"wall_s": round(r.wall, 3), "cpu_s": round(r.cpu, 3), "rss_mb": round(r.rss_mb, 1)}


# --------------------------------------------------------------------------- whole process
def whole_process(cfg: Config, p: Paths) -> dict:
    """A weighted build against a plain pyarrow scan of the same files, process to process.

    The runs are interleaved, round by round (scan, then each build), so that every round's
    ratio compares processes that met the same machine; the figures are the best of the
    rounds, and the median of the per-round ratios is reported beside them.
    """
    cols = ",".join(FEATS + [W])
    unit_env = {"SKETCHMERGE_BYTE_BUDGET": "1"}   # one row group per unit
    kinds = (("build_default_units", None), ("build_rowgroup_units", unit_env))
    kinds = kinds[:2 if cfg.extras else 1]
    tables = {name: os.path.join(p.work, f"wp-{name}") for name, _ in kinds}
    rounds = max(1, cfg.repeats + 2) if cfg.extras else cfg.repeats
    scans, builds = [], {name: [] for name, _ in kinds}
    _warm(p.main)  # a cold page cache would slow the first round's scan, not the others
    for _ in range(rounds):
        scans.append(proc.run(proc.python("-m", "suite.tasks", "scan", p.main, cols)))
        for name, env in kinds:
            builds[name].append(_cli_build(p.main, tables[name], "--weight-column", W,
                                           "--workers", "2", env=env))
    scan = proc.best(scans)
    out = {"scan": _run_dict(scan), "values": int(scan.stdout.strip() or 0),
           "input_bytes": _stored_bytes(p.main), "rows": cfg.files * cfg.rows_per_file,
           "rounds": rounds}
    for name, _ in kinds:
        r = proc.best(builds[name])
        rep = json.loads(r.stdout)
        nblobs, blob_bytes = _tree_bytes(os.path.join(tables[name], "blobs"))
        paired = sorted(b.wall / s.wall for b, s in zip(builds[name], scans))
        out[name] = dict(_run_dict(r), units=rep["partitions_total"],
                         ratio_wall=round(r.wall / scan.wall, 2),
                         ratio_cpu=round(r.cpu / scan.cpu, 2),
                         ratio_wall_median=round(float(np.median(paired)), 2),
                         ratio_wall_range=[round(paired[0], 2), round(paired[-1], 2)],
                         worst_rank_error=max(f["rank_error"] for f in rep["features"]),
                         blobs=nblobs, blob_bytes=blob_bytes,
                         blob_share=blob_bytes / out["input_bytes"])
    out["_tables"] = tables
    return out


# --------------------------------------------------------------------------- versus dask
def _rank_intervals(x: np.ndarray, w: np.ndarray | None, points: np.ndarray):
    """Exact normalised weight below and at-or-below each point (no sort of x needed)."""
    ok = ~np.isnan(x)
    x = x[ok]
    w = None if w is None else w[ok]
    u = np.unique(points)
    total = float(x.size if w is None else w.sum())
    # x < u[j] exactly when x's right insertion index (the count of u <= x) is <= j, and
    # x <= u[j] exactly when its left insertion index (the count of u < x) is <= j
    right = np.bincount(np.searchsorted(u, x, side="right"), weights=w, minlength=u.size + 1)
    left = np.bincount(np.searchsorted(u, x, side="left"), weights=w, minlength=u.size + 1)
    lt = np.cumsum(right)[:u.size] / total
    le = np.cumsum(left)[:u.size] / total
    i = np.searchsorted(u, points)
    return lt[i], le[i]


def _rank_error(x, w, points, q_lo, q_hi) -> float:
    """Largest distance of a target rank range [q_lo, q_hi] from its point's rank interval."""
    lo, hi = _rank_intervals(x, w, points)
    return float(np.max(np.maximum(0.0, np.maximum(lo - q_hi, q_lo - hi)), initial=0.0))


def _table_edges(table: str):
    import sketchmerge

    t = sketchmerge.load(table)
    out = {}
    for f in FEATS:
        fc = t.feature(f)
        if fc.mode == "quantile":
            out[f] = (np.asarray(fc.edges), fc.first_target / fc.bins, fc.last_target / fc.bins,
                      fc.rank_error)
        else:  # "distinct": every distinct value is an edge, nothing to measure
            out[f] = None
    return out


def versus_dask(cfg: Config, p: Paths, weighted_table: str) -> dict:
    """Unweighted: sketchmerge against dask.dataframe's quantile; weighted: against numpy."""
    import pyarrow.parquet as pq

    feats = ",".join(FEATS)
    qfile = os.path.join(p.work, "dask-quantiles.npz")
    _warm(p.main)
    dq = _best(lambda i: proc.run(proc.python("-m", "suite.tasks", "dask", p.main, feats,
                                              str(cfg.bins), qfile)), cfg.repeats)
    table = os.path.join(p.work, "vs-dask-unweighted")
    sm = _best(lambda i: _cli_build(p.main, table, "--columns", feats, "--workers", "2"),
               cfg.repeats)
    # the floor of any unweighted build: reading those 8 columns, with nothing else
    floor = _best(lambda i: proc.run(proc.python("-m", "suite.tasks", "scan", p.main, feats)),
                  cfg.repeats)
    efile = os.path.join(p.work, "exact-quantiles.npz")
    ex = proc.run(proc.python("-m", "suite.tasks", "exact", p.main, feats, W, str(cfg.bins), efile))

    q = np.arange(1, cfg.bins + 1) / cfg.bins
    dask_q, exact_q = np.load(qfile), np.load(efile)
    un_edges, w_edges = _table_edges(table), _table_edges(weighted_table)
    cols = {c: [] for c in FEATS + [W]}
    for f in data.data_files(p.main):
        t = pq.read_table(f, columns=FEATS + [W])
        for c in cols:
            cols[c].append(t.column(c).to_numpy())
    wt = np.concatenate(cols.pop(W))
    per = {}
    for f in FEATS:
        x = np.concatenate(cols.pop(f))
        row = {"dask": _rank_error(x, None, dask_q[f], q, q),
               # numpy's exact weighted quantile checks the measure itself: it must be 0
               "numpy_exact_weighted": _rank_error(x, wt, exact_q[f], q, q)}
        for name, edges, weights in (("sketchmerge", un_edges[f], None),
                                     ("sketchmerge_weighted", w_edges[f], wt)):
            if edges is None:
                row[name] = 0.0
                row[name + "_certified"] = 0.0
            else:
                e, lo, hi, cert = edges
                row[name] = _rank_error(x, weights, e, lo, hi)
                row[name + "_certified"] = cert
        per[f] = row
        del x
    worst = {k: max(r[k] for r in per.values()) for k in next(iter(per.values()))}
    return {"dask": _run_dict(dq), "sketchmerge_unweighted": _run_dict(sm),
            "numpy_exact_weighted": _run_dict(ex),
            "scan_8_features": _run_dict(floor),
            "speedup_vs_dask_wall": round(dq.wall / sm.wall, 2),
            "scan_8_features_vs_dask": round(dq.wall / floor.wall, 2),
            "speedup_vs_dask_cpu": round(dq.cpu / sm.cpu, 2),
            "rank_error_per_feature": per, "rank_error_worst": worst}


# --------------------------------------------------------------------------- memory
def memory(cfg: Config, p: Paths) -> dict:
    """Peak RSS of a one-thread build against one unit's decoded selected columns."""
    ncols = len(FEATS) + 1
    base = _best(lambda i: _cli_build(p.tiny, os.path.join(p.work, "mem-tiny"), "--weight-column",
                                      W, "--workers", "1"), cfg.repeats)
    out = {"baseline": _run_dict(base), "cases": {}}
    kinds = (("default_units", None, None),
             ("rowgroup_units", {"SKETCHMERGE_BYTE_BUDGET": "1"}, cfg.row_group))
    for name, env, rows in kinds[:2 if cfg.extras else 1]:
        table = os.path.join(p.work, f"mem-{name}")
        r = _best(lambda i: _cli_build(p.main, table, "--weight-column", W, "--workers", "1",
                                       env=env), cfg.repeats)
        rep = json.loads(r.stdout)
        unit_rows = rows or max(1, rep["rows"] // rep["partitions_total"])
        decoded = unit_rows * ncols * 8 / 2**20
        excess = r.rss_mb - base.rss_mb
        # O(features / eps): a summary of each feature at up to 8 x the leaf capacity (a node
        # of depth 7), 4 float64 arrays per entry
        summaries = len(FEATS) * 8 * (8 * cfg.bins + 1) * 32 / 2**20
        out["cases"][name] = dict(_run_dict(r), units=rep["partitions_total"], unit_rows=unit_rows,
                                  unit_decoded_mb=round(decoded, 1), excess_mb=round(excess, 1),
                                  excess_over_unit=round(excess / decoded, 2),
                                  allowance_mb=round(2 * decoded + summaries, 1))
    # a worker process of its own (no scheduler, driver or other worker in it): its peak
    # less its peak on a 1,000-row build
    def worker(folder, budget):
        r = proc.run(proc.python("-m", "suite.tasks", "worker", folder,
                                 _fresh(os.path.join(p.work, "mem-worker")), W, str(budget)))
        return json.loads(r.stdout.strip().splitlines()[-1])

    wbase = worker(p.tiny, 0)["worker_rss_kb"] / 1024
    out["worker_baseline_mb"] = round(wbase, 1)
    out["worker"] = {}
    for name, budget, rows in (("default_units", 0, None), ("rowgroup_units", 1, cfg.row_group)):
        got = worker(p.main, budget)
        unit_rows = rows or max(1, got["rows"] // got["units"])
        decoded = unit_rows * ncols * 8 / 2**20
        summaries = len(FEATS) * 8 * (8 * cfg.bins + 1) * 32 / 2**20
        peak = got["worker_rss_kb"] / 1024
        out["worker"][name] = {"rss_mb": round(peak, 1), "excess_mb": round(peak - wbase, 1),
                               "unit_rows": unit_rows, "unit_decoded_mb": round(decoded, 1),
                               "excess_over_unit": round((peak - wbase) / decoded, 2),
                               "allowance_mb": round(2 * decoded + summaries, 1),
                               "units": got["units"]}
        if not cfg.extras:
            break
    # the same per-unit size, many more units: peak memory must not grow with the unit count
    grow = {}
    for units in (cfg.many_units if cfg.extras else ()):
        folder = data.dataset(os.path.join(p.root, f"many-{units}"), 1, units * cfg.many_rows,
                              cfg.many_rows, seed=5)
        r = _best(lambda i: _cli_build(folder, os.path.join(p.work, "mem-many"), "--weight-column",
                                       W, "--workers", "1", env={"SKETCHMERGE_BYTE_BUDGET": "1"}),
                  max(1, cfg.repeats - 1))
        grow[str(units)] = _run_dict(r)
    out["units_scaling"] = grow
    return out


# --------------------------------------------------------------------------- in-process
class Cluster:
    """How the in-process cases build: the product's embedded default (Dask's threaded
    scheduler in this process, ``threads`` threads), or a distributed client when given."""

    def __init__(self, threads: int = 2, client=None):
        self.threads = threads
        self.client = client

    def close(self):
        pass


def _timed_build(source, table, client, **kw) -> tuple[float, dict]:
    import sketchmerge

    if client is None:
        kw.setdefault("workers", 2)
    t = time.perf_counter()
    rep = sketchmerge.build(source, table, client=client, weight_column=W, **kw)
    return time.perf_counter() - t, rep


def per_unit(cfg: Config, p: Paths) -> dict:
    """One unit, one thread: read, sketch, encode and cache, each timed (CPU seconds)."""
    from sketchmerge import job
    from sketchmerge.blob import encode_summary_set
    from sketchmerge.sources import iter_unit, open_dataset
    from sketchmerge.store import TableStore
    from sketchmerge.tree import capacities

    ds = open_dataset(p.quarter, byte_budget=1)
    unit = ds.units[0]
    leaf_cap, _ = capacities(1.0 / (8 * cfg.bins), 0)
    store = TableStore(_fresh(os.path.join(p.work, "per-unit")))
    cols = FEATS + [W]

    def cpu(fn, reps=max(3, cfg.repeats + 2)):
        best, out = float("inf"), None
        for _ in range(reps):
            t = time.process_time()
            out = fn()
            best = min(best, time.process_time() - t)
        return best, out

    def read_as_task():  # the task's read: feature columns as views, the weight copied
        it = iter_unit(unit, cols, protocol="file", views=frozenset(FEATS))
        n = next(it)
        return {c: a for c, a, _ in it}, n

    t_read, (arrays, rows) = cpu(read_as_task)
    w = arrays[W]
    # the task's sketch: weights validated once per unit (in _row_weights), not per feature
    t_sketch, sums = cpu(lambda: {f: job._leaf(arrays[f], w, leaf_cap) for f in FEATS})
    t_sort, _ = cpu(lambda: [np.argsort(arrays[f]) for f in FEATS])
    t_enc, blob = cpu(lambda: encode_summary_set(sums, {"rows": rows}))
    keys = iter(f"{i:064x}" for i in range(1000))
    t_put, _ = cpu(lambda: store.put_blob(next(keys), blob))
    t0 = time.perf_counter()
    store.put_blob(next(keys), blob)
    put_wall = time.perf_counter() - t0
    spec = job.BuildSpec(features=tuple(FEATS), weight_column=W, hessian=None,
                         prediction_column=None, prediction_scale=None, missing_weight="error",
                         leaf_capacity=leaf_cap, protocol="file",
                         dtypes=tuple((f, "float64") for f in FEATS))
    # one thread, as on a busy worker: a lone task would hand its features to the pool
    # and this CPU figure would count the threads' contention too
    job._THREADS[0] = 1
    try:
        t_task, _ = cpu(lambda: job.sketch_unit(unit, spec, next(keys)))
    finally:
        job._THREADS[0] = None
    entries = {f: len(s) for f, s in sums.items()}
    return {"rows": rows, "features": len(FEATS), "leaf_capacity": leaf_cap,
            "read_cpu_s": t_read, "sketch_cpu_s": t_sketch, "argsort_cpu_s": t_sort,
            "encode_cpu_s": t_enc, "put_cpu_s": t_put, "put_wall_s": put_wall,
            "task_cpu_s": t_task,
            "read_values_per_s": rows * len(cols) / t_read,
            "sketch_values_per_s": rows * len(FEATS) / t_sketch,
            "blob_bytes": len(blob), "blob_bytes_per_feature": len(blob) / len(FEATS),
            "entries": entries,
            "blob_bytes_per_entry": len(blob) / max(1, sum(entries.values())),
            "unit_stored_bytes": unit.nbytes,
            "blob_share_of_unit": len(blob) / unit.nbytes}


def growth(cfg: Config, p: Paths, cl: Cluster) -> dict:
    """Build time against rows: four sizes, each four times the last (one row group per unit)."""
    names = [os.path.basename(f) for f in data.data_files(p.main)]
    sizes = [("x1", p.quarter, cfg.row_group)]
    for k in (1, 4, 16):
        sizes.append((f"x{4 * k}", data.link_subset(p.main, os.path.join(p.work, f"grow-{k}"),
                                                    names[:k]), k * cfg.rows_per_file))
    pts = []
    for name, folder, rows in sizes:
        _warm(folder)
        best, rep = float("inf"), None
        for i in range(max(2, cfg.repeats)):
            t, rep = _timed_build(folder, _fresh(os.path.join(p.work, "grow-table")), cl.client,
                                  byte_budget=1)
            best = min(best, t)
        pts.append({"size": name, "rows": rows, "units": rep["partitions_total"], "seconds": best})
    x = np.array([q["rows"] for q in pts], float)
    y = np.array([q["seconds"] for q in pts])
    slope, icpt = np.polyfit(x, y, 1, w=1.0 / y)   # relative residuals weigh equally
    for q in pts:
        q["fit_seconds"] = float(icpt + slope * q["rows"])
        q["residual"] = q["seconds"] / q["fit_seconds"] - 1.0
    return {"points": pts, "fit_intercept_s": float(icpt), "fit_ns_per_row": float(slope * 1e9),
            "max_abs_residual": float(max(abs(q["residual"]) for q in pts)),
            "step_ratios": [pts[i + 1]["seconds"] / pts[i]["seconds"] for i in range(len(pts) - 1)]}


def refresh(cfg: Config, p: Paths, cl: Cluster) -> dict:
    """One new unit on top of a built table, and a rerun with nothing changed."""
    names = [os.path.basename(f) for f in data.data_files(p.main)]
    src = data.link_subset(p.main, os.path.join(p.work, "refresh-src"), names)
    table = os.path.join(p.work, "refresh-table")
    full_table = os.path.join(p.work, "refresh-full")
    _warm(src)
    _warm(p.quarter)
    _, rep = _timed_build(src, _fresh(table), cl.client, byte_budget=1, full=True)
    units = rep["partitions_total"]
    new = os.path.join(src, "part-new.parquet")
    # rounds: a full build (its own table), then refreshes with one new unit: add it
    # (timed), then remove it again (untimed), so that each repeat sketches the unit and
    # recomputes its path (the current version never holds them).  A refresh takes a
    # tenth of a second, where scheduler jitter weighs more than on the 2 s full build:
    # two per round.  Best of each, and the median of the rounds' ratios.
    fulls, news, paired = [], [], []
    for _ in range(max(2, cfg.repeats + 1)):
        t_full, _ = _timed_build(src, _fresh(full_table), cl.client, byte_budget=1, full=True)
        fulls.append(t_full)
        this = []
        for _ in range(2):
            os.link(data.data_files(p.quarter)[0], new)   # sorts after every other file
            t, rep_new = _timed_build(src, table, cl.client, byte_budget=1)
            this.append(t)
            os.remove(new)
            _timed_build(src, table, cl.client, byte_budget=1)
        news += this
        paired.append(min(this) / t_full)
    full = min(fulls)
    t_new = min(news)
    os.link(data.data_files(p.quarter)[0], new)
    _timed_build(src, table, cl.client, byte_budget=1)
    same = float("inf")
    for _ in range(max(2, cfg.repeats)):
        t, rep_same = _timed_build(src, table, cl.client, byte_budget=1)
        same = min(same, t)
    out = {"units_before": units, "full_s": full,
           "new_unit_s": t_new, "new_unit_s_all": [round(x, 4) for x in news],
           "new_unit_sketched": rep_new["partitions_sketched"],
           "new_unit_ratio": t_new / full,
           "new_unit_ratio_median": float(np.median(paired)), "full_s_all": fulls,
           "unchanged_s": same, "unchanged_changed": rep_same["changed"],
           "unchanged_ratio": same / full}
    if not cfg.extras:
        os.remove(new)
        return out
    # the same two steps as whole processes, as a nightly scheduled run does them
    os.remove(new)
    _timed_build(src, table, cl.client, byte_budget=1)            # back to the 64-unit version
    os.link(data.data_files(p.quarter)[0], new)
    env = {"SKETCHMERGE_BYTE_BUDGET": "1"}
    cmd = proc.sketchmerge_cli("build", src, "--out", table, "--json", "--quiet",
                               "--weight-column", W, "--workers", "2")
    wp_new = proc.run(cmd, env=env)
    wp_same = proc.best([proc.run(cmd, env=env) for _ in range(max(1, cfg.repeats - 1))])
    os.remove(new)
    return dict(out, whole_process_new_unit=_run_dict(wp_new),
                whole_process_unchanged=_run_dict(wp_same))


# --------------------------------------------------------------------------- merges
class _Pool:
    """Distinct synthetic summary-set blobs at a capacity (8 features each)."""

    def __init__(self, capacity: int, size: int, rows: int, seed: int):
        from sketchmerge.blob import encode_summary_set
        from sketchmerge.summary import Summary

        rng = np.random.default_rng(seed)
        self.blobs = []
        for _ in range(size):
            t = data.table(rows, int(rng.integers(1 << 30)))
            w = t.column(W).to_numpy()
            sums = {f: Summary.from_values(t.column(f).to_numpy(), w, capacity=capacity)
                    for f in FEATS}
            self.blobs.append(encode_summary_set(sums, {"rows": rows}))

    def __getitem__(self, i: int) -> bytes:
        return self.blobs[i % len(self.blobs)]


def _addresses(n: int) -> list[str]:
    # date-partitioned names, like a daily dataset: sorted = chronological
    return [f"day={i // 16:05d}/part-{i % 16:02d}.parquet#rg=0-0" for i in range(n)]


def _plan(n: int, rank_error: float, extra: list[str] = ()):
    import hashlib

    from sketchmerge.tree import plan_tree

    addrs = sorted(_addresses(n) + list(extra))
    keys = [hashlib.sha256(a.encode()).hexdigest() for a in addrs]
    from sketchmerge import config

    return plan_tree(keys, addrs, int(config.get("fan_in")), rank_error, "bench"), addrs


def merges(cfg: Config, p: Paths) -> dict:
    """Merge time over synthetic unit summaries x 8 features (one thread, job.merge_blobs)."""
    from sketchmerge.job import merge_blobs

    e = 1.0 / (8 * cfg.bins)
    out = []
    pools: dict = {}

    def pool(cap, level):
        # a pruned summary of 4 x capacity rows has capacity + 1 entries, like any bigger one
        if cap not in pools:
            pools[cap] = _Pool(cap, cfg.pool, 4 * cap, seed=cap)
        return pools[cap]

    for n in cfg.merge_units:
        plan, _ = _plan(n, e)
        leaves = pool(plan.leaf_capacity, 0)
        levels = []
        total_est = 0.0
        if n <= cfg.merge_full_max:
            # the whole tree, depth first, holding one path of blobs at a time
            index = {nd.key: i for i, nd in enumerate(plan.leaves)}
            by_key = {nd.key: nd for lvl in plan.levels for nd in lvl}
            timing: dict[int, list] = {}

            def blob_of(key):
                if key in index:
                    return leaves[index[key]]
                nd = by_key[key]
                kids = [blob_of(c) for c in nd.children]
                t = time.process_time()
                b = merge_blobs(kids, plan.node_capacity)
                timing.setdefault(nd.level, []).append(time.process_time() - t)
                return b

            t0 = time.process_time()
            blob_of(plan.root)
            measured = time.process_time() - t0
            for lvl, ts in sorted(timing.items()):
                levels.append({"level": lvl, "nodes": len(ts), "timed": len(ts),
                               "mean_s": float(np.mean(ts))})
            total = float(sum(sum(ts) for ts in timing.values()))
            mode = "full"
        else:
            # time an even sample of nodes per level, children synthesized at the right
            # capacity; total = sum over levels of node count x mean time per node
            measured = None
            for lvl in plan.levels:
                kids_pool = leaves if lvl[0].level == 1 else pool(plan.node_capacity, lvl[0].level)
                step = max(1, len(lvl) // cfg.merge_sample)
                ts = []
                for j, nd in enumerate(lvl[::step][:cfg.merge_sample]):
                    kids = [kids_pool[j * 8 + c] for c in range(len(nd.children))]
                    best = float("inf")
                    for _ in range(2):  # a sampled node stands for many: one spike would too
                        t = time.process_time()
                        merge_blobs(kids, plan.node_capacity)
                        best = min(best, time.process_time() - t)
                    ts.append(best)
                mean = float(np.mean(ts))
                levels.append({"level": lvl[0].level, "nodes": len(lvl), "timed": len(ts),
                               "mean_children": float(np.mean([len(x.children) for x in lvl])),
                               "mean_s": mean})
                total_est += mean * len(lvl)
            total = total_est
            mode = "sampled"
        out.append({"units": n, "depth": plan.depth, "node_capacity": plan.node_capacity,
                    "nodes": sum(len(lvl) for lvl in plan.levels), "mode": mode,
                    "cpu_s": total, "measured_total_cpu_s": measured, "levels": levels})
    per_unit = [o["cpu_s"] / o["units"] for o in out]
    return {"points": out, "cpu_s_per_unit": per_unit,
            "per_unit_spread": max(per_unit) / min(per_unit)}


def refresh_path(cfg: Config, p: Paths) -> dict:
    """1 new unit among N cached synthetic units: nodes recomputed, blobs read, merge time."""
    from sketchmerge.job import merge_blobs

    e = 1.0 / (8 * cfg.bins)
    n = cfg.refresh_units
    old, _ = _plan(n, e)
    res = {}
    for where, addr in (("end (a new day)", f"day={n // 16 + 1:05d}/part-00.parquet#rg=0-0"),
                        ("middle (a late file)", f"day={n // 32:05d}/part-99.parquet#rg=0-0")):
        new, _ = _plan(n, e, [addr])
        old_keys = set(old.all_keys())
        recomputed = [nd for lvl in new.levels for nd in lvl if nd.key not in old_keys]
        new_leaves = [nd for nd in new.leaves if nd.key not in old_keys]
        fresh = {nd.key for nd in recomputed} | {nd.key for nd in new_leaves}
        read = sum(1 for nd in recomputed for c in nd.children if c not in fresh)
        leaves = _Pool(new.leaf_capacity, cfg.pool, 4 * new.leaf_capacity, seed=11)
        upper = _Pool(new.node_capacity, cfg.pool, 4 * new.node_capacity, seed=12)
        t = 0.0
        for nd in recomputed:
            src = leaves if nd.level == 1 else upper
            kids = [src[i] for i in range(len(nd.children))]
            t0 = time.process_time()
            merge_blobs(kids, new.node_capacity)
            t += time.process_time() - t0
        res[where] = {"units": n + 1, "depth": new.depth, "leaves_sketched": len(new_leaves),
                      "nodes_recomputed": len(recomputed),
                      "nodes_total": sum(len(lvl) for lvl in new.levels),
                      "cached_blobs_read": read, "merge_cpu_s": t}
    return res


# --------------------------------------------------------------------------- start-up
def startup(cfg: Config, p: Paths) -> dict:
    """A small build on the embedded default, whole process, and, for comparison, how long
    a distributed LocalCluster (threads or processes) takes to be ready."""
    r = _best(lambda i: _cli_build(p.small, os.path.join(p.work, "startup"), "--weight-column", W),
              cfg.repeats)
    kinds = {}
    code = ("import time; t = time.perf_counter()\n"
            "from distributed import Client, LocalCluster\n"
            "c = LocalCluster(n_workers={n}, threads_per_worker={t}, processes={pr}, "
            "dashboard_address=None, silence_logs=50)\n"
            "cl = Client(c); cl.submit(sum, [1, 2]).result()\n"
            "print(time.perf_counter() - t)\n"
            "cl.close(); c.close()\n")
    choices = (("threads", dict(n=1, t=2, pr=False)), ("processes", dict(n=2, t=1, pr=True)))
    for name, kw in choices[:2 if cfg.extras else 1]:
        if name == "processes":
            kw_code = "if __name__ == '__main__':\n" + "".join(
                "    " + line + "\n" for line in code.format(**kw).splitlines())
        else:
            kw_code = code.format(**kw)
        runs = [proc.run(proc.python("-c", kw_code)) for _ in range(cfg.repeats)]
        b = proc.best(runs)
        kinds[name] = dict(_run_dict(b), ready_s=round(float(b.stdout.strip().splitlines()[0]), 3))
    return {"rows": cfg.small_rows, "build": _run_dict(r), "cluster_kinds": kinds}


# --------------------------------------------------------------------------- profile
def profile(cfg: Config, p: Paths, out_path: str) -> dict:
    """pyinstrument profile of the sketch task over a few units (one thread), if installed.

    Writes the call tree to ``out_path``; returns the share of the task's time spent in
    each of its steps (read, summaries, encode, store).
    """
    try:
        from pyinstrument import Profiler
    except ImportError:
        return {"skipped": "pyinstrument is not installed"}
    from sketchmerge import job
    from sketchmerge.sources import open_dataset
    from sketchmerge.tree import capacities

    ds = open_dataset(p.main, byte_budget=1)
    units = list(ds.units[:8])
    leaf_cap, _ = capacities(1.0 / (8 * cfg.bins), 0)
    spec = job.BuildSpec(features=tuple(FEATS), weight_column=W, hessian=None,
                         prediction_column=None, prediction_scale=None, missing_weight="error",
                         leaf_capacity=leaf_cap, protocol="file",
                         dtypes=tuple((f, "float64") for f in FEATS),
                         table_url=_fresh(os.path.join(p.work, "profile-table")))
    job.sketch_unit(units[0], spec, f"{0:064x}")   # warm: imports, scratch buffers
    prof = Profiler(interval=0.0005)
    prof.start()
    for i, u in enumerate(units):
        job.sketch_unit(u, spec, f"{i + 1:064x}")
    session = prof.stop()
    text = prof.output_text(unicode=False, color=False, show_all=False)
    # no machine paths in a committed file: paths relative to the repository
    repo = os.path.dirname(proc.HERE) + os.sep
    text = "\n".join(line for line in text.replace(repo, "").splitlines()
                     if not line.startswith(("Profile at ", "  _ ", " /_", "/ ")))
    with open(out_path, "w") as f:
        f.write(text)
    total = session.duration
    shares = {}
    root = session.root_frame()

    def walk(fr):
        name = fr.function
        if name in ("read_unit", "iter_unit", "from_values", "encode_summary_set", "put_blob",
                    "_row_weights"):
            shares[name] = shares.get(name, 0.0) + fr.time
            return
        for ch in fr.children:
            walk(ch)

    if root is not None:
        walk(root)
    return {"units": len(units), "seconds": total,
            "shares": {k: v / total for k, v in shares.items()} if total else {}}
