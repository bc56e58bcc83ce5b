"""``python -m tinyprop``: a one-minute look at the main job.

Builds a small network on synthetic data, checks its backpropagated gradient
against scipy's numerical differentiation, and prints the report.
"""

from __future__ import annotations

import numpy as np

import tinyprop as tp


def main() -> int:
    rng = np.random.default_rng(0)
    X = rng.uniform(-1.0, 1.0, size=(32, 3))  # synthetic inputs
    y = np.sin(X @ np.array([1.0, -2.0, 0.5]))  # synthetic target
    net = tp.build_mlp([3, 8, 8, 1], hidden=tp.Tanh(), seed=0)
    print(f"network: {net}")
    print(f"parameters: {net.n_params}")
    report = tp.check_gradient(net, X, y, tp.MeanSquaredError())
    print(report)
    return 0 if report.passed else 1


if __name__ == "__main__":
    raise SystemExit(main())
