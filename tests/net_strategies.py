"""Hypothesis strategies shared by the property tests (all data here is synthetic)."""

from __future__ import annotations

import numpy as np
from hypothesis import strategies as st

import tinyprop as tp
from tinyprop.activations import BUILT_IN_ACTIVATIONS as BUILT_IN_CLASSES

# one instance of every built-in class (tinyprop.activations.BUILT_IN_ACTIVATIONS), LeakyReLU with a visible slope
BUILT_IN_ACTIVATIONS = tuple(cls(0.1) if cls is tp.LeakyReLU else cls() for cls in BUILT_IN_CLASSES)
DTYPES = (np.float64, np.float32)


@st.composite
def networks(draw, *, max_depth: int = 6, max_width: int = 12, dtype=None, activations=BUILT_IN_ACTIVATIONS):
    """A network of 1..max_depth affine layers, widths 1..max_width, a random activation
    after every hidden affine layer (and sometimes after the last, sometimes two in a
    row), random biases, and sometimes fixed scaling layers at either end."""
    depth = draw(st.integers(1, max_depth))
    widths = draw(st.lists(st.integers(1, max_width), min_size=depth + 1, max_size=depth + 1))
    layers: list = []
    if draw(st.booleans()):
        layers.append(tp.Standardize(np.linspace(-1.0, 1.0, widths[0]), np.linspace(0.5, 2.0, widths[0])))
    for i in range(depth):
        layers.append(tp.Affine(widths[i], widths[i + 1], bias=draw(st.booleans())))
        if i < depth - 1 or draw(st.booleans()):
            layers.append(draw(st.sampled_from(activations)))
            if draw(st.integers(0, 5)) == 0:
                layers.append(draw(st.sampled_from(activations)))
    if draw(st.booleans()):
        layers.append(tp.Unstandardize(np.full(widths[-1], 3.0), np.full(widths[-1], 1.5)))
    dtype = draw(st.sampled_from(DTYPES)) if dtype is None else dtype
    return tp.Network(layers, seed=draw(st.integers(0, 2**32 - 1)), dtype=dtype)


def _targets(rng: np.random.Generator, loss: tp.Loss, n: int, n_out: int) -> np.ndarray:
    if isinstance(loss, tp.CrossEntropyOnSigmoid):
        return rng.uniform(0.0, 1.0, size=(n, n_out))
    if isinstance(loss, tp.CrossEntropyOnSoftmax):
        return rng.dirichlet(np.ones(n_out), size=n)
    return rng.normal(size=(n, n_out))


LOSSES = (
    tp.SquaredError(),
    tp.MeanSquaredError(),
    tp.HuberError(0.5),
    tp.CrossEntropyOnSigmoid(),
    tp.CrossEntropyOnSigmoid(target_weights=(0.5, 3.0)),
    tp.CrossEntropyOnSoftmax(),
)


@st.composite
def training_cases(draw, **network_kwargs):
    """(net, X, y, loss): a random network, a batch of 1..8 synthetic samples, a random loss."""
    net = draw(networks(**network_kwargs))
    loss = draw(st.sampled_from(LOSSES))
    n = draw(st.integers(1, 8))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    X = rng.normal(size=(n, net.n_in))
    return net, X, _targets(rng, loss, n, net.n_out), loss
