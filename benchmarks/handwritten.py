"""The same training step written by hand in plain numpy, as a user would.

This is the comparison point of the "abstraction tax" figure: a fully
connected tanh network with a linear output, mean squared error
``E = (1/n) sum (out - y)**2`` and plain gradient descent, with weights as
``(n_out, n_in)`` arrays like tinyprop's. Nothing here is tuned; it is the
loop one writes after reading docs/derivation.md.
"""

from __future__ import annotations

import numpy as np


def handwritten_step(weights: list, biases: list, X: np.ndarray, y: np.ndarray, lr: float) -> None:
    """One forward/backward pass and SGD update, in place on ``weights`` and ``biases``."""
    # forward: keep every layer's input
    inputs = [X]
    a = X
    for k, (W, b) in enumerate(zip(weights, biases)):
        z = a @ W.T + b
        a = np.tanh(z) if k < len(weights) - 1 else z
        inputs.append(a)
    out = inputs[-1]

    # backward: delta of the output, then the delta recursion
    delta = 2.0 * (out - y) / X.shape[0]
    for k in range(len(weights) - 1, -1, -1):
        grad_W = delta.T @ inputs[k]
        grad_b = delta.sum(axis=0)
        if k > 0:
            delta = (delta @ weights[k]) * (1.0 - inputs[k] ** 2)
        weights[k] -= lr * grad_W
        biases[k] -= lr * grad_b
