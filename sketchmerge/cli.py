"""The ``sketchmerge`` command line.

Exit codes (for schedulers; also in README.md):

==  =========================================================
0   success (also "nothing changed")
1   unexpected internal error (a bug: please report it)
2   usage error (bad option or argument)
3   bad input data (the message names the file, unit or column)
4   no input: the source matched no data files
5   storage unavailable or refused an operation (transient: retry)
6   a stored table or blob is corrupt or of an unknown format
7   the Dask scheduler is unavailable (transient: retry)
8   lost the publish race to another builder (retry)
9   verify: an edge's measured rank error is over its certified bound
10  diff: a feature's drift is above ``--fail-above``
==  =========================================================

Human logs go to stderr; ``--json`` prints exactly one JSON document on stdout.
"""

from __future__ import annotations

import argparse
import json
import logging
import math
import os
import sys

from . import __version__
from .errors import SketchmergeError

__all__ = ["EXIT_CODES", "main", "make_parser"]

EXIT_CODES = {"ok": 0, "internal": 1, "usage": 2, "bad_input": 3, "no_input": 4, "storage": 5,
              "format": 6, "scheduler": 7, "race": 8, "verify_failed": 9, "drift": 10}

log = logging.getLogger("sketchmerge")

CAUTION = ("caution: a cut table holds exact values of its data (min, max, quantile values, "
           "point masses); keep it under the same access rules as the source.")


def _parse_value(v: str):
    low = v.lower()
    if low in ("true", "false"):
        return low == "true"
    if low in ("none", "null"):
        return None
    for cast in (int, float):
        try:
            return cast(v)
        except ValueError:
            pass
    return v


def parse_storage_options(items) -> dict:
    """``KEY=VALUE`` pairs into a dict; dotted keys nest (``client_kwargs.endpoint_url=...``)."""
    out: dict = {}
    for item in items or []:
        if "=" not in item:
            raise argparse.ArgumentTypeError(f"--storage-option: expected KEY=VALUE, got {item.split('=')[0]!r}")
        k, v = item.split("=", 1)
        d = out
        parts = k.split(".")
        for p in parts[:-1]:
            d = d.setdefault(p, {})
        d[parts[-1]] = _parse_value(v)
    return out


def _csv(text: str) -> list[str]:
    return [c for c in (x.strip() for x in text.split(",")) if c]


def _add_common(p):
    p.add_argument("--storage-option", action="append", default=[], metavar="KEY=VALUE",
                   help="fsspec option for the source and table (repeatable; dotted keys nest)")
    p.add_argument("--json", action="store_true", help="print one JSON document on stdout")
    p.add_argument("--debug", action="store_true", help="show tracebacks and debug logs")
    p.add_argument("--quiet", action="store_true", help="only warnings and errors on stderr")


def make_parser() -> argparse.ArgumentParser:
    ap = argparse.ArgumentParser(prog="sketchmerge",
                                 description="Shared, certified weighted bin edges for tree-model training.")
    ap.add_argument("--version", action="version", version=f"sketchmerge {__version__}")
    sub = ap.add_subparsers(dest="command", required=True, metavar="COMMAND")

    b = sub.add_parser("build", help="sketch a dataset and publish its cut table",
                       description="Sketch SOURCE (Parquet, CSV or Arrow IPC; a folder, prefix, glob "
                                   "or file; local or any fsspec URL) and publish a new version of TABLE. "
                                   "Incremental: only new or changed units are sketched.")
    b.add_argument("source", metavar="SOURCE")
    b.add_argument("--out", required=True, metavar="TABLE", help="where the cut table lives")
    b.add_argument("--format", choices=["parquet", "csv", "arrow"], help="when extensions do not tell")
    b.add_argument("--columns", type=_csv, help="comma-separated features (default: all numeric and boolean)")
    b.add_argument("--exclude", type=_csv, help="comma-separated columns to leave out")
    b.add_argument("--bins", type=int, help="most bins per feature (default 256)")
    b.add_argument("--rank-error", type=float, metavar="E",
                   help="bound on every edge's normalised rank error (default 1/(8*bins))")
    b.add_argument("--weight-column", metavar="W", help="sample weights")
    b.add_argument("--label-column", metavar="L", help="label column (never a feature)")
    b.add_argument("--hessian", choices=["squared", "logistic", "poisson"],
                   help="weight rows by this loss's hessian at --prediction-column")
    b.add_argument("--prediction-column", metavar="P")
    b.add_argument("--prediction-scale", choices=["margin", "probability", "mean"],
                   help="logistic: probability (default) or margin; poisson: mean (default) or margin")
    b.add_argument("--missing-weight", choices=["error", "zero"],
                   help="rows with a missing weight or prediction: error (default) or zero weight")
    g = b.add_mutually_exclusive_group()
    g.add_argument("--scheduler", metavar="ADDRESS", help="an existing Dask scheduler")
    g.add_argument("--scheduler-file", metavar="FILE", help="a Dask scheduler file")
    b.add_argument("--workers", type=int, help="threads of the embedded local scheduler (default: all cores)")
    b.add_argument("--fan-in", type=int, help="children per merge node (default 16)")
    b.add_argument("--full", action="store_true", help="ignore cached summaries")
    b.add_argument("--keep", type=int, help="versions to keep (default 10; the current one always)")
    _add_common(b)

    s = sub.add_parser("show", help="what to check in a cut table before training")
    s.add_argument("table", metavar="TABLE")
    s.add_argument("--feature", metavar="F", help="one feature in detail, with its edges")
    s.add_argument("--version", dest="pin", type=int, metavar="V", help="a pinned version")
    s.add_argument("--bins", type=int, help="show edges derived for another bin count")
    s.add_argument("--plot", metavar="PNG", help="with --feature: draw its weighted CDF and edges")
    _add_common(s)

    v = sub.add_parser("verify", help="measure the edges' exact rank errors on the data")
    v.add_argument("table", metavar="TABLE")
    v.add_argument("source", metavar="SOURCE")
    v.add_argument("--sample-rows", type=int, metavar="N", help="check on a uniform sample of about N rows")
    v.add_argument("--version", dest="pin", type=int, metavar="V")
    v.add_argument("--format", choices=["parquet", "csv", "arrow"])
    g = v.add_mutually_exclusive_group()
    g.add_argument("--scheduler", metavar="ADDRESS")
    g.add_argument("--scheduler-file", metavar="FILE")
    v.add_argument("--workers", type=int)
    _add_common(v)

    d = sub.add_parser("demo", help="generate a dataset, build, show and verify its table")
    d.add_argument("--dir", default="sketchmerge-demo", metavar="D", help="working folder (default ./sketchmerge-demo)")
    d.add_argument("--rows", type=int, default=400_000, help="rows to generate (default 400000)")
    d.add_argument("--workers", type=int)
    _add_common(d)

    h = sub.add_parser("history", help="list a table's versions")
    h.add_argument("table", metavar="TABLE")
    _add_common(h)

    gc = sub.add_parser("gc", help="remove versions beyond --keep and unreferenced cached blobs")
    gc.add_argument("table", metavar="TABLE")
    gc.add_argument("--keep", type=int)
    gc.add_argument("--grace-seconds", type=float, help="never delete blobs younger than this (default 6 h)")
    _add_common(gc)

    df = sub.add_parser("diff", help="how far the cuts moved between two versions")
    df.add_argument("table", metavar="TABLE")
    df.add_argument("--from", dest="from_version", type=int, metavar="V", help="default: the one before --to")
    df.add_argument("--to", dest="to_version", type=int, metavar="V", help="default: the current version")
    df.add_argument("--fail-above", type=float, metavar="X", help="exit 10 when any feature's PSI exceeds X")
    df.add_argument("--plot", metavar="PNG")
    _add_common(df)

    ex = sub.add_parser("export", help="write the edges for training jobs in other languages")
    ex.add_argument("table", metavar="TABLE")
    ex.add_argument("--to", dest="fmt", choices=["json", "parquet"], required=True)
    ex.add_argument("--output", "-o", metavar="FILE", help="default: stdout for json")
    ex.add_argument("--bins", type=int)
    ex.add_argument("--version", dest="pin", type=int, metavar="V")
    _add_common(ex)
    return ap


def _emit(args, doc: dict, text: str) -> None:
    if args.json:
        sys.stdout.write(json.dumps(_jsonable(doc), allow_nan=False) + "\n")
    else:
        sys.stdout.write(text.rstrip("\n") + "\n")


def _jsonable(o):
    if isinstance(o, float):
        return o if math.isfinite(o) else str(o)
    if isinstance(o, dict):
        return {str(k): _jsonable(v) for k, v in o.items()}
    if isinstance(o, (list, tuple)):
        return [_jsonable(v) for v in o]
    if hasattr(o, "item") and callable(o.item):
        return _jsonable(o.item())
    return o


# --------------------------------------------------------------------------- commands
def _freeze_imports() -> None:
    """Move every object alive now (the imported libraries' modules, classes and
    functions, some 10^5 of them) out of the cyclic collector's way.

    A command is a short-lived process: those objects live to its end anyway, and
    each full collection would walk all of them again.  Measured on a 64-unit build:
    -0.5 CPU-s, -15% wall (benchmarks/PERFORMANCE.md).  Not done by the library's
    ``build()``, whose caller's process may be long-lived.
    """
    import gc

    import dask.callbacks  # noqa: F401 - the embedded scheduler's imports, loaded first
    import dask.threaded  # noqa: F401

    from . import sources, store  # noqa: F401

    gc.freeze()


def _cmd_build(args, so) -> int:
    from .job import build

    if _AS_PROGRAM[0]:  # not when main() runs inside a caller's process (tests, notebooks)
        _freeze_imports()

    rep = build(args.source, args.out, bins=args.bins, rank_error=args.rank_error,
                columns=args.columns, exclude=args.exclude, weight_column=args.weight_column,
                label_column=args.label_column, hessian=args.hessian,
                prediction_column=args.prediction_column, prediction_scale=args.prediction_scale,
                missing_weight=args.missing_weight, format=args.format, storage_options=so,
                scheduler=args.scheduler, scheduler_file=args.scheduler_file,
                workers=args.workers, fan_in=args.fan_in, full=args.full, keep=args.keep,
                json_mode=args.json)
    _emit(args, rep, format_build(rep))
    return 0


def format_build(rep: dict) -> str:
    lines = []
    if rep["changed"]:
        lines.append(f"published version {rep['version']} of {rep['table']}")
    else:
        lines.append(f"nothing changed; version {rep['version']} of {rep['table']} stays current")
    lines.append(f"  units: {rep['partitions_total']} total, {rep['partitions_sketched']} sketched, "
                 f"{rep['partitions_reused']} reused; rows: {rep['rows']:,}; {rep['seconds']:.2f} s")
    worst = max((f["rank_error"] for f in rep["features"]), default=0.0)
    lines.append(f"  features: {len(rep['features'])}; worst certified edge rank error {worst:.3g}")
    for s in rep.get("skipped", []):
        lines.append(f"  skipped column {s.get('column')!r}: {s.get('reason')}")
    drift = rep.get("drift")
    if drift:
        top = drift["features"][:3]
        lines.append("  drift vs previous: " + ", ".join(f"{d['name']} PSI {d['psi']:.3g}" for d in top))
    return "\n".join(lines)


def format_show(cuts, feature=None) -> str:
    rec, con = cuts.record, cuts.content
    opts = con.get("options", {})
    out = [f"cut table version {cuts.version}  created {rec.get('created')}  by {rec.get('tool')}",
           f"source: {con.get('source')}",
           f"rows: {cuts.rows:,}  units: {len(con.get('units', {}).get('address', []))}  "
           f"bins: {opts.get('bins')}  target edge rank error: {opts.get('rank_error', float('nan')):.3g}",
           "weights: " + (", ".join(x for x in (
               f"sample weights {opts['weight_column']!r}" if opts.get("weight_column") else "",
               f"{opts['hessian']} hessian at {opts.get('prediction_column')!r} ({opts.get('prediction_scale')})"
               if opts.get("hessian") else "") if x) or "none (every row weighs 1)"),
           ""]
    names = [feature] if feature else list(cuts.features)
    hdr = f"{'feature':<24} {'dtype':<8} {'mode':<8} {'edges':>6} {'rank err':>9} {'missing':>8} {'min':>12} {'max':>12}"
    out += [hdr, "-" * len(hdr)]
    for n in names:
        f = cuts.feature(n)
        i = f.info()
        out.append(f"{n[:24]:<24} {f.dtype[:8]:<8} {f.mode:<8} {f.edges.size:>6} {f.rank_error:>9.2e} "
                   f"{f.missing_share:>7.1%} {_short(i['min']):>12} {_short(i['max']):>12}")
    if feature:
        f = cuts.feature(feature)
        out += ["", f"total weight {f.total_weight:.6g} over {f.count:,} rows; missing {f.missing_count:,} rows "
                    f"(weight {f.missing_weight:.6g}); summary entries {len(f.summary)}",
                "edges: " + ", ".join(_short(float(e)) for e in f.edges)]
    for s in con.get("skipped", []):
        out.append(f"skipped column {s.get('column')!r}: {s.get('reason')}")
    out += ["", CAUTION]
    return "\n".join(out)


def _short(v) -> str:
    if isinstance(v, str):
        return v
    return f"{v:.6g}"


def _cmd_show(args, so) -> int:
    from .cuts import load

    cuts = load(args.table, version=args.pin, storage_options=so or None, bins=args.bins)
    if args.feature:
        cuts.feature(args.feature)  # clear error for an unknown name
    if args.plot:
        if not args.feature:
            raise SketchmergeError("--plot needs --feature")
        from .plots import plot_feature

        plot_feature(cuts, args.feature, args.plot)
    doc = {"version": cuts.version, "record": cuts.record, "source": cuts.content.get("source"),
           "rows": cuts.rows, "options": cuts.options, "skipped": cuts.content.get("skipped", []),
           "units": len(cuts.content.get("units", {}).get("address", [])),
           "features": [dict(cuts.feature(n).info(),
                             **({"edges": cuts.edges(n).tolist()} if args.feature else {}))
                        for n in ([args.feature] if args.feature else cuts.features)],
           "caution": CAUTION}
    _emit(args, doc, format_show(cuts, args.feature))
    return 0


def _cmd_verify(args, so) -> int:
    from .verify import format_verify, verify

    rep = verify(args.table, args.source, sample_rows=args.sample_rows, version=args.pin,
                 storage_options=so or None, format=args.format, scheduler=args.scheduler,
                 scheduler_file=args.scheduler_file, workers=args.workers)
    _emit(args, rep, format_verify(rep))
    return 0 if rep["ok"] else EXIT_CODES["verify_failed"]


def _cmd_demo(args, so) -> int:
    from .demo import run_demo

    rep = run_demo(args.dir, rows=args.rows, workers=args.workers, json_mode=args.json)
    if args.json:
        _emit(args, rep, "")
    return 0 if rep["verify"]["ok"] else EXIT_CODES["verify_failed"]


def _cmd_history(args, so) -> int:
    from .history import format_history, history

    rows = history(args.table, storage_options=so or None)
    _emit(args, {"table": args.table, "versions": rows}, format_history(rows))
    return 0


def _cmd_gc(args, so) -> int:
    from . import config
    from .store import TableStore

    st = TableStore(args.table, storage_options=so or None)
    rep = st.gc(keep=int(config.get("keep", args.keep)),
                grace_seconds=float(config.get("gc_grace_seconds", args.grace_seconds)))
    _emit(args, rep, "gc: " + ", ".join(f"{k} {v}" for k, v in rep.items()))
    return 0


def _cmd_diff(args, so) -> int:
    from .drift import diff, format_diff
    from .store import TableStore

    if args.from_version is None and args.to_version is None:
        versions = TableStore(args.table, storage_options=so or None).versions()
        if len(versions) == 1:
            # the first night of a nightly diff: nothing to compare with is not an alert
            doc = {"table": args.table, "from_version": None, "to_version": versions[0],
                   "features": [], "over_threshold": [],
                   "note": "only one version is published: nothing to compare with yet"}
            _emit(args, doc, f"{args.table}: {doc['note']}")
            return 0
    rep = diff(args.table, from_version=args.from_version, to_version=args.to_version,
               storage_options=so or None)
    if args.plot:
        from .drift import plot_drift

        plot_drift(rep, args.plot)
    over = [] if args.fail_above is None else [f["name"] for f in rep["features"] if f["psi"] > args.fail_above]
    rep["over_threshold"] = over
    _emit(args, rep, format_diff(rep))
    return EXIT_CODES["drift"] if over else 0


def _cmd_export(args, so) -> int:
    from .export import export

    export(args.table, args.fmt, output=args.output, bins=args.bins, version=args.pin,
           storage_options=so or None)
    return 0


_COMMANDS = {"build": _cmd_build, "show": _cmd_show, "verify": _cmd_verify, "demo": _cmd_demo,
             "history": _cmd_history, "gc": _cmd_gc, "diff": _cmd_diff, "export": _cmd_export}


def _exit_code(e: BaseException) -> int:
    from .errors import (FormatError, InputError, NoInputError, PublishRaceError,
                         SchedulerUnavailableError, StorageError)

    for cls, name in ((NoInputError, "no_input"), (PublishRaceError, "race"),
                      (FormatError, "format"), (InputError, "bad_input"),
                      (StorageError, "storage"), (SchedulerUnavailableError, "scheduler")):
        if isinstance(e, cls):
            return EXIT_CODES[name]
    if isinstance(e, SketchmergeError):
        return EXIT_CODES["usage"]
    return EXIT_CODES["internal"]


class _Scrub(logging.Filter):
    """Replace credential values in every record a handler emits: with --debug, library
    loggers print request headers (botocore's carry the access key id)."""

    def __init__(self, secrets: tuple[str, ...]):
        super().__init__()
        self.secrets = secrets

    def _clean(self, text: str) -> str:
        for s in self.secrets:
            text = text.replace(s, "***")
        return text

    def filter(self, record: logging.LogRecord) -> bool:
        if self.secrets:
            msg = record.getMessage()
            clean = self._clean(msg)
            if clean != msg:
                record.msg, record.args = clean, ()
            if record.exc_info and not record.exc_text:
                record.exc_text = logging.Formatter().formatException(record.exc_info)
            if record.exc_text:
                record.exc_text = self._clean(record.exc_text)
        return True


def _credentials(so: dict) -> tuple[str, ...]:
    """Values to keep out of every output: credential-like storage options and environment."""
    from .sources import _SECRET_KEY, _secret_values

    env = [v for k, v in os.environ.items() if _SECRET_KEY.search(k) and len(v) >= 8]
    return tuple(sorted(set(_secret_values(so)) | set(env), key=len, reverse=True))


_AS_PROGRAM = [False]


def main(argv=None) -> int:
    """Entry point of the ``sketchmerge`` console script."""
    _AS_PROGRAM[0] = argv is None  # the console script and ``python -m`` pass no argv
    parser = make_parser()
    args = parser.parse_args(argv)
    try:
        so = parse_storage_options(args.storage_option)
    except argparse.ArgumentTypeError as e:
        parser.error(str(e))
    scrub = _Scrub(_credentials(so))
    level = logging.DEBUG if args.debug else logging.WARNING if args.quiet else logging.INFO
    # our own handler on our own logger: library loggers (distributed, fsspec...) stay quiet
    # unless --debug, and their records never reach stdout
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(logging.Formatter("sketchmerge: %(message)s"))
    handler.addFilter(scrub)
    ours = logging.getLogger("sketchmerge")
    saved = (ours.handlers[:], ours.propagate, ours.level)
    ours.handlers[:] = [handler]
    ours.propagate = False
    ours.setLevel(level)
    try:
        return _run(args, so, scrub)
    finally:  # main() may run in-process (tests, notebooks): leave our logger as it was
        ours.handlers[:] = saved[0]
        ours.propagate = saved[1]
        ours.setLevel(saved[2])


def _run(args, so, scrub) -> int:
    if args.debug:
        logging.basicConfig(level=logging.DEBUG, stream=sys.stderr)
        for h in logging.getLogger().handlers:
            h.addFilter(scrub)
    else:
        for noisy in ("distributed", "asyncio", "fsspec", "s3fs", "botocore", "aiobotocore", "tornado"):
            logging.getLogger(noisy).setLevel(logging.ERROR)
    try:
        return _COMMANDS[args.command](args, so)
    except KeyboardInterrupt:
        print("sketchmerge: interrupted", file=sys.stderr)
        return 130
    except Exception as e:  # one clear line; a traceback only with --debug
        from .sources import redact

        code = _exit_code(e)
        if args.debug:
            import traceback

            sys.stderr.write(redact(scrub._clean(traceback.format_exc())))
            return code
        kind = "internal error" if code == 1 else "error"
        msg = redact(str(e), scrub.secrets)
        print(f"sketchmerge: {kind}: {msg}", file=sys.stderr)
        if code == 1:
            print("sketchmerge: this is a bug; rerun with --debug for the traceback", file=sys.stderr)
        return code


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
