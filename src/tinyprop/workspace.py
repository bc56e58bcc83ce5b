"""Preallocated arrays for repeated forward and backward passes of one network.

Training calls ``forward`` and ``backward`` thousands of times with batches of
the same size. A :class:`Workspace` holds, allocated once:

- one output array per affine layer (a built-in activation then overwrites
  its input with its output, in place, so ``z`` and ``a`` share memory);
- one scratch array for ``delta W``, the delta handed to the layer below;
- a vector of ones, so that a bias gradient ``sum_i delta[i]`` is one BLAS
  matrix-vector product ``1^T delta`` (several times faster than a reduction);
- one gradient array per parameter array, all views into one flat
  ``grad_vector`` aligned with ``network.vector`` (so an optimizer can update
  every parameter with one call per operation).

With it, a training step allocates no large arrays: the backward pass turns
each stored activation ``a`` into ``f'(z) * delta`` in its own memory (the
built-in derivatives need only ``a``) once the affine layer above has used
``a`` for its weight gradient. That derivative takes several elementwise
passes; they run over row blocks of about 256 KiB (:meth:`Workspace.row_blocks`)
so that a large batch goes through memory once instead of once per pass. The price is that a trace made with a
workspace serves exactly one ``backward`` call, and the next ``forward`` with
the same workspace overwrites it; both misuses raise an error.

>>> import numpy as np, tinyprop as tp
>>> net = tp.build_mlp([3, 8, 1], seed=0)
>>> work = net.workspace(32)
>>> X, y = np.ones((32, 3)), np.zeros((32, 1))
>>> out, trace = net.forward(X, workspace=work)
>>> grads, _ = net.backward(trace, out - y, need_input=False)
>>> grads[0] is work.grads[0]
True
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from ._validate import positive_int
from ._views import views_of
from .layers import Affine

if TYPE_CHECKING:  # pragma: no cover
    from .network import Network

__all__ = ["Workspace"]

_BLOCK_BYTES = 256 * 1024
_ALL_ROWS = [slice(None)]


class Workspace:
    """Arrays for batches of up to ``max_rows`` samples of ``network``; see the module docstring."""

    def __init__(self, network: "Network", max_rows: int) -> None:
        self.network = network
        self.max_rows = positive_int(max_rows, "max_rows")
        dtype = network.dtype
        self._outputs = {
            i: np.empty(self.max_rows * layer.n_out, dtype)
            for i, layer in enumerate(network.layers)
            if isinstance(layer, Affine)
        }
        widest_input = max(layer.n_in for layer in network.layers if isinstance(layer, Affine))
        self._scratch = np.empty(self.max_rows * widest_input, dtype)
        self._ones = np.ones(self.max_rows, dtype)
        self._outputs_for: dict[int, tuple[np.ndarray | None, ...]] = {}  # rows -> outputs(rows)
        self._scratch_for: dict[tuple[int, int], np.ndarray] = {}  # (rows, width) -> scratch(rows, width)
        self.grad_vector = np.empty(network.n_params, dtype)
        """All gradients as one flat array, aligned with ``network.vector``."""
        self.grads = views_of(self.grad_vector, tuple(p.shape for p in network.params))
        """The gradient arrays, aligned with ``network.params`` (views into :attr:`grad_vector`)."""
        self.generation = 0

    def outputs(self, rows: int) -> tuple[np.ndarray | None, ...]:
        """Per layer of the network: the ``(rows, n_out)`` output array of an affine layer, else ``None``."""
        try:
            return self._outputs_for[rows]  # steps repeat the same shapes: build the views once
        except KeyError:
            arrays = self._outputs_for[rows] = tuple(
                self._outputs[i][: rows * layer.n_out].reshape(rows, layer.n_out) if i in self._outputs else None
                for i, layer in enumerate(self.network.layers)
            )
            return arrays

    def ones(self, rows: int) -> np.ndarray:
        """A vector of ``rows`` ones (read only by convention)."""
        return self._ones[:rows]

    def row_blocks(self, rows: int, width: int) -> list[slice]:
        """Row ranges of about 256 KiB each, for elementwise passes that stay in cache."""
        step = max(1, _BLOCK_BYTES // (width * self.network.dtype.itemsize))
        if rows <= step:
            return _ALL_ROWS
        return [slice(start, start + step) for start in range(0, rows, step)]

    def scratch(self, rows: int, width: int) -> np.ndarray:
        """A ``(rows, width)`` array for the delta passed down through an affine layer."""
        try:
            return self._scratch_for[rows, width]
        except KeyError:
            view = self._scratch_for[rows, width] = self._scratch[: rows * width].reshape(rows, width)
            return view

    def __repr__(self) -> str:
        return f"Workspace(max_rows={self.max_rows}, dtype={self.network.dtype.name})"
