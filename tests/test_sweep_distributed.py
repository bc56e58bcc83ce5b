"""sweep() on a Dask cluster (``client.get_executor()``) gives the sequential result.

Optional: marker ``distributed``, skipped when ``dask.distributed`` is not
installed. Starts a two-process ``LocalCluster`` on the loopback interface;
the networks are trained on synthetic data (labelled below).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from tinyprop.recipes import TabularRegression
from tinyprop.sweep import sweep

distributed = pytest.importorskip("distributed")
pytestmark = pytest.mark.distributed


def synthetic(n: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Synthetic regression data: y = sin(x0) + x1 * x2 + 0.05 noise, x uniform on [-2, 2]^3."""
    rng = np.random.default_rng(seed)
    X = rng.uniform(-2.0, 2.0, (n, 3))
    return X, np.sin(X[:, 0]) + X[:, 1] * X[:, 2] + 0.05 * rng.normal(size=n)


class RecordingExecutor(distributed.cfexecutor.ClientExecutor):
    """Dask's executor, noting the type of the data argument of every task."""

    data_types: list[str] = []

    def submit(self, fn, *args, **kwargs):
        RecordingExecutor.data_types.append(type(args[2]).__name__)
        return super().submit(fn, *args, **kwargs)


def test_local_cluster_gives_the_sequential_result():
    X, y = synthetic(240, 0)
    validation, test = synthetic(80, 1), synthetic(80, 2)
    recipe = TabularRegression(epochs=30, patience=10)
    settings = [{"hidden": [h], "lr": lr, "seed": s} for h in (6, 12) for lr in (3e-3, 1e300) for s in (0, 1)]
    sequential = sweep(recipe, settings, X, y, validation=validation, test=test)
    with distributed.LocalCluster(processes=True, n_workers=2, threads_per_worker=1, host="127.0.0.1",
                                  dashboard_address=None) as cluster, distributed.Client(cluster) as client:
        on_cluster = sweep(recipe, settings, X, y, validation=validation, test=test, executor=client.get_executor())
        RecordingExecutor.data_types = []
        recorded = sweep(recipe, [settings[0], settings[2]], X, y, executor=RecordingExecutor(client))
    strip = [dataclasses.replace(r, wall_time=0.0) for r in sequential.records]
    assert [dataclasses.replace(r, wall_time=0.0) for r in on_cluster.records] == strip
    assert [r.status for r in on_cluster.records].count("failed") == 4
    for a, b in zip(sequential.networks, on_cluster.networks):
        assert (a is None) == (b is None)
        if a is not None:
            assert all(np.array_equal(p, q) for p, q in zip(a.params, b.params))
    # the data went to the workers once, by client.scatter; every task carries only a reference to it
    assert RecordingExecutor.data_types == ["Future", "Future"]
    assert [r.status for r in recorded.records] == ["ok", "failed"]
