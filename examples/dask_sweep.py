"""The same sweep on a Dask cluster (here a LocalCluster on this machine).

Point ``Client(...)`` at your scheduler's address to spread the runs over many
machines; rnnkit only needs a ``concurrent.futures.Executor``. The SQLite store
stays with this process, so the sweep still resumes after a crash.

    pip install "rnnkit[distributed]"
    python examples/dask_sweep.py
"""
from dask.distributed import Client, LocalCluster

import rnnkit


def main():
    df = rnnkit.datasets.cold_storage_load(years=40 / 365)
    base = rnnkit.Config(target="load_kw", missing="interpolate", hidden=8, epochs=2)
    space = {"window": [12, 24]}
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                      dashboard_address=None) as cluster, Client(cluster) as client:
        result = rnnkit.sweep(df, base, space, executor=client.get_executor(), progress=False)
    print(result.summary().to_string())


if __name__ == "__main__":  # Dask starts worker processes that import this file
    main()
