"""The invented scenario shared by the examples: late parcel-drone flights.

A made-up coastal delivery cooperative flies parcel drones from a handful of
hubs.  Every flight is one row; a model predicts whether the flight lands
late (more than five minutes after the promised time).  Nothing here comes
from a real dataset: every column is drawn by :func:`generate` from the
distributions below, and the label from the known probability
:func:`late_probability`, so an example can compare its model with the best
possible one (the Bayes rate of the generator).

Columns and the case each one exercises for a cut table:

===================  =======================================================
``route_km``         heavy tail (a log-normal mix of short town hops and
                     long rural runs)
``wind_gust_ms``     skewed continuous (gamma)
``payload_kg``       float32
``battery_pct``      missing values (telemetry dropouts, about 7 %)
``hub_tier``         few distinct values (int8, 1 to 5)
``night``            boolean
``ceiling_m``        point mass (35 % of flights keep the default 120 m ceiling)
``rain_mm``          zero-inflated heavy tail (a point mass at 0)
``queue_depth``      small counts (parcels waiting at the hub)
``contract_weight``  sample weight (medical runs count 4x, business 2x)
``late``             the binary label
===================  =======================================================

The data are written as hive-style Parquet partitions, one folder per
flight day, under ``train/`` and ``test/`` (the held-out split is whole days
of their own, so the shared cut table is built from training data only).
"""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import tempfile

import numpy as np

__all__ = ["FEATURES", "LABEL", "WEIGHT", "generate", "late_probability", "read_split",
           "split_files", "workspace"]

FEATURES = ("route_km", "wind_gust_ms", "payload_kg", "battery_pct", "hub_tier", "night",
            "ceiling_m", "rain_mm", "queue_depth")
LABEL = "late"
WEIGHT = "contract_weight"


def late_probability(cols: dict) -> np.ndarray:
    """The generator's true probability that a flight is late (vectorised).

    Short town hops are almost never late; on longer runs lateness grows with
    distance in steps (each battery swap stop), with gusts above a threshold
    that depends on the payload, with rain, at night in wind, with a low
    battery, and with a long queue at small hubs.
    """
    km = cols["route_km"]
    gust = cols["wind_gust_ms"]
    kg = cols["payload_kg"].astype(np.float64)
    batt = cols["battery_pct"]
    tier = cols["hub_tier"].astype(np.float64)
    night = cols["night"].astype(np.float64)
    ceil = cols["ceiling_m"]
    rain = cols["rain_mm"]
    queue = cols["queue_depth"].astype(np.float64)

    long_run = km > 4.0
    # a swap stop every 9 km adds delay risk; a smooth ramp in between
    swaps = np.floor(np.maximum(km - 4.0, 0.0) / 9.0)
    dist = np.where(long_run, -1.2 + 0.55 * swaps + 0.9 * np.sin(km / 3.0), -4.0 + 0.35 * km)
    gust_limit = 11.0 - 1.5 * kg                     # heavier parcels tolerate less wind
    wind = 2.0 / (1.0 + np.exp(-(gust - gust_limit) * 1.5)) + 0.9 * night * (gust > 8.0)
    low_batt = np.where(np.isnan(batt), 0.4, np.clip((45.0 - batt) / 15.0, 0.0, 2.0))
    wet = 0.8 * np.log1p(rain)
    hub = 0.25 * queue * (tier <= 2) - 0.15 * tier
    low_ceiling = 0.6 * (ceil < 90.0)
    logit = dist + np.where(long_run, wind + wet + low_batt + hub + low_ceiling,
                            0.3 * (wind + wet))
    return 1.0 / (1.0 + np.exp(-logit))


def _day(rng: np.random.Generator, n: int, season: float) -> dict:
    town = rng.random(n) < 0.6
    km = np.where(town, rng.lognormal(0.4, 0.5, n), rng.lognormal(2.6, 0.7, n))
    gust = rng.gamma(3.0, 2.2 + season, n)
    kg = rng.gamma(2.0, 0.9, n).astype(np.float32)
    batt = rng.beta(5.0, 1.6, n) * 100.0
    batt[rng.random(n) < 0.07] = np.nan             # telemetry dropouts
    tier = rng.choice(np.arange(1, 6, dtype=np.int8), n, p=[0.1, 0.2, 0.3, 0.25, 0.15])
    night = rng.random(n) < 0.22
    ceil = np.where(rng.random(n) < 0.35, 120.0, rng.uniform(60.0, 400.0, n))
    rain = np.where(rng.random(n) < 0.7, 0.0, rng.pareto(2.5, n) * 3.0)
    queue = rng.poisson(3.0, n).astype(np.int32)
    medical = rng.random(n) < np.where(town, 0.03, 0.12)
    business = rng.random(n) < 0.3
    weight = np.where(medical, 4.0, np.where(business, 2.0, 1.0))
    cols = {"route_km": km, "wind_gust_ms": gust, "payload_kg": kg, "battery_pct": batt,
            "hub_tier": tier, "night": night, "ceiling_m": ceil, "rain_mm": rain,
            "queue_depth": queue}
    cols[WEIGHT] = weight
    cols[LABEL] = rng.random(n) < late_probability(cols)
    return cols


def generate(folder: str, rows: int = 1_000_000, days: int = 10, test_share: float = 0.2,
             seed: int = 2027, row_group: int = 65_536) -> dict:
    """Write the flights under ``folder/train`` and ``folder/test``; return the layout.

    ``rows`` is the total over both splits.  Every day is one partition
    folder ``day=2027-03-DD`` holding one Parquet file.  Returns
    ``{"train": path, "test": path, "train_rows": n, "test_rows": m}``.
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    if rows < 100:
        raise ValueError(f"rows: expected at least 100, got {rows}")
    rng = np.random.default_rng(seed)
    test_days = max(1, round(days * test_share))
    train_days = max(1, days - test_days)
    n_test = int(round(rows * test_share))
    n_train = rows - n_test
    out = {"train": os.path.join(folder, "train"), "test": os.path.join(folder, "test"),
           "train_rows": n_train, "test_rows": n_test}
    day = 0
    for split, total, ndays in (("train", n_train, train_days), ("test", n_test, test_days)):
        sizes = np.full(ndays, total // ndays)
        sizes[: total - sizes.sum()] += 1
        for n in sizes:
            day += 1
            cols = _day(rng, int(n), season=0.05 * day)
            sub = os.path.join(out[split], f"day=2027-03-{day:02d}")
            os.makedirs(sub, exist_ok=True)
            pq.write_table(pa.table(cols), os.path.join(sub, "part-0.parquet"),
                           row_group_size=row_group)
    return out


def read_split(path: str, columns=None):
    """Read one split back as a pyarrow Table, files in day order."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    want = list(columns) if columns else list(FEATURES) + [WEIGHT, LABEL]
    return pa.concat_tables([pq.read_table(f, columns=want) for f in split_files(path)])


def split_files(path: str) -> list[str]:
    """The Parquet files of one split, in day order."""
    out = []
    for day in sorted(os.listdir(path)):
        if day.startswith("day="):
            out.append(os.path.join(path, day, "part-0.parquet"))
    return out


_MARKER = "sketchmerge-example.json"


@contextlib.contextmanager
def workspace(parent: str | None, name: str):
    """A fresh working folder ``parent/name`` for one example run (a temp dir without ``parent``).

    A folder left by an earlier run of the same example (it holds our marker
    file) is cleared first; any other existing, non-empty folder is refused,
    so an example never deletes something it did not create.  The embedded
    cluster's scratch space goes inside the folder too, so a run writes
    nothing anywhere else.
    """
    if parent is None:
        with tempfile.TemporaryDirectory(prefix=f"sketchmerge-{name}-") as tmp:
            with _scratch_inside(tmp):
                yield tmp
        return
    root = os.path.join(parent, name)
    if os.path.isdir(root) and os.listdir(root):
        if not os.path.isfile(os.path.join(root, _MARKER)):
            raise FileExistsError(f"working folder {root}: expected an empty folder or one left by "
                                  f"this example, got other files; pick another --dir")
        shutil.rmtree(root)
    os.makedirs(root, exist_ok=True)
    with open(os.path.join(root, _MARKER), "w") as fh:
        json.dump({"example": name}, fh)
    with _scratch_inside(root):
        yield root


@contextlib.contextmanager
def _scratch_inside(root: str):
    import dask

    with dask.config.set({"temporary-directory": os.path.join(root, "dask-scratch")}):
        yield
