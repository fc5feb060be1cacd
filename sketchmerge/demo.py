"""``sketchmerge demo``: generate a dataset, build its cut table, show and verify it.

The scenario is invented for the demo: a chain of vertical farms logs one row
per tray per reading, and a model predicts whether a tray needs water.  The
generated features cover the cases a cut table must handle: missing values
(``soil_moisture_pct``), float32 (``air_temp_c``), a heavy tail
(``light_lux``), few distinct values (``rack_tier``), a boolean
(``vent_open``), a point mass (``co2_ppm``, a sensor's default reading), a
sample-weight column (``tray_area_m2``), a label (``needs_water``) and a text
column that is skipped (``farm``).
"""

from __future__ import annotations

import os
import sys

import numpy as np

__all__ = ["generate", "run_demo"]

FARMS = np.array(["north-hall", "river-dock", "old-mill", "glasshouse-7"])


def generate(folder: str, rows: int = 400_000, days: int = 4, seed: int = 7) -> list[str]:
    """Write ``days`` hive partitions (``day=2026-11-DD``) of Parquet under ``folder``."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    rng = np.random.default_rng(seed)
    paths = []
    per_day = max(1, rows // days)
    for d in range(days):
        n = per_day if d < days - 1 else rows - per_day * (days - 1)
        moisture = rng.beta(2.0, 3.0, n) * 100.0
        moisture[rng.random(n) < 0.08] = np.nan  # probe dropouts
        temp = (rng.normal(21.0 + 0.5 * d, 3.5, n)).astype(np.float32)
        lux = rng.lognormal(9.0, 1.2, n)
        tier = rng.integers(1, 6, n).astype(np.int16)
        vent = rng.random(n) < 0.3
        co2 = rng.normal(650.0, 120.0, n)
        co2[rng.random(n) < 0.15] = 400.0  # sensors report 400 ppm until calibrated
        area = rng.choice([0.25, 0.5, 1.0], n, p=[0.5, 0.3, 0.2])
        logit = -0.06 * (np.nan_to_num(moisture, nan=40.0) - 35.0) + 0.15 * (temp - 21.0) - 0.3 * vent
        label = rng.random(n) < 1.0 / (1.0 + np.exp(-logit))
        t = pa.table({"soil_moisture_pct": moisture, "air_temp_c": temp, "light_lux": lux,
                      "rack_tier": tier, "vent_open": vent, "co2_ppm": co2,
                      "tray_area_m2": area, "needs_water": label,
                      "farm": FARMS[rng.integers(0, FARMS.size, n)]})
        sub = os.path.join(folder, f"day=2026-11-{d + 1:02d}")
        os.makedirs(sub, exist_ok=True)
        half = n // 2
        for part, (a, b) in enumerate(((0, half), (half, n))):
            p = os.path.join(sub, f"part-{part}.parquet")
            pq.write_table(t.slice(a, b - a), p, row_group_size=50_000)
            paths.append(p)
    return paths


def run_demo(folder: str, rows: int = 400_000, workers: int | None = None, json_mode: bool = False) -> dict:
    """Generate (once), build, show and verify; print a walk-through unless ``json_mode``."""
    from .job import build
    from .cli import format_build, format_show
    from .cuts import load
    from .verify import format_verify, verify

    data = os.path.join(folder, "data")
    table = os.path.join(folder, "table")
    say = (lambda *a: None) if json_mode else (lambda *a: print(*a, file=sys.stdout, flush=True))
    if not os.path.isdir(data):
        say(f"generating {rows:,} rows of vertical-farm tray readings under {data} ...")
        generate(data, rows=rows)
    say(f"building the cut table {table} on Dask's local threaded scheduler ...")
    rep = build(data, table, weight_column="tray_area_m2", label_column="needs_water",
                workers=workers, json_mode=json_mode)
    say(format_build(rep))
    say("")
    cuts = load(table)
    say(format_show(cuts))
    say("")
    say("verifying every edge against the exact weighted ranks of all rows ...")
    ver = verify(table, data, workers=workers)
    say(format_verify(ver))
    say("")
    say("training jobs load it with:\n"
        f"    cuts = sketchmerge.load({table!r})\n"
        "    codes = cuts.bin(frame, features=[...])")
    return {"build": rep, "verify": ver}
