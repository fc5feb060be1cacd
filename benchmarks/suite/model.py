"""The cost model: constants fitted on small measured pieces, checked on larger runs.

Fitted (one thread, one unit, from :func:`cases.per_unit`):

* ``c_read``   CPU seconds per value read and decoded (selected columns only);
* ``c_sketch`` CPU seconds per value sketched into a pruned leaf summary;
* ``c_unit``   CPU seconds per unit for everything else in the task (weights, encode);
* ``e_leaf``   blob bytes per summary entry.

Fitted on the smallest fully merged tree (:func:`cases.merges`):

* ``c_entry``  CPU seconds per child entry merged, per feature (merge + prune + codec).

Model, for R rows, f features, units of u rows (U = R/u), the default fan-in, the node counts and
capacities of :func:`sketchmerge.tree.plan_tree`:

    sketch CPU  = R * ((f + 1) * c_read + f * c_sketch) + U * c_unit
    merge CPU   = f * c_entry * sum over nodes (children x child capacity)
    blob bytes  = U * f * (b_leaf + 1) * e_leaf + nodes * f * (b_node + 1) * e_leaf
    driver mem  = root blob + its decoded arrays (32 B per entry) + the plan (per unit)
    wall on N workers ~ (sketch CPU + merge CPU) / N   (units >> N; one core per worker)
"""

from __future__ import annotations

import tracemalloc

from . import cases


def _plan_terms(units: int, bins: int):
    plan, _ = cases._plan(units, 1.0 / (8 * bins))
    child_entries = 0
    for lvl in plan.levels:
        cap = plan.leaf_capacity if lvl[0].level == 1 else plan.node_capacity
        child_entries += sum(len(n.children) for n in lvl) * (cap + 1)
    nodes = sum(len(lvl) for lvl in plan.levels)
    return plan, nodes, child_entries


def fit(res: dict, bins: int) -> dict:
    pu = res["per_unit"]
    rows, f = pu["rows"], pu["features"]
    c_read = pu["read_cpu_s"] / (rows * (f + 1))
    c_sketch = pu["sketch_cpu_s"] / (rows * f)
    c_unit = max(0.0, pu["task_cpu_s"] - pu["read_cpu_s"] - pu["sketch_cpu_s"])
    e_leaf = pu["blob_bytes_per_entry"]
    full = [m for m in res["merges"]["points"] if m["mode"] == "full"]
    base = min(full, key=lambda m: m["units"]) if full else res["merges"]["points"][0]
    _, _, ce = _plan_terms(base["units"], bins)
    c_entry = base["cpu_s"] / (ce * 8)   # the synthetic merges have 8 features
    tracemalloc.start()
    plan_units = 10_000
    keep = cases._plan(plan_units, 1.0 / (8 * bins))
    plan_bytes = tracemalloc.get_traced_memory()[0] / plan_units
    tracemalloc.stop()
    del keep
    return {"c_read_ns": c_read * 1e9, "c_sketch_ns": c_sketch * 1e9, "c_unit_ms": c_unit * 1e3,
            "e_leaf": e_leaf, "c_entry_ns": c_entry * 1e9, "plan_bytes_per_unit": plan_bytes,
            "fitted_on": {"unit_rows": rows, "merge_units": base["units"]}}


def predict(k: dict, rows: int, features: int, unit_rows: int, bins: int, workers: int = 1) -> dict:
    units = max(1, -(-rows // unit_rows))
    plan, nodes, child_entries = _plan_terms(units, bins)
    sketch = rows * ((features + 1) * k["c_read_ns"] + features * k["c_sketch_ns"]) * 1e-9 \
        + units * k["c_unit_ms"] * 1e-3
    merge = features * k["c_entry_ns"] * 1e-9 * child_entries
    blob = (units * features * (plan.leaf_capacity + 1) * k["e_leaf"]
            + nodes * features * (plan.node_capacity + 1) * k["e_leaf"])
    root = features * (plan.node_capacity + 1)
    driver = root * k["e_leaf"] + root * 32 + units * k["plan_bytes_per_unit"]
    return {"rows": rows, "features": features, "unit_rows": unit_rows, "units": units,
            "depth": plan.depth, "nodes": nodes, "leaf_capacity": plan.leaf_capacity,
            "node_capacity": plan.node_capacity,
            "sketch_cpu_s": sketch, "merge_cpu_s": merge, "cpu_s": sketch + merge,
            "wall_s": (sketch + merge) / workers, "workers": workers,
            "blob_bytes": blob, "driver_bytes": driver,
            "worker_bytes": 2 * unit_rows * (features + 1) * 8 + root * 32}


def checks(k: dict, res: dict, bins: int) -> list[dict]:
    """Model against measured points it was not fitted on."""
    out = []
    wp = res.get("whole_process")
    if wp:
        b = wp.get("build_rowgroup_units") or wp["build_default_units"]
        base_cpu = res["memory"]["baseline"]["cpu_s"] if "memory" in res else 0.0
        unit_rows = wp["rows"] // b["units"]
        pr = predict(k, wp["rows"], len(cases.FEATS), unit_rows, bins)
        out.append({"what": f"build CPU s, {wp['rows']:,} rows, {b['units']} units "
                            "(whole process less a 1,000-row build's)",
                    "predicted": pr["cpu_s"], "measured": b["cpu_s"] - base_cpu})
        out.append({"what": f"blob bytes of that build ({b['blobs']} blobs)",
                    "predicted": pr["blob_bytes"], "measured": b["blob_bytes"]})
    g = res.get("growth")
    if g:
        fixed = g["points"][0]["seconds"] - predict(k, g["points"][0]["rows"], len(cases.FEATS),
                                                    g["points"][0]["rows"], bins, 2)["wall_s"]
        for q in g["points"][1:]:
            pr = predict(k, q["rows"], len(cases.FEATS), q["rows"] // q["units"], bins, 2)
            out.append({"what": f"build wall s on 2 threads, {q['rows']:,} rows "
                                "(+ the smallest point's fixed cost)",
                        "predicted": pr["wall_s"] + fixed, "measured": q["seconds"]})
    for m in res.get("merges", {}).get("points", []):
        if m["units"] == k["fitted_on"]["merge_units"]:
            continue
        pr = predict(k, m["units"], 8, 1, bins)
        out.append({"what": f"merge CPU s, {m['units']:,} units x 8 features ({m['mode']})",
                    "predicted": pr["merge_cpu_s"], "measured": m["cpu_s"]})
    for c in out:
        c["ratio"] = c["predicted"] / c["measured"] if c["measured"] else float("nan")
    return out


def extrapolate(k: dict, bins: int, unit_rows: int = 250_000) -> list[dict]:
    """10 billion rows x 200 features on N workers."""
    return [predict(k, 10_000_000_000, 200, unit_rows, bins, n) for n in (8, 32, 128, 512)]
