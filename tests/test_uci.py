"""The default tabular-regression recipe on the UCI regression benchmark.

Data: UCI Machine Learning Repository (Dua & Graff, CC BY 4.0) -- concrete
(Yeh 1998, Cement and Concrete Research 28(12)), energy (Tsanas & Xifara 2012,
Energy and Buildings 49), power-plant (Tüfekci 2014, Int. J. Electrical Power &
Energy Systems 60) -- with the 20 fixed 90/10 train/test splits of
Hernández-Lobato & Adams (2015), "Probabilistic Backpropagation for Scalable
Learning of Bayesian Neural Networks", ICML (bundled, see
``tinyprop/datasets/PROVENANCE.md``).

Published reference, same protocol (one hidden layer of 50 units, test RMSE in
the target's units, mean over the 20 splits): Gal & Ghahramani (2016),
"Dropout as a Bayesian Approximation", ICML, Table 1, whose PBP column reprints
Hernández-Lobato & Adams (2015):

    dataset       PBP            dropout network
    concrete      5.67 +- 0.09   5.23 +- 0.12
    energy        1.80 +- 0.05   1.66 +- 0.04
    power-plant   4.12 +- 0.03   4.02 +- 0.04

Bars (issue 16): mean test RMSE over the 20 splits at most 5.2 (concrete), 0.50
(energy) and 4.0 (power plant), below both published columns. The recipe
(``fit_tabular_regression`` with its defaults: evidence-regularised
Levenberg-Marquardt on these sizes) sees only each split's training rows. The
test rows are used once, for the RMSE.

``python tests/test_uci.py`` prints the full table (all splits, 2 processes).
"""

from __future__ import annotations

import math
import sys
import time
from concurrent.futures import ProcessPoolExecutor

import numpy as np
import pytest

from tinyprop.datasets import load_uci
from tinyprop.recipes import fit_tabular_regression

BARS = {"concrete": 5.2, "energy": 0.50, "power-plant": 4.0}  # issue 16
PUBLISHED = {  # Gal & Ghahramani (2016), Table 1: (PBP mean, PBP se, dropout mean, dropout se)
    "concrete": (5.67, 0.09, 5.23, 0.12),
    "energy": (1.80, 0.05, 1.66, 0.04),
    "power-plant": (4.12, 0.03, 4.02, 0.04),
}


def split_rmse(name: str, k: int) -> tuple[float, str, float]:
    """Test RMSE of the default recipe on split ``k`` of dataset ``name``; also the branch it chose and seconds."""
    X_train, y_train, X_test, y_test = load_uci(name).split(k)
    started = time.perf_counter()
    net, result = fit_tabular_regression(X_train, y_train, seed=k)
    seconds = time.perf_counter() - started
    residual = net.predict(X_test)[:, 0] - y_test
    return float(np.sqrt(np.mean(residual**2))), result.method, seconds


def summary(rmses: list[float]) -> tuple[float, float]:
    """Mean and standard error of the mean (sample standard deviation / sqrt(count))."""
    values = np.asarray(rmses)
    return float(values.mean()), float(values.std(ddof=1) / math.sqrt(values.size))


def test_one_concrete_split_quick_check():
    # Default-suite smoke check: split 0 of 20, loose bar 7.0 MPa (the PBP mean is 5.67;
    # predicting the training mean gives about 16.7; measured 6.17 on this split)
    rmse, method, _ = split_rmse("concrete", 0)
    assert method == "evidence-lm" and rmse < 7.0, rmse


@pytest.mark.slow
@pytest.mark.parametrize("name", sorted(PUBLISHED))
def test_all_twenty_splits_meet_the_bar(name):
    dataset = load_uci(name)
    rmses = [split_rmse(name, k)[0] for k in range(dataset.n_splits)]
    mean, se = summary(rmses)
    print(f"{name}: test RMSE {mean:.3f} +- {se:.3f} over {len(rmses)} splits")
    assert mean <= BARS[name] < min(PUBLISHED[name][0], PUBLISHED[name][2]), (mean, se, rmses)


def _job(args: tuple[str, int]) -> tuple[str, int, float, str, float]:
    name, k = args
    return (name, k, *split_rmse(name, k))


def full_table(workers: int = 2) -> str:
    """All splits of all three datasets, as a Markdown table."""
    jobs = [(name, k) for name in sorted(PUBLISHED) for k in range(load_uci(name).n_splits)]
    started = time.perf_counter()
    with ProcessPoolExecutor(max_workers=workers) as pool:
        results = list(pool.map(_job, jobs))
    wall = time.perf_counter() - started
    lines = [
        "| dataset | tinyprop (mean ± s.e., 20 splits) | PBP | dropout network | method | seconds per split |",
        "|---|---|---|---|---|---|",
    ]
    for name in sorted(PUBLISHED):
        rows = [r for r in results if r[0] == name]
        mean, se = summary([r[2] for r in rows])
        methods = sorted({r[3] for r in rows})
        seconds = np.mean([r[4] for r in rows])
        pbp, pbp_se, drop, drop_se = PUBLISHED[name]
        lines.append(
            f"| {name} | {mean:.2f} ± {se:.2f} | {pbp:.2f} ± {pbp_se:.2f} | {drop:.2f} ± {drop_se:.2f} "
            f"| {', '.join(methods)} | {seconds:.1f} |"
        )
    lines.append(f"\nWall time {wall:.0f} s with {workers} worker processes.")
    per_split = ["", "Per-split test RMSE:"]
    for name in sorted(PUBLISHED):
        per_split.append(f"- {name}: " + ", ".join(f"{r[2]:.2f}" for r in results if r[0] == name))
    return "\n".join(lines + per_split)


if __name__ == "__main__":
    print(full_table(int(sys.argv[1]) if len(sys.argv) > 1 else 2))
