"""The sketchmerge benchmark suite: generate the data, run every measurement, write
``results/results.md``, ``results/results.json`` and ``results/chart.png``.

    python benchmarks/run.py             # the full run (about 5-10 minutes on 2 cores)
    python benchmarks/run.py --quick     # tiny sizes, under 30 s: keeps the suite from rotting
    python benchmarks/run.py --only growth,merges

Speed goals are checked here (see PERFORMANCE.md), never in timed unit tests.
Timings on a shared machine are noisy: every figure is the best of several repeats and
the load average before and after the run is recorded next to them.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)

from suite import cases, model, report  # noqa: E402

SECTIONS = ("per_unit", "whole_process", "versus_dask", "memory", "growth", "refresh",
            "merges", "refresh_path", "startup", "model", "profile")


def _load() -> str:
    try:
        return " ".join(f"{x:.2f}" for x in os.getloadavg())
    except OSError:  # pragma: no cover - not on every platform
        return "n/a"


def _compile_package() -> str:
    """Write the bytecode of the installed sketchmerge package, as ``pip install`` does.

    An editable install (or ``PYTHONDONTWRITEBYTECODE``) leaves none, and then every
    measured process would compile the package's sources at start-up (about 60 ms here)
    while pyarrow, numpy and dask load theirs from the bytecode their wheels installed.
    """
    import compileall
    import importlib.util

    spec = importlib.util.find_spec("sketchmerge")
    folder = os.path.dirname(spec.origin) if spec and spec.origin else None
    if folder and compileall.compile_dir(folder, quiet=1):
        return "compiled before the run"
    return "not compiled (read-only install)"


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description="The sketchmerge benchmark suite: generates its data, "
                                 "runs every measurement, writes the results (see "
                                 "benchmarks/PERFORMANCE.md).")
    ap.add_argument("--quick", action="store_true", help="tiny sizes, one repeat (a smoke run)")
    ap.add_argument("--out", help="results folder (default: benchmarks/results for a full run; "
                                  "a temporary folder with --quick or --only, so that the "
                                  "committed results are only ever those of a full run)")
    ap.add_argument("--data-dir", help="where generated data is kept (default: benchmarks/data, "
                                       "or a temporary folder with --quick)")
    ap.add_argument("--only", help="comma-separated sections: " + ",".join(SECTIONS))
    args = ap.parse_args(argv)

    cfg = cases.config(args.quick)
    if args.out is None:
        args.out = (os.path.join(HERE, "results") if not (args.quick or args.only)
                    else os.path.join(tempfile.gettempdir(), "sketchmerge-bench-results"))
    want = set(args.only.split(",")) if args.only else set(SECTIONS)
    unknown = want - set(SECTIONS)
    if unknown:
        ap.error(f"unknown sections {sorted(unknown)}; expected some of {','.join(SECTIONS)}")
    tmp = None
    if args.data_dir:
        root = args.data_dir
    elif args.quick:
        root = tmp = tempfile.mkdtemp(prefix="sketchmerge-bench-")
    else:
        root = os.path.join(HERE, "data")
    t0 = time.perf_counter()
    bytecode = _compile_package()
    load_before = _load()
    res: dict = {}
    try:
        paths = cases.prepare(cfg, root)

        def step(name, fn):
            if name in want:
                t = time.perf_counter()
                print(f"[{name}] ...", file=sys.stderr, flush=True)
                res[name] = fn()
                print(f"[{name}] {time.perf_counter() - t:.1f} s", file=sys.stderr, flush=True)

        step("per_unit", lambda: cases.per_unit(cfg, paths))
        step("whole_process", lambda: cases.whole_process(cfg, paths))
        if "versus_dask" in want:
            weighted = (res.get("whole_process") or {}).get("_tables", {}).get("build_default_units")
            if weighted is None or not os.path.isdir(weighted):
                weighted = os.path.join(paths.work, "vs-dask-weighted")
                cases._cli_build(paths.main, weighted, "--weight-column", cases.W, "--workers", "2")
            step("versus_dask", lambda: cases.versus_dask(cfg, paths, weighted))
        step("memory", lambda: cases.memory(cfg, paths))
        if want & {"growth", "refresh"}:
            cl = cases.Cluster(threads=2)
            try:
                step("growth", lambda: cases.growth(cfg, paths, cl))
                step("refresh", lambda: cases.refresh(cfg, paths, cl))
            finally:
                cl.close()
        step("merges", lambda: cases.merges(cfg, paths))
        step("refresh_path", lambda: cases.refresh_path(cfg, paths))
        step("startup", lambda: cases.startup(cfg, paths))
        if not cfg.quick:
            os.makedirs(args.out, exist_ok=True)
            step("profile", lambda: cases.profile(cfg, paths, os.path.join(args.out, "profile.txt")))
        if "model" in want and "per_unit" in res and "merges" in res:
            k = model.fit(res, cfg.bins)
            res["model"] = {"constants": k, "checks": model.checks(k, res, cfg.bins),
                            "extrapolation": model.extrapolate(k, cfg.bins)}
    finally:
        shutil.rmtree(os.path.join(root, "work"), ignore_errors=True)
        if tmp:
            shutil.rmtree(tmp, ignore_errors=True)

    meta = {"quick": cfg.quick, "cores": os.cpu_count(), "load_before": load_before,
            "bytecode": bytecode,
            "load_after": _load(), "seconds": time.perf_counter() - t0,
            "command": "python benchmarks/run.py" + (" --quick" if cfg.quick else "")
                       + (f" --only {args.only}" if args.only else ""),
            "data": (f"{cfg.files} Parquet files x {cfg.rows_per_file:,} rows, 8 float features + a "
                     f"weight column, snappy, {cfg.row_group:,}-row row groups (generated by "
                     "benchmarks/suite/data.py)")}
    os.makedirs(args.out, exist_ok=True)
    with open(os.path.join(args.out, "results.md"), "w") as f:
        f.write(report.markdown(res, meta))
    with open(os.path.join(args.out, "results.json"), "w") as f:
        json.dump(report.finite({"meta": meta, "results": res}), f, indent=1, sort_keys=True)
    try:
        report.chart(res, os.path.join(args.out, "chart.png"))
    except ImportError:
        print("matplotlib is not installed: no chart", file=sys.stderr)
    print(os.path.join(args.out, "results.md"))
    return 0


if __name__ == "__main__":
    sys.exit(main())
