"""The same sweep on a Dask cluster (any concurrent.futures.Executor) gives the same table."""
import pandas as pd
import pytest
import statsmodels.api as sm

from rnnkit import Config, sweep
from rnnkit.sweeps._runner import worker_env
from tolerances import OTHER_PROCESS

distributed = pytest.importorskip(
    "dask.distributed", reason="dask.distributed is not installed (pip install 'rnnkit[distributed]')")


def test_dask_local_cluster_equals_the_serial_sweep(tmp_path):
    # Yearly sunspot numbers 1700-2008, the open data set shipped with statsmodels.
    df = sm.datasets.sunspots.load_pandas().data[["SUNACTIVITY"]]
    base = Config(target="SUNACTIVITY", hidden=4, epochs=2, batch_size=32, season=11)
    space = {"window": [4, 8], "activation": ["tanh", "relu"]}
    serial = sweep(df, base, space, progress=False)
    db = tmp_path / "runs.db"
    # env: each worker process starts with one XLA / BLAS thread (set before it imports jax).
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None, env=worker_env()) as cluster, \
            distributed.Client(cluster) as client:
        on_dask = sweep(df, base, space, executor=client.get_executor(), store=db, progress=False)
        used = client.run(lambda: __import__("os").environ["XLA_FLAGS"])
    assert all("--xla_cpu_multi_thread_eigen=false" in flags for flags in used.values())
    cols = [c for c in serial.table.columns if c.startswith(("val_", "test_")) or "_val_" in c
            or "_test_" in c]
    keep = cols + ["key", "status", "epochs"]
    pd.testing.assert_frame_equal(serial.table[keep], on_dask.table[keep], **OTHER_PROCESS)
    # The parent wrote the store: a second sweep finds every run there and runs nothing.
    ran = []
    again = sweep(df, base, space, store=db, progress=False, on_run=ran.append)
    assert ran == [] and len(again.table) == 4
