"""A convenience constructor for the common fully connected stack."""

from __future__ import annotations

from typing import Any, Sequence

import numpy as np

from ._validate import kind_of, positive_int
from .activations import Activation, Tanh
from .layers import Affine
from .network import Layer, Network

__all__ = ["build_mlp"]


def build_mlp(
    sizes: Sequence[int],
    *,
    activation: Activation | None = None,
    output_activation: Activation | None = None,
    bias: bool = True,
    seed: int | None = None,
    dtype: Any = np.float64,
    init: str = "auto",
) -> Network:
    """``Affine, activation, Affine, activation, ..., Affine[, output_activation]`` for widths ``sizes``.

    ``sizes = [n_in, h_1, ..., n_out]``. ``activation``, the hidden layers'
    activation, defaults to :class:`Tanh` (one instance is shared by all hidden
    layers; activations hold no state). ``output_activation`` defaults to none
    (a linear output). ``init="auto"`` chooses the scheme ``activation`` suggests
    (``suggested_init``: ``"he"`` for ReLU and LeakyReLU, ``"glorot"`` otherwise); any scheme of
    :class:`~tinyprop.network.Network` may be named instead.

    >>> import tinyprop as tp
    >>> net = tp.build_mlp([3, 16, 16, 1], activation=tp.ReLU(), seed=0)
    >>> [type(layer).__name__ for layer in net.layers]
    ['Affine', 'ReLU', 'Affine', 'ReLU', 'Affine']
    """
    sizes = [positive_int(s, "each entry of sizes") for s in sizes]
    if len(sizes) < 2:
        raise ValueError(f"sizes needs at least [n_in, n_out], got {sizes}")
    hidden = Tanh() if activation is None else activation
    for name, act in (("activation", hidden), ("output_activation", output_activation)):
        if act is not None and not isinstance(act, Activation):
            raise TypeError(f"{name} must be a tp.Activation instance, got {kind_of(act)}")
    if init == "auto":
        init = hidden.suggested_init
    layers: list[Layer] = []
    for i, (n_in, n_out) in enumerate(zip(sizes[:-1], sizes[1:])):
        layers.append(Affine(n_in, n_out, bias=bias))
        if i < len(sizes) - 2:
            layers.append(hidden)
    if output_activation is not None:
        layers.append(output_activation)
    return Network(layers, seed=seed, dtype=dtype, init=init)
