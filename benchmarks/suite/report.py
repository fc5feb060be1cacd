"""The Markdown table and the PNG chart of one run."""

from __future__ import annotations

import math


def _s(x: float) -> str:
    return f"{x:.2f} s" if x < 100 else f"{x:,.0f} s"


def _mb(x: float) -> str:
    return f"{x:,.0f} MB"


def _bytes(x: float) -> str:
    for unit, div in (("TB", 1e12), ("GB", 1e9), ("MB", 1e6), ("kB", 1e3)):
        if x >= div:
            return f"{x / div:,.1f} {unit}"
    return f"{x:,.0f} B"


def _ok(flag) -> str:
    return "met" if flag else "**not met**"


def goals(res: dict) -> list[tuple[str, str, str, str]]:
    """(goal, measured, target, status) rows."""
    rows = []
    wp = res.get("whole_process")
    if wp:
        for name, label in (("build_default_units", "default units"),
                            ("build_rowgroup_units", "one row group per unit")):
            if name not in wp:
                continue
            b = wp[name]
            # judged on the median of the interleaved rounds (each ratio pairs runs that
            # met the same machine); best of each beside it
            judged = b.get("ratio_wall_median", b["ratio_wall"])
            measured = (f"{b['ratio_wall_median']:.2f}x, median of {wp['rounds']} interleaved rounds "
                        f"(range {b['ratio_wall_range'][0]:.2f}-{b['ratio_wall_range'][1]:.2f}x); "
                        f"best of each {b['ratio_wall']:.2f}x ({_s(b['wall_s'])} / "
                        f"{_s(wp['scan']['wall_s'])})" if "ratio_wall_median" in b else
                        f"{b['ratio_wall']:.2f}x ({_s(b['wall_s'])} / {_s(wp['scan']['wall_s'])})")
            rows.append((f"weighted build / pyarrow scan, wall ({label}, {b['units']} units)",
                         measured, "<= 1.5x (milestone 2.5x)",
                         "met" if judged <= 1.5 else
                         ("milestone only" if judged <= 2.5 else "**not met**")))
            rows.append((f"weighted build / pyarrow scan, CPU ({label})",
                         f"{b['ratio_cpu']:.2f}x ({_s(b['cpu_s'])} / {_s(wp['scan']['cpu_s'])})",
                         "(reported)", ""))
        for name, label, goal in (("build_rowgroup_units", "one row group per unit", True),
                                  ("build_default_units", "default units", False)):
            if name in wp:
                b = wp[name]
                rows.append((f"all blobs / input bytes ({label})",
                             f"{100 * b['blob_share']:.2f}% ({_bytes(b['blob_bytes'])} / "
                             f"{_bytes(wp['input_bytes'])})", "<= 1%" if goal else "(reported)",
                             _ok(b["blob_share"] <= 0.01) if goal else ""))
    vd = res.get("versus_dask")
    if vd:
        rows.append(("speed-up over dask.dataframe quantile (unweighted), wall",
                     f"{vd['speedup_vs_dask_wall']:.1f}x ({_s(vd['dask']['wall_s'])} / "
                     f"{_s(vd['sketchmerge_unweighted']['wall_s'])})", ">= 5x",
                     _ok(vd["speedup_vs_dask_wall"] >= 5)))
        if "scan_8_features" in vd:
            fl = vd["scan_8_features"]
            rows.append(("ceiling of that speed-up: a plain pyarrow scan of the same 8 columns "
                         "(no sketch at all) over dask, wall",
                         f"{vd['scan_8_features_vs_dask']:.1f}x ({_s(vd['dask']['wall_s'])} / "
                         f"{_s(fl['wall_s'])}); 5x dask would be {_s(vd['dask']['wall_s'] / 5)}",
                         "(reported)", ""))
        wst = vd["rank_error_worst"]
        rows.append(("worst measured edge rank error: sketchmerge / dask / numpy exact",
                     f"{wst['sketchmerge']:.2e} (certified {wst['sketchmerge_certified']:.2e}) / "
                     f"{wst['dask']:.2e} (none) / {wst['numpy_exact_weighted']:.1e}",
                     "sketchmerge <= certified", _ok(all(
                         r["sketchmerge"] <= r["sketchmerge_certified"] + 1e-12
                         and r["sketchmerge_weighted"] <= r["sketchmerge_weighted_certified"] + 1e-12
                         for r in vd["rank_error_per_feature"].values()))))
        rows.append(("worst measured weighted edge rank error (certified)",
                     f"{wst['sketchmerge_weighted']:.2e} ({wst['sketchmerge_weighted_certified']:.2e})",
                     "<= certified", ""))
    mem = res.get("memory")
    if mem:
        for name, c in mem["cases"].items():
            rows.append((f"peak RSS, embedded build, 1 thread ({name.replace('_', ' ')}, "
                         f"{c['unit_rows']:,}-row units)",
                         f"{_mb(c['rss_mb'])}: {_mb(c['excess_mb'])} over a 1,000-row build = "
                         f"{c['excess_over_unit']:.2f}x one unit's decoded columns "
                         f"({c['unit_decoded_mb']:.0f} MB)",
                         f"<= 2x + O(f/eps) = {c['allowance_mb']:.0f} MB over",
                         _ok(c["excess_mb"] <= c["allowance_mb"])))
        for name, c in mem.get("worker", {}).items():
            rows.append((f"peak RSS of a worker process, 1 thread ({name.replace('_', ' ')}, "
                         f"{c['unit_rows']:,}-row units)",
                         f"{_mb(c['rss_mb'])}: {_mb(c['excess_mb'])} over a 1,000-row build = "
                         f"{c['excess_over_unit']:.2f}x one unit's decoded columns "
                         f"({c['unit_decoded_mb']:.0f} MB)",
                         f"<= 2x + O(f/eps) = {c['allowance_mb']:.0f} MB over",
                         _ok(c["excess_mb"] <= c["allowance_mb"])))
        sc = mem["units_scaling"]
        ks = sorted(sc, key=int)
        if ks:
            grow = sc[ks[-1]]["rss_mb"] / sc[ks[0]]["rss_mb"]
            rows.append((f"peak RSS, embedded build, {ks[0]} vs {ks[-1]} units of the same size",
                         f"{_mb(sc[ks[0]]['rss_mb'])} vs {_mb(sc[ks[-1]]['rss_mb'])} (x{grow:.2f} for "
                         f"x{int(ks[-1]) // int(ks[0])} the units)",
                         "(reported: grows with the tree's depth, not the units)", ""))
    pu = res.get("per_unit")
    if pu:
        rows.append(("blob bytes per feature per unit (default settings)",
                     f"{pu['blob_bytes_per_feature']:,.0f} B ({pu['blob_bytes_per_entry']:.1f} B/entry, "
                     f"{pu['rows']:,}-row unit)", "(reported)", ""))
        rows.append(("one unit's blob / its stored bytes",
                     f"{100 * pu['blob_share_of_unit']:.2f}%", "<= 1%", _ok(pu["blob_share_of_unit"] <= 0.01)))
    g = res.get("growth")
    if g:
        rows.append(("build time vs rows (4 sizes, x4 each): worst deviation from a line",
                     f"{100 * g['max_abs_residual']:.0f}% (step ratios "
                     + ", ".join(f"{r:.2f}" for r in g["step_ratios"]) + ")",
                     "linear", _ok(g["max_abs_residual"] <= 0.25)))
    m = res.get("merges")
    if m:
        rows.append(("merge CPU per unit across " + ", ".join(f"{p['units']:,}" for p in m["points"])
                     + " units", " / ".join(f"{1e3 * x:.1f} ms" for x in m["cpu_s_per_unit"]),
                     "linear (flat per unit)", _ok(m["per_unit_spread"] <= 1.5)))
    r = res.get("refresh")
    if r:
        best = (f"best of each {r['new_unit_ratio']:.3f} ({_s(r['new_unit_s'])} / {_s(r['full_s'])}; "
                f"{len(r.get('new_unit_s_all', [0]))} refreshes, "
                f"{min(r.get('new_unit_s_all', [r['new_unit_s']])) / r['full_s']:.3f}-"
                f"{max(r.get('new_unit_s_all', [r['new_unit_s']])) / r['full_s']:.3f} of the best full build)")
        if "full_s_all" in r:  # judged like the whole-process ratios: the rounds' median
            judged = r["new_unit_ratio_median"]
            measured = (f"{judged:.3f}, median of {len(r['full_s_all'])} interleaved rounds; " + best)
        else:
            judged, measured = r["new_unit_ratio"], best
        rows.append((f"refresh, 1 new unit on {r['units_before']} (in-process) / full build",
                     measured, "<= 1/20", _ok(judged <= 0.05)))
        rows.append(("rerun, nothing changed (in-process) / full build",
                     f"{r['unchanged_ratio']:.3f} ({_s(r['unchanged_s'])})", "(reported)", ""))
        if "whole_process_new_unit" in r:
            rows.append(("refresh, 1 new unit, whole process (start-up included)",
                         f"{_s(r['whole_process_new_unit']['wall_s'])}; unchanged "
                         f"{_s(r['whole_process_unchanged']['wall_s'])}", "(reported)", ""))
    rp = res.get("refresh_path")
    if rp:
        for where, x in rp.items():
            rows.append((f"1 new unit among {x['units'] - 1:,} cached, at the {where}",
                         f"{x['nodes_recomputed']} of {x['nodes_total']:,} nodes, "
                         f"{x['cached_blobs_read']} cached blobs read, merges {_s(x['merge_cpu_s'])} CPU",
                         "one path (<= 2 x depth)", _ok(x["nodes_recomputed"] <= 2 * x["depth"])))
    st = res.get("startup")
    if st:
        rows.append((f"embedded default, {st['rows']:,}-row build, whole process",
                     _s(st["build"]["wall_s"]), "<= 3 s", _ok(st["build"]["wall_s"] <= 3.0)))
        k = st["cluster_kinds"]
        rows.append(("a distributed LocalCluster ready: " + " / ".join(k) + " (the embedded default "
                     "starts none)", " / ".join(_s(v["ready_s"]) for v in k.values()),
                     "(chooses the default)", ""))
    return rows


def markdown(res: dict, meta: dict) -> str:
    out = [f"# sketchmerge benchmark results{' (quick mode)' if meta['quick'] else ''}", "",
           f"Command: `{meta['command']}`  ", f"Machine: {meta['cores']} cores, "
           f"load average before/after {meta['load_before']} / {meta['load_after']}; "
           f"run took {meta['seconds']:.0f} s.  ",
           f"Data: {meta['data']}  ",
           f"sketchmerge's bytecode: {meta.get('bytecode', 'not recorded')} (the libraries' "
           "comes with their wheels).", "",
           "| goal | measured | target | status |", "|---|---|---|---|"]
    for g, m, t, s in goals(res):
        out.append(f"| {g} | {m} | {t} | {s} |")
    pu = res.get("per_unit")
    if pu:
        out += ["", f"## One unit, one thread ({pu['rows']:,} rows, {pu['features']} features + weight)",
                "", "| step | CPU | rate |", "|---|---|---|",
                f"| iter_unit (9 columns, features as views, as the task reads) | {1e3 * pu['read_cpu_s']:.1f} ms | "
                f"{pu['read_values_per_s'] / 1e6:.0f} M values/s |",
                f"| sketch x {pu['features']} (capacity {pu['leaf_capacity']}, weights checked once) | "
                f"{1e3 * pu['sketch_cpu_s']:.1f} ms | {pu['sketch_values_per_s'] / 1e6:.0f} M values/s |",
                f"| numpy argsort x {pu['features']} (for scale) | {1e3 * pu['argsort_cpu_s']:.1f} ms | |",
                f"| encode summary set | {1e3 * pu['encode_cpu_s']:.2f} ms | {pu['blob_bytes']:,} B |",
                f"| put_blob (local) | {1e3 * pu['put_cpu_s']:.2f} ms CPU, {1e3 * pu['put_wall_s']:.1f} ms wall | |",
                f"| whole sketch task | {1e3 * pu['task_cpu_s']:.1f} ms | |"]
    pr = res.get("profile")
    if pr and pr.get("shares"):
        out += ["", f"Profile of the sketch task over {pr['units']} units (pyinstrument, "
                "[profile.txt](profile.txt)): " + ", ".join(
                    f"{k} {100 * v:.0f}%" for k, v in sorted(pr["shares"].items(), key=lambda kv: -kv[1]))
                + " of the time."]
    wp = res.get("whole_process")
    vd = res.get("versus_dask")
    if wp or vd:
        out += ["", "## Whole processes (best of the repeats)", "",
                "| run | wall | CPU | peak RSS |", "|---|---|---|---|"]
        runs = []
        if wp:
            runs.append(("pyarrow scan to numpy (9 columns)", wp["scan"]))
            for name, label in (("build_default_units", "default units"),
                                ("build_rowgroup_units", "one row group per unit")):
                if name in wp:
                    runs.append((f"sketchmerge build, weighted, {label} ({wp[name]['units']})",
                                 wp[name]))
        if vd:
            if "scan_8_features" in vd:
                runs.append(("pyarrow scan to numpy (the 8 feature columns)", vd["scan_8_features"]))
            runs += [("sketchmerge build, unweighted", vd["sketchmerge_unweighted"]),
                     ("dask.dataframe quantile, unweighted", vd["dask"]),
                     ("numpy exact weighted quantile, in memory", vd["numpy_exact_weighted"])]
        for name, r in runs:
            out.append(f"| {name} | {_s(r['wall_s'])} | {_s(r['cpu_s'])} | {_mb(r['rss_mb'])} |")
    if vd:
        out += ["", "## Measured edge rank error per feature (against all rows, exact ranks)", "",
                "| feature | sketchmerge | certified | weighted | certified | dask | numpy exact |",
                "|---|---|---|---|---|---|---|"]
        for f, r in vd["rank_error_per_feature"].items():
            out.append(f"| {f} | {r['sketchmerge']:.2e} | {r['sketchmerge_certified']:.2e} | "
                       f"{r['sketchmerge_weighted']:.2e} | {r['sketchmerge_weighted_certified']:.2e} | "
                       f"{r['dask']:.2e} | {r['numpy_exact_weighted']:.1e} |")
    g = res.get("growth")
    if g:
        out += ["", "## Build time against rows (in-process, shared 2-thread cluster)", "",
                "| rows | units | seconds | line fit | deviation |", "|---|---|---|---|---|"]
        for q in g["points"]:
            out.append(f"| {q['rows']:,} | {q['units']} | {q['seconds']:.3f} | {q['fit_seconds']:.3f} | "
                       f"{100 * q['residual']:+.0f}% |")
        out.append(f"\nFit: {g['fit_intercept_s']:.3f} s + {g['fit_ns_per_row']:.0f} ns/row.")
    m = res.get("merges")
    if m:
        out += ["", "## Merges of synthetic unit summaries x 8 features (one thread)", "",
                "| units | depth | node capacity | nodes | how | CPU | per unit |", "|---|---|---|---|---|---|---|"]
        for p in m["points"]:
            out.append(f"| {p['units']:,} | {p['depth']} | {p['node_capacity']:,} | {p['nodes']:,} | "
                       f"{p['mode']} | {_s(p['cpu_s'])} | {1e3 * p['cpu_s'] / p['units']:.1f} ms |")
        out.append("\n'sampled': an even sample of nodes per level merged (children synthesized at the "
                   "level's capacity), total = node count x mean per level.")
    mo = res.get("model")
    if mo:
        k = mo["constants"]
        out += ["", "## Cost model", "",
                f"Constants: read {k['c_read_ns']:.2f} ns/value, sketch {k['c_sketch_ns']:.1f} ns/value, "
                f"other {k['c_unit_ms']:.1f} ms/unit, {k['e_leaf']:.1f} blob bytes/entry, merge "
                f"{k['c_entry_ns']:.1f} ns per child entry per feature, plan {k['plan_bytes_per_unit']:,.0f} "
                "B/unit on the driver.", "",
                "| check | predicted | measured | ratio |", "|---|---|---|---|"]
        for c in mo["checks"]:
            out.append(f"| {c['what']} | {c['predicted']:,.3g} | {c['measured']:,.3g} | {c['ratio']:.2f} |")
        out += ["", "10 billion rows x 200 features, 250,000-row units:", "",
                "| workers | units | depth | nodes | CPU | wall | blob bytes | driver memory | per worker |",
                "|---|---|---|---|---|---|---|---|---|"]
        for e in mo["extrapolation"]:
            out.append(f"| {e['workers']} | {e['units']:,} | {e['depth']} | {e['nodes']:,} | "
                       f"{e['cpu_s'] / 3600:,.1f} CPU-h | {e['wall_s'] / 60:,.1f} min | "
                       f"{_bytes(e['blob_bytes'])} | {_bytes(e['driver_bytes'])} | "
                       f"{_bytes(e['worker_bytes'])} |")
    return "\n".join(out) + "\n"


def chart(res: dict, path: str) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(2, 2, figsize=(12, 8.5))
    a = ax[0][0]
    bars = []
    wp, vd = res.get("whole_process"), res.get("versus_dask")
    if wp:
        bars.append(("pyarrow\nscan", wp["scan"]["wall_s"]))
        bars += [(label, wp[name]["wall_s"]) for name, label in
                 (("build_default_units", "build\ndefault units"),
                  ("build_rowgroup_units", "build\nrow-group units")) if name in wp]
    if vd:
        bars += [("build\nunweighted", vd["sketchmerge_unweighted"]["wall_s"]),
                 ("dask\nquantile", vd["dask"]["wall_s"]),
                 ("numpy exact\nweighted", vd["numpy_exact_weighted"]["wall_s"])]
    if bars:
        colours = {"pyarrow": "#888888", "dask": "#c05621", "numpy": "#805ad5"}
        a.bar(range(len(bars)), [b[1] for b in bars],
              color=[colours.get(b[0].split("\n")[0].split()[0], "#2b6cb0") for b in bars])
        a.set_xticks(range(len(bars)), [b[0] for b in bars], fontsize=8)
        a.set_ylabel("wall seconds, whole process")
        a.set_title("Same files, same cores")
    g = res.get("growth")
    a = ax[0][1]
    if g:
        x = [q["rows"] for q in g["points"]]
        a.loglog(x, [q["seconds"] for q in g["points"]], "o-", label="measured")
        a.loglog(x, [q["fit_seconds"] for q in g["points"]], "--", label="a + b * rows")
        a.set_xlabel("rows")
        a.set_ylabel("build seconds (in-process)")
        a.set_title("Build time against rows")
        a.legend()
    m = res.get("merges")
    a = ax[1][0]
    if m:
        x = [p["units"] for p in m["points"]]
        a.loglog(x, [p["cpu_s"] for p in m["points"]], "o-", label="measured / sampled")
        mo = res.get("model")
        if mo:
            pred = [c["predicted"] for c in mo["checks"] if c["what"].startswith("merge")]
            xs = [p["units"] for p in m["points"] if p["units"] != mo["constants"]["fitted_on"]["merge_units"]]
            if pred and len(pred) == len(xs):
                a.loglog(xs, pred, "x--", label="cost model")
        a.set_xlabel("unit summaries (8 features)")
        a.set_ylabel("merge CPU seconds")
        a.set_title("Merge time against units")
        a.legend()
    r = res.get("refresh")
    a = ax[1][1]
    if r:
        vals = [r["full_s"], r["new_unit_s"], r["unchanged_s"]]
        a.bar([0, 1, 2], vals, color=["#2b6cb0", "#38a169", "#718096"])
        a.set_xticks([0, 1, 2], [f"full build\n{r['units_before']} units", "1 new unit", "nothing\nchanged"])
        a.set_ylabel("seconds (in-process)")
        a.set_title("Refresh")
        for i, v in enumerate(vals):
            a.text(i, v, f"{v:.2f} s", ha="center", va="bottom", fontsize=8)
    for row in ax:
        for a in row:
            if not a.has_data():
                a.set_visible(False)
    fig.tight_layout()
    fig.savefig(path, dpi=90)
    plt.close(fig)


def finite(obj):
    """JSON-ready copy: non-finite floats as strings."""
    if isinstance(obj, dict):
        return {str(k): finite(v) for k, v in obj.items() if not str(k).startswith("_")}
    if isinstance(obj, (list, tuple)):
        return [finite(v) for v in obj]
    if isinstance(obj, float) and not math.isfinite(obj):
        return str(obj)
    return obj
