"""Child-process entry points, each timed whole (``python -m suite.tasks NAME ...``).

``scan DIR COLS``       read the columns of every Parquet file into numpy with pyarrow
                        (multi-threaded reader, all cores): the floor a build is held to.
``dask DIR COLS Q OUT`` dask.dataframe's ``quantile`` of every column at Q targets
                        (unweighted: it takes no weights and states no error bound).
``exact DIR COLS W Q OUT``  numpy's exact weighted ``quantile`` (``inverted_cdf``) of every
                        column, all rows in memory; W is the weight column.
``worker DIR TABLE W BUDGET``  a build on a one-worker, one-thread process cluster; prints
                        the worker process's own peak RSS.
Results go to OUT as ``.npz`` (one array per column).
"""

from __future__ import annotations

import sys


def _files(folder: str) -> list[str]:
    from suite.data import data_files

    return data_files(folder)


def scan(folder: str, cols: list[str]) -> None:
    import pyarrow.parquet as pq

    values = 0
    for f in _files(folder):
        t = pq.read_table(f, columns=cols)
        for c in cols:
            values += t.column(c).to_numpy().size
    print(values)


def dask_quantile(folder: str, cols: list[str], bins: int, out: str) -> None:
    import dask
    import dask.dataframe as dd
    import numpy as np

    q = np.arange(1, bins + 1) / bins
    df = dd.read_parquet(_files(folder), columns=cols)
    with dask.config.set(scheduler="threads"):
        res = df.quantile(q).compute()
    np.savez(out, **{c: res[c].to_numpy(dtype=np.float64) for c in cols})


def exact_quantile(folder: str, cols: list[str], weight: str, bins: int, out: str) -> None:
    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq

    t = pa.concat_tables(pq.read_table(f, columns=cols + [weight]) for f in _files(folder))
    w = t.column(weight).to_numpy()
    q = np.arange(1, bins + 1) / bins
    res = {}
    for c in cols:
        x = t.column(c).to_numpy(zero_copy_only=False)
        ok = ~np.isnan(x)
        res[c] = np.quantile(x[ok], q, weights=w[ok], method="inverted_cdf")
    np.savez(out, **res)


def worker_peak(folder: str, table: str, weight: str, byte_budget: int) -> None:
    """Build on a one-process, one-thread local cluster; print the worker's peak RSS (kB)."""
    import json
    import resource

    from distributed import Client, LocalCluster

    import sketchmerge

    cluster = LocalCluster(n_workers=1, threads_per_worker=1, processes=True,
                           dashboard_address=None, silence_logs=50)
    client = Client(cluster)
    try:
        rep = sketchmerge.build(folder, table, client=client, weight_column=weight,
                                byte_budget=byte_budget or None, full=True)
        peak = client.run(lambda: resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)
    finally:
        client.close()
        cluster.close()
    print(json.dumps({"worker_rss_kb": max(peak.values()), "units": rep["partitions_total"],
                      "rows": rep["rows"]}))


def main(argv: list[str]) -> None:
    name, folder, cols = argv[0], argv[1], argv[2].split(",")
    if name == "scan":
        scan(folder, cols)
    elif name == "dask":
        dask_quantile(folder, cols, int(argv[3]), argv[4])
    elif name == "worker":
        worker_peak(folder, argv[2], argv[3], int(argv[4]))
    elif name == "exact":
        exact_quantile(folder, cols, argv[3], int(argv[4]), argv[5])
    else:
        raise SystemExit(f"unknown task {name!r}")


if __name__ == "__main__":
    main(sys.argv[1:])
