"""The measurements of the bundled benchmark; every figure is a ratio taken in one run.

Timing rule: two competitors are timed in alternating rounds of ``k`` calls
each, and each keeps its fastest round (the least disturbed by the rest of the
machine); the ratio is of those per-call minima. Data are synthetic (seeded
normal draws) except the second-order figures, which use NIST StRD problems.
"""

from __future__ import annotations

import importlib.util
import math
import os
import shutil
import subprocess
import sys
import tempfile
import time
import tracemalloc
from pathlib import Path
from typing import Any, Callable

import numpy as np

import tinyprop as tp
from tinyprop.export import export_c, export_python
from tinyprop.optim import SGD, Adam

from .handwritten import handwritten_step


def fastest(*competitors: Callable[[], Any], calls: int, rounds: int) -> list[float]:
    """Per-call seconds of each competitor: fastest of ``rounds`` alternating rounds of ``calls`` calls."""
    for fn in competitors:
        fn()  # warm up: first-call allocations, caches
    best = [math.inf] * len(competitors)
    for _ in range(rounds):
        for which, fn in enumerate(competitors):
            start = time.perf_counter()
            for _ in range(calls):
                fn()
            best[which] = min(best[which], (time.perf_counter() - start) / calls)
    return best


def _synthetic(rows: int, n_in: int, dtype: Any, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(rows, n_in)).astype(dtype)
    return X, np.tanh(X[:, :1] - 0.5 * X[:, -1:]).astype(dtype)  # synthetic target


def _training_step(net: tp.Network, optimizer: Any, X: np.ndarray, y: np.ndarray) -> Callable[[], None]:
    """tinyprop's public-API step: forward, loss gradient, backward, update.

    The optimizer updates the network's flat parameter vector from the
    workspace's flat gradient vector (every array at once), as ``tp.train`` does.
    """
    loss = tp.MeanSquaredError()
    work = net.workspace(X.shape[0])
    params, grads = [net.vector], [work.grad_vector]

    def step() -> None:
        out, trace = net.forward(X, workspace=work)
        net.backward(trace, loss.gradient(out, y), need_input=False)
        optimizer.update(params, grads)

    return step


def floor_ratio(batch: int, dtype: Any, *, calls: int, rounds: int) -> dict[str, Any]:
    """Adam training step of 64-256-256-1 tanh over the floor: its matrix products and activations.

    The floor times, on the same weight arrays and preallocated outputs, only
    what any implementation must do: the forward products ``x W^T``, one
    ``tanh`` per hidden layer, and the backward products ``delta^T x`` and
    ``delta W`` (not below the first layer).
    """
    net = tp.build_mlp([64, 256, 256, 1], activation=tp.Tanh(), seed=0, dtype=dtype)
    X, y = _synthetic(batch, 64, dtype)
    step = _training_step(net, Adam(1e-6), X, y)
    W1, W2, W3 = (layer.weight for layer in net.layers if isinstance(layer, tp.Affine))
    a1, a2 = np.empty((batch, 256), dtype), np.empty((batch, 256), dtype)
    out, d2, d1 = np.empty((batch, 1), dtype), np.empty((batch, 256), dtype), np.empty((batch, 256), dtype)
    g1, g2, g3 = np.empty_like(W1), np.empty_like(W2), np.empty_like(W3)

    def floor() -> None:
        np.tanh(np.matmul(X, W1.T, out=a1), out=a1)
        np.tanh(np.matmul(a1, W2.T, out=a2), out=a2)
        np.matmul(a2, W3.T, out=out)
        np.matmul(out.T, a2, out=g3)
        np.matmul(out, W3, out=d2)
        np.matmul(d2.T, a1, out=g2)
        np.matmul(d2, W2, out=d1)
        np.matmul(d1.T, X, out=g1)

    # The floor followed by the Adam update alone (same optimizer, a copy of the parameters and a
    # fixed gradient): what a step costs when everything but the matrix products, the activations
    # and the optimizer's elementwise passes were free.
    vector, gradient, adam = net.get_vector(), np.full(net.n_params, 1e-3, dtype), Adam(1e-6)

    def floor_and_update() -> None:
        floor()
        adam.update([vector], [gradient])

    t_step, t_floor, t_update = fastest(step, floor, floor_and_update, calls=calls, rounds=rounds)
    return {
        "batch": batch, "dtype": np.dtype(dtype).name, "step_s": t_step, "floor_s": t_floor, "ratio": t_step / t_floor,
        "floor_update_s": t_update, "ratio_floor_update": t_step / t_update,
    }


def train_epoch(batch: int, dtype: Any, *, rounds: int, steps: int = 16) -> dict[str, Any]:
    """Seconds per epoch of ``tp.train`` (64-256-256-1, Adam, ``steps`` mini-batches) over ``steps`` isolated steps.

    The epoch time is (time of 3 epochs - time of 1 epoch) / 2, which removes
    the one-off input checks and set-up; the isolated step is the floor
    figure's public-API step on one batch. Timed in alternating rounds.
    """
    X, y = _synthetic(steps * batch, 64, dtype)
    net = tp.build_mlp([64, 256, 256, 1], activation=tp.Tanh(), seed=0, dtype=dtype)
    step = _training_step(net, Adam(1e-6), X[:batch], y[:batch])

    def run(epochs: int) -> Callable[[], None]:
        def fn() -> None:
            tp.train(net, X, y, loss=tp.MeanSquaredError(), optimizer=Adam(1e-6), epochs=epochs, batch_size=batch,
                     seed=0)
        return fn

    def isolated_steps() -> None:
        for _ in range(steps):
            step()

    t_one, t_three, t_steps = fastest(run(1), run(3), isolated_steps, calls=1, rounds=rounds)
    epoch = max(t_three - t_one, 1e-12) / 2
    return {"batch": batch, "dtype": np.dtype(dtype).name, "steps": steps, "epoch_s": epoch, "steps_s": t_steps,
            "ratio": epoch / t_steps}


def light_path(sizes: list[int], batch: int, *, calls: int, rounds: int) -> dict[str, Any]:
    """Plain-SGD step through the public path without a workspace over the hand-written numpy step.

    The step is ``out, trace = net.forward(X)``; ``grads, _ = net.backward(trace,
    loss.gradient(out, y), need_input=False)``; ``opt.update(net.params, grads)``
    (the hand-written step does not form ``dE/dX`` either).
    """
    net = tp.build_mlp(sizes, activation=tp.Tanh(), seed=0)
    X, y = _synthetic(batch, sizes[0], np.float64)
    loss, optimizer = tp.MeanSquaredError(), SGD(1e-6)

    def step() -> None:
        out, trace = net.forward(X)
        grads, _ = net.backward(trace, loss.gradient(out, y), need_input=False)
        optimizer.update(net.params, grads)

    weights = [layer.weight.copy() for layer in net.layers if isinstance(layer, tp.Affine)]
    biases = [layer.bias.copy() for layer in net.layers if isinstance(layer, tp.Affine)]

    def by_hand() -> None:
        handwritten_step(weights, biases, X, y, 1e-6)

    t_step, t_hand = fastest(step, by_hand, calls=calls, rounds=rounds)
    return {"network": "-".join(map(str, sizes)), "batch": batch, "step_s": t_step, "hand_s": t_hand,
            "ratio": t_step / t_hand}


def stacked_speedup(
    sizes: list[int], members: int, batch: int, dtype: Any, *, rounds: int, rows: int = 1024, epochs: int = 3
) -> dict[str, Any]:
    """Time of a loop of ``tp.train`` over the time of one ``tp.train_stacked`` for the same ``members`` networks.

    Adam with a learning rate per member, ``rows`` synthetic rows, ``epochs``
    epochs of mini-batches of ``batch``; each network is built (seeded) inside
    both competitors.
    """
    X, y = _synthetic(rows, sizes[0], dtype)
    rates = [1e-3 * (1 + k % 4) for k in range(members)]

    def loop() -> None:
        for k in range(members):
            tp.train(tp.build_mlp(sizes, seed=k, dtype=dtype), X, y, loss=tp.MeanSquaredError(),
                     optimizer=Adam(rates[k]), epochs=epochs, batch_size=batch, seed=k)

    def stacked() -> None:
        tp.train_stacked([tp.build_mlp(sizes, seed=k, dtype=dtype) for k in range(members)], X, y,
                         loss=tp.MeanSquaredError(), optimizers=[Adam(r) for r in rates], epochs=epochs,
                         batch_size=batch, seeds=list(range(members)))

    t_loop, t_stacked = fastest(loop, stacked, calls=1, rounds=rounds)
    steps = epochs * -(-rows // batch)
    (t_step,) = fastest(_stacked_arithmetic(sizes, members, batch, dtype), calls=steps, rounds=rounds)
    return {"network": "-".join(map(str, sizes)), "members": members, "batch": batch, "dtype": np.dtype(dtype).name,
            "loop_s": t_loop, "stacked_s": t_stacked, "speedup": t_loop / t_stacked,
            "arithmetic_s": steps * t_step, "speedup_bound": t_loop / (steps * t_step)}


def _stacked_arithmetic(sizes: list[int], members: int, batch: int, dtype: Any) -> Callable[[], None]:
    """One Adam step of ``members`` stacked tanh networks reduced to the numpy calls it cannot do without.

    On preallocated stacked arrays: per affine layer the product ``x W^T``
    (with the faster contiguous ``W^T``), the bias addition, ``tanh`` for the
    hidden layers; the mean-squared-error gradient (two passes); per layer the
    products ``delta^T x``, ``1^T delta`` and ``delta W`` (not below the first
    layer) and the three passes of ``(1 - a^2) delta``; Adam's twelve passes
    over every parameter of the stack. No checks, no shuffling, no Python
    beyond the calls. Its time, times the number of steps, bounds from below
    what a stack computed with numpy's separate calls can take, and
    loop / that is the largest speed-up such a stack could show.
    """
    rng = np.random.default_rng(0)
    K, widths = members, list(zip(sizes[:-1], sizes[1:]))
    W_t = [rng.normal(size=(K, n_in, n_out)).astype(dtype) * 0.1 for n_in, n_out in widths]
    W = [np.ascontiguousarray(w.transpose(0, 2, 1)) for w in W_t]
    b = [np.zeros((K, 1, n_out), dtype) for _, n_out in widths]
    x = rng.normal(size=(K, batch, sizes[0])).astype(dtype)
    target = np.zeros((K, batch, sizes[-1]), dtype)
    outputs = [np.empty((K, batch, n_out), dtype) for _, n_out in widths]
    deltas = [np.empty((K, batch, n_in), dtype) for n_in, _ in widths]
    grads_W = [np.empty((K, n_out, n_in), dtype) for n_in, n_out in widths]
    grads_b = [np.empty((K, n_out), dtype) for _, n_out in widths]
    ones = np.ones(batch, dtype)
    n_params = sum(n_in * n_out + n_out for n_in, n_out in widths)
    theta, g, m, v, work = (np.full((K, n_params), 1e-3, dtype) for _ in range(5))
    last = len(widths) - 1

    def step() -> None:
        a = x
        for k in range(len(widths)):
            np.matmul(a, W_t[k], out=outputs[k])
            outputs[k] += b[k]
            if k < last:
                np.tanh(outputs[k], out=outputs[k])
            a = outputs[k]
        delta = np.subtract(a, target, out=a)
        delta *= 2.0 / batch
        for k in range(last, -1, -1):
            below = x if k == 0 else outputs[k - 1]
            np.matmul(delta.transpose(0, 2, 1), below, out=grads_W[k])
            np.matmul(ones, delta, out=grads_b[k])
            if k == 0:
                break
            if delta.shape[-1] == 1:  # an outer product: elementwise, as the stack computes it
                delta = np.multiply(delta, W[k], out=deltas[k])
            else:
                delta = np.matmul(delta, W[k], out=deltas[k])
            np.multiply(below, below, out=below)
            np.subtract(1.0, below, out=below)
            below *= delta
            delta = below
        np.subtract(g, m, out=work)  # Adam, as tinyprop's: 12 passes
        np.multiply(work, 0.1, out=work)
        np.add(m, work, out=m)
        np.multiply(g, g, out=work)
        np.subtract(work, v, out=work)
        np.multiply(work, 0.001, out=work)
        np.add(v, work, out=v)
        np.sqrt(v, out=work)
        np.add(work, 1e-8, out=work)
        np.divide(m, work, out=work)
        np.multiply(work, 1e-9, out=work)
        np.subtract(theta, work, out=theta)

    return step


def abstraction_tax(sizes: list[int], batch: int, *, calls: int, rounds: int) -> dict[str, Any]:
    """Plain-SGD step through tinyprop's public API over the hand-written numpy step (handwritten.py)."""
    net = tp.build_mlp(sizes, activation=tp.Tanh(), seed=0)
    X, y = _synthetic(batch, sizes[0], np.float64)
    step = _training_step(net, SGD(1e-6), X, y)
    weights = [layer.weight.copy() for layer in net.layers if isinstance(layer, tp.Affine)]
    biases = [layer.bias.copy() for layer in net.layers if isinstance(layer, tp.Affine)]

    def by_hand() -> None:
        handwritten_step(weights, biases, X, y, 1e-6)

    t_step, t_hand = fastest(step, by_hand, calls=calls, rounds=rounds)
    label = "-".join(map(str, sizes))
    return {"network": label, "batch": batch, "step_s": t_step, "hand_s": t_hand, "ratio": t_step / t_hand}


def memory_ratio(batch: int, dtype: Any = np.float64) -> dict[str, Any]:
    """Peak traced allocation of Adam training steps (64-256-256-1) over the theoretical need.

    Traced from before the network exists to after two steps, minus the
    training data. Need: parameters, gradients, Adam's two moments, and the
    stored activations (every hidden layer's output and the network output).
    """
    X, y = _synthetic(batch, 64, dtype)
    tracemalloc.start()
    try:
        net = tp.build_mlp([64, 256, 256, 1], activation=tp.Tanh(), seed=0, dtype=dtype)
        step = _training_step(net, Adam(1e-6), X, y)
        step()
        step()
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    itemsize = np.dtype(dtype).itemsize
    need = (4 * net.n_params + batch * (256 + 256 + 1)) * itemsize
    return {"batch": batch, "dtype": np.dtype(dtype).name, "peak_bytes": peak, "need_bytes": need, "ratio": peak / need}


def scaling(sample_counts: list[int], *, batch: int = 256) -> dict[str, Any]:
    """Seconds per epoch of ``tp.train`` (8-32-32-1, Adam) against n, and the fitted exponent.

    Per-epoch time is (time of 3 epochs - time of 1 epoch) / 2, which removes
    the one-off input checks and set-up from the figure.
    """
    seconds = []
    for n in sample_counts:
        X, y = _synthetic(n, 8, np.float64)

        def run(epochs: int) -> float:
            net = tp.build_mlp([8, 32, 32, 1], seed=0)
            start = time.perf_counter()
            tp.train(net, X, y, loss=tp.MeanSquaredError(), optimizer=Adam(1e-3), epochs=epochs, batch_size=batch,
                     seed=0)
            return time.perf_counter() - start

        one = min(run(1) for _ in range(2))
        three = min(run(3) for _ in range(2))
        seconds.append(max(three - one, 1e-9) / 2)
    slope = float(np.polyfit(np.log(sample_counts), np.log(seconds), 1)[0])
    return {"samples": sample_counts, "seconds_per_epoch": seconds, "exponent": slope}


def second_order(names: tuple[str, ...] = ("Rat42",)) -> list[dict[str, Any]]:
    """Levenberg-Marquardt from NIST start 1: wall time, Jacobian evaluations, LRE of the RSS."""
    from tinyprop.datasets import load_nist

    rows = []
    for name in names:
        problem = load_nist(name)
        if name != "Rat42":
            raise ValueError(f"the benchmark builds only Rat42 as a network, not {name}")
        b1, b2, b3 = problem.start1
        first, last = tp.Affine(1, 1), tp.Affine(1, 1, bias=False)
        first.weight[:] = b3  # y = b1 / (1 + exp(b2 - b3 x)) = b1 * sigmoid(b3 x - b2)
        first.bias[:] = -b2
        last.weight[:] = b1
        net = tp.Network([first, tp.Sigmoid(), last], init=None)
        tp.solve(net.copy(), problem.x, problem.y, method="levenberg-marquardt")  # untimed: imports scipy.optimize
        start = time.perf_counter()
        result = tp.solve(net, problem.x, problem.y, method="levenberg-marquardt")
        wall = time.perf_counter() - start
        lre = -math.log10(abs(result.rss - problem.certified_rss) / problem.certified_rss)
        rows.append({"problem": name, "seconds": wall, "jacobian_evaluations": result.jacobian_evaluations,
                     "rss_lre": lre})
    return rows


def blocked_memory(rows: int, widths: list[int]) -> dict[str, Any]:
    """Peak memory (tracemalloc) of one blocked Levenberg-Marquardt iteration beyond the data, and its time.

    One iteration: the normal equations over all rows (one Jacobian pass, block by block), one Cholesky
    step and its trial evaluation. Synthetic data (seeded normal inputs, a smooth target).
    """
    from tinyprop.blocked_lm import minimise

    X, y = _synthetic(rows, widths[0], np.float64)
    net = tp.build_mlp(widths, seed=0)
    minimise(net.copy(), X[:100], y[:100], regularization=None, tolerance=1e-15, progress_tolerance=0.0,
             window=10, max_evaluations=2)  # untimed: imports scipy.linalg
    tracemalloc.start()
    try:
        start = time.perf_counter()
        fit = minimise(net, X, y, regularization=None, tolerance=1e-15, progress_tolerance=0.0, window=10,
                       max_evaluations=2)
        seconds = time.perf_counter() - start
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    return {
        "rows": rows, "n_params": net.n_params, "seconds": seconds, "peak_bytes": peak,
        "data_bytes": X.nbytes + y.nbytes, "whole_jacobian_bytes": rows * net.n_params * 8,
        "evaluations": fit.function_evaluations,
    }


def blocked_speed(rows: int, widths: list[int]) -> dict[str, Any]:
    """Seconds per iteration: the blocked engine against MINPACK (``scipy.optimize.least_squares``), one run.

    Both start from the same synthetic problem. MINPACK's iteration is one Jacobian
    (``net.jacobian`` over all rows) and its QR factorisation; the blocked one the normal
    equations over row blocks and a Cholesky step. Each is run for a few evaluations and
    its time divided by its Jacobian evaluations.
    """
    X, y = _synthetic(rows, widths[0], np.float64)
    net = tp.build_mlp(widths, seed=0)
    y = y + 0.1 * np.random.default_rng(1).normal(size=y.shape)  # synthetic noise: no exact fit
    tp.solve(net.copy(), X[:50], y[:50], method="blocked-levenberg-marquardt", max_evaluations=2)  # imports
    start = time.perf_counter()
    blocked = tp.solve(net.copy(), X, y, method="blocked-levenberg-marquardt", max_evaluations=6)
    blocked_s = (time.perf_counter() - start) / blocked.jacobian_evaluations
    start = time.perf_counter()
    minpack = tp.solve(net.copy(), X, y, method="levenberg-marquardt", max_evaluations=3)
    minpack_s = (time.perf_counter() - start) / minpack.jacobian_evaluations
    return {
        "rows": rows, "n_params": net.n_params, "blocked_s": blocked_s, "minpack_s": minpack_s,
        "speedup": minpack_s / blocked_s,
    }


def inference(*, calls: int, rounds: int, c_calls: int) -> dict[str, Any]:
    """Single-sample latency of net.predict, the exported Python and the exported C (8-32-32-1)."""
    net = tp.build_mlp([8, 32, 32, 1], seed=0)
    x = np.linspace(-1.0, 1.0, 8).reshape(1, 8)
    (t_predict,) = fastest(lambda: net.predict(x), calls=calls, rounds=rounds)
    row: dict[str, Any] = {"predict_s": t_predict}
    with tempfile.TemporaryDirectory() as folder:
        path = export_python(net, folder, name="bench_model")
        spec = importlib.util.spec_from_file_location("bench_model", path)
        assert spec is not None and spec.loader is not None
        module = importlib.util.module_from_spec(spec)
        spec.loader.exec_module(module)
        sample = x[0].tolist()
        (t_python,) = fastest(lambda: module.predict(sample), calls=calls, rounds=rounds)
        row["python_s"] = t_python
        row["python_ratio"] = t_python / t_predict
        row["c_s"] = _c_latency(net, Path(folder), c_calls)
        row["c_speedup"] = None if row["c_s"] is None else t_predict / row["c_s"]
    return row


_C_DRIVER = r"""
#define _POSIX_C_SOURCE 199309L
#include <stdio.h>
#include <time.h>
#include "bench_model.h"

int main(void) {
    float x[8] = {-1.0f, -0.71f, -0.43f, -0.14f, 0.14f, 0.43f, 0.71f, 1.0f};
    float y[1];
    volatile float sink = 0.0f;
    const long n = CALLS;
    double best = 1e30;
    for (int round = 0; round < 5; ++round) {
        struct timespec t0, t1;
        clock_gettime(CLOCK_MONOTONIC, &t0);
        for (long i = 0; i < n; ++i) {
            x[0] = (float)(i & 7) * 0.125f;
            bench_model_predict(x, y);
            sink += y[0];
        }
        clock_gettime(CLOCK_MONOTONIC, &t1);
        double s = (double)(t1.tv_sec - t0.tv_sec) + 1e-9 * (double)(t1.tv_nsec - t0.tv_nsec);
        if (s < best) best = s;
    }
    printf("%.9g\n", best / (double)n);
    return 0;
}
"""


def _c_latency(net: tp.Network, folder: Path, calls: int) -> float | None:
    """Seconds per call of the exported C (float32, gcc -O2), timed in C; None without a compiler."""
    compiler = shutil.which(os.environ.get("CC", "gcc")) or shutil.which("cc")
    if compiler is None:
        return None
    export_c(net, folder, name="bench_model")
    (folder / "driver.c").write_text(_C_DRIVER)
    binary = folder / "driver"
    subprocess.run(
        [compiler, "-std=c99", "-O2", f"-DCALLS={int(calls)}L", "-o", str(binary), str(folder / "driver.c"),
         str(folder / "bench_model.c"), "-lm"],
        check=True,
        capture_output=True,
    )
    output = subprocess.run([str(binary)], check=True, capture_output=True, text=True).stdout
    return float(output)


def machine() -> dict[str, Any]:
    """What the figures were measured on: CPU, cores, numpy and its BLAS."""
    cpu = "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    blas = "unknown"
    try:
        config = np.show_config(mode="dicts")
        info = config.get("Build Dependencies", {}).get("blas", {})
        blas = f"{info.get('name', '?')} {info.get('version', '')}".strip()
    except (TypeError, AttributeError):
        pass
    return {
        "cpu": cpu,
        "cores": os.cpu_count(),
        "python": sys.version.split()[0],
        "numpy": np.__version__,
        "blas": blas,
        "tinyprop": tp.__version__,
    }
