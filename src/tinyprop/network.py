"""The network: forward pass, the delta recursion, and derivatives built on it.

Notation (also used in ``docs/derivation.md``): the network is a list of
layers ``L_0 .. L_{m-1}``; ``v_0 = X`` and ``v_{i+1} = L_i(v_i)``, so ``v_i`` is
the input of layer ``i`` and ``v_m`` the output. For an error ``E`` the
backward pass starts from ``delta = dE/dv_m`` and walks back through the
layers, turning the delta at a layer's output into the delta at its input:

- activation ``a = f(z)``:   ``delta_z = f'(z) * delta_a``  (elementwise)
- affine ``z = x W^T + b``:  ``dE/dW = delta_z^T x``, ``dE/db = sum of delta_z``,
  ``delta_x = delta_z W``
- fixed scaling:            ``delta_x = delta_y * gain``

Chained, this is the generalised delta rule: the delta of a hidden unit is the
derivative of its activation times the weighted sum of the deltas of the units
it feeds. ``backward``, ``jacobian`` and ``input_gradient`` all run this one
recursion (``_delta_recursion``); they differ only in what they seed it with
and how they collect the per-layer terms.
"""

from __future__ import annotations

import copy
import enum
from dataclasses import dataclass
from typing import Any, Callable, Sequence

import numpy as np

from ._validate import as_float_array, as_samples, kind_of, seed_value
from ._views import Layout, ViewList, view_list
from .activations import Activation, works_in_place
from .init import SCHEMES, draw_weight
from .layers import Affine, ColumnScaling
from .workspace import Workspace

__all__ = ["Network", "Trace"]

Layer = Affine | Activation | ColumnScaling


class _Kind(enum.Enum):
    """What the forward and backward passes do with a layer (fixed at construction).

    Enum members stay identical through pickling (a network sent to a worker
    process and back), so the passes can compare them with ``is``.
    """

    AFFINE = "affine"
    ACTIVATION = "activation"
    ACTIVATION_IN_PLACE = "in place"
    SCALING = "scaling"


_AFFINE, _ACTIVATION, _ACTIVATION_IN_PLACE, _SCALING = _Kind


@dataclass(slots=True)
class Trace:
    """What the forward pass keeps for the backward pass.

    ``values[i]`` is the input of layer ``i``; ``values[-1]`` is the output.
    A trace made with a :class:`~tinyprop.Workspace` lives in the workspace's
    arrays (a built-in activation's input and output are then one array) and
    serves one ``backward`` call.
    """

    values: tuple[np.ndarray, ...]
    workspace: Workspace | None = None
    generation: int = 0

    @property
    def output(self) -> np.ndarray:
        return self.values[-1]


class Network:
    """A multilayer network: an ordered list of layers applied to row samples.

    Parameters
    ----------
    layers:
        :class:`~tinyprop.Affine`, :class:`~tinyprop.Activation` and fixed
        scaling layers, in order. The network takes ownership of them: their
        arrays are cast to ``dtype`` and, unless ``init=None``, the affine
        weights are drawn anew.
    seed:
        Seed for the weight initialisation (``numpy.random.default_rng``).
    dtype:
        ``np.float64`` (default) or ``np.float32``; parameters, inputs and all
        intermediate arrays use it.
    init:
        ``"glorot"`` (default), ``"he"`` or ``"lecun"`` (see :mod:`tinyprop.init`),
        or ``None`` to keep the weights already in the layers.

    >>> import numpy as np, tinyprop as tp
    >>> net = tp.Network([tp.Affine(2, 3), tp.Tanh(), tp.Affine(3, 1)], seed=0)
    >>> net.n_params
    13
    >>> net.predict(np.zeros((4, 2))).shape
    (4, 1)
    """

    def __init__(
        self,
        layers: Sequence[Layer],
        *,
        seed: int | None = None,
        dtype: Any = np.float64,
        init: str | None = "glorot",
    ) -> None:
        self.dtype = _network_dtype(dtype)
        self.layers: list[Layer] = list(layers)
        self.n_in, self.n_out = _check_layer_widths(self.layers)
        if init is not None and init not in SCHEMES:
            raise ValueError(f"init must be one of {SCHEMES} or None, got {init!r}")
        rng = np.random.default_rng(seed_value(seed))
        for layer in self.layers:
            if isinstance(layer, Affine):
                if init is not None:
                    layer.weight = draw_weight(rng, init, layer.n_in, layer.n_out, self.dtype)
                    layer.bias = None if layer.bias is None else np.zeros(layer.n_out, self.dtype)
                else:
                    layer.weight = np.ascontiguousarray(layer.weight, dtype=self.dtype)
                    layer.bias = None if layer.bias is None else np.ascontiguousarray(layer.bias, dtype=self.dtype)
            elif isinstance(layer, ColumnScaling):
                layer.gain = layer.gain.astype(self.dtype)
                layer.offset = layer.offset.astype(self.dtype)
        self._affine = [layer for layer in self.layers if isinstance(layer, Affine)]
        self._vector = np.empty(sum(p.size for layer in self._affine for p in layer.params), dtype=self.dtype)
        self._link_vector()
        self._first_affine = next(i for i, layer in enumerate(self.layers) if isinstance(layer, Affine))
        self._steps = tuple(
            (_kind(layer, self.layers[i - 1] if i else None), layer) for i, layer in enumerate(self.layers)
        )
        self._values_of = tuple(layer.value for layer in self.layers)  # each layer's new-array forward function
        self._backward_steps = tuple((i, kind, layer) for i, (kind, layer) in reversed(list(enumerate(self._steps))))
        self._shapes = tuple(p.shape for p in self._linked)
        self._grad_layout = Layout(self._shapes)  # cuts the gradient views of a backward pass without workspace
        self._ones_for: dict[int, np.ndarray] = {}  # rows -> read-only vector of ones (never handed out)
        self._grad_slot = {}  # affine layer index -> index of its weight in params
        for i, layer in enumerate(self.layers):
            if isinstance(layer, Affine):
                self._grad_slot[i] = sum(len(a.params) for a in self.layers[:i] if isinstance(a, Affine))

    # ----------------------------------------------------------------- parameters
    @property
    def params(self) -> list[np.ndarray]:
        """The live parameter arrays in layer order, weight before bias.

        While no layer's array has been replaced by assignment they are views
        of :attr:`vector`, and the list says so (it is a ``list`` subclass), so
        that ``opt.update(net.params, grads)`` can update all of them at once.
        """
        for layer, name, linked in self._sources:
            if getattr(layer, name) is not linked:  # replaced by assignment: vector re-links them
                return [p for layer in self._affine for p in layer.params]
        return view_list(self._linked, self._vector, self._shapes)

    @property
    def n_params(self) -> int:
        return int(self._vector.size)

    @property
    def vector(self) -> np.ndarray:
        """All parameters as one live flat array; :attr:`params` are views into it.

        An optimizer can update it in one go, ``opt.update([net.vector],
        [work.grad_vector])``, instead of array by array. (If a layer's array
        was replaced by assignment, the vector is re-linked to it first.)
        """
        if type(self.params) is not ViewList:
            self._link_vector()
        return self._vector

    def _link_vector(self) -> None:
        """Copy every parameter array into ``_vector`` and make the layers hold views of it."""
        start, linked, sources = 0, [], []
        for layer in self._affine:
            for name in ("weight", "bias"):
                array = getattr(layer, name)
                if array is None:
                    sources.append((layer, name, None))
                    continue
                view = self._vector[start:start + array.size].reshape(array.shape)
                view[...] = array
                setattr(layer, name, view)
                linked.append(view)
                sources.append((layer, name, view))
                start += array.size
        self._linked = tuple(linked)
        self._sources = tuple(sources)  # (layer, attribute, the array it held when linked)

    def get_vector(self) -> np.ndarray:
        """All parameters as one new flat vector, in the order of :attr:`params`."""
        return self.vector.copy()

    def set_vector(self, theta: Any) -> None:
        """Copy a flat vector into the live parameter arrays (which keep their identity)."""
        theta = as_float_array(theta, "theta", self.dtype)
        if theta.shape != (self.n_params,):
            raise ValueError(f"theta must have shape ({self.n_params},), got shape {theta.shape}")
        self.vector[...] = theta

    def __setstate__(self, state: dict[str, Any]) -> None:
        """Unpickling copies every array separately: make the parameters views of the vector again."""
        self.__dict__.update(state)
        self._link_vector()

    # ----------------------------------------------------------------- forward
    def predict(self, X: Any) -> np.ndarray:
        """Network output ``(n, n_out)`` for inputs ``X`` ``(n, n_in)``; keeps no trace.

        Rows are independent, so a large ``X`` is evaluated in blocks of
        4096 rows: the memory for the hidden layers stays that of one block.
        """
        x = as_samples(X, "X", self.n_in, self.dtype)
        if x.shape[0] <= _PREDICT_ROWS:
            return self._predict_rows(x)
        out = np.empty((x.shape[0], self.n_out), self.dtype)
        for start in range(0, x.shape[0], _PREDICT_ROWS):
            out[start:start + _PREDICT_ROWS] = self._predict_rows(x[start:start + _PREDICT_ROWS])
        return out

    def _predict_rows(self, v: np.ndarray) -> np.ndarray:
        for kind, layer in self._steps:
            if kind is _ACTIVATION_IN_PLACE:
                v = layer._value_in_place(v)  # v is the affine output this call made
            else:
                v = layer.value(v)
        return v

    def forward(self, X: Any, *, workspace: Workspace | None = None) -> tuple[np.ndarray, Trace]:
        """Output and the :class:`Trace` that :meth:`backward` needs.

        Without a workspace the output and the trace's values are new arrays
        that no later call writes into (the caller may keep them), and the
        trace can serve any number of :meth:`backward` calls. With a
        ``workspace`` (see :meth:`workspace`) the arrays are the
        workspace's and no large array is allocated. A batch that already has
        the network's dtype and shape is then used as it is, without the scan
        for NaN and infinity: training checks its data once before the first
        epoch, and its divergence guard catches non-finite results.
        """
        if workspace is None:
            v = as_samples(X, "X", self.n_in, self.dtype)
            values = [v]
            for value_of in self._values_of:
                v = value_of(v)
                values.append(v)
            return v, Trace(tuple(values))
        x = X if _is_batch(X, self.n_in, self.dtype) else as_samples(X, "X", self.n_in, self.dtype)
        generation = self._claim(workspace, x.shape[0])
        values = [x]
        v = x
        for (kind, layer), out in zip(self._steps, workspace.outputs(x.shape[0])):
            if kind is _AFFINE:
                v = layer.value(v, out=out)
            elif kind is _ACTIVATION_IN_PLACE:
                v = layer._value_in_place(v)  # overwrites the affine output it reads
            else:
                v = layer.value(v)
            values.append(v)
        return v, Trace(tuple(values), workspace, generation)

    def _ones(self, rows: int) -> np.ndarray:
        """A cached read-only vector of ``rows`` ones, for bias gradients ``1^T delta``."""
        ones = self._ones_for.get(rows)
        if ones is None:
            if len(self._ones_for) >= 8:
                self._ones_for.clear()
            ones = self._ones_for[rows] = np.ones(rows, self.dtype)
            ones.flags.writeable = False
        return ones

    def workspace(self, max_rows: int) -> Workspace:
        """Preallocated arrays for training steps on batches of up to ``max_rows`` samples."""
        return Workspace(self, max_rows)

    def _claim(self, workspace: Workspace, rows: int) -> int:
        if not isinstance(workspace, Workspace) or workspace.network is not self:
            raise TypeError("workspace must come from this network's workspace() method")
        if rows > workspace.max_rows:
            raise ValueError(f"the batch has {rows} rows but the workspace holds at most {workspace.max_rows}")
        workspace.generation += 1
        return workspace.generation

    # ----------------------------------------------------------------- backward
    def backward(
        self, trace: Trace, d_out: Any, *, need_input: bool = True
    ) -> tuple[list[np.ndarray], np.ndarray | None]:
        """Gradients of an error ``E`` given ``d_out = dE/d(output)``.

        Returns ``(grads, d_input)``: ``grads`` aligned with :attr:`params`
        (``dE/dW = delta^T x``, ``dE/db = sum of delta`` per affine layer) and
        ``d_input = dE/dX`` of shape ``(n, n_in)`` (``None`` when
        ``need_input=False``, which skips that last product). For a trace made
        without a workspace, ``grads`` and ``d_input`` are new arrays (``grads``
        views of one new flat vector, ``grads.vector``) that no later call
        writes into. For a trace made with a workspace, ``grads`` are the
        workspace's arrays, overwritten by the next backward pass.
        """
        d_out = self._check_d_out(trace, d_out)
        work = trace.workspace
        if work is not None and self._steps[-1][0] is _ACTIVATION_IN_PLACE:
            d_out = d_out.copy()  # the in-place derivative may overwrite its delta; never the caller's
        rows = d_out.shape[0]
        if work is None:  # new arrays, views of one new flat vector: the caller may keep them
            grads, ones = self._grad_layout.views(np.empty(self._vector.size, self.dtype)), self._ones(rows)
        else:
            grads, ones = work.grads, work.ones(rows)

        def gradient_of(i: int, layer: Affine, x: np.ndarray, delta: np.ndarray) -> None:
            k = self._grad_slot[i]
            np.matmul(delta.T, x, out=grads[k])  # delta^T x
            if layer.bias is not None:  # sum_i delta[i], as the product 1^T delta
                np.matmul(ones, delta, out=grads[k + 1])

        d_input = self._delta_recursion(trace, d_out, need_input, gradient_of)
        return grads, d_input

    def _delta_recursion(
        self,
        trace: Trace,
        delta: np.ndarray,
        need_input: bool,
        on_affine: Callable[[int, Affine, np.ndarray, np.ndarray], None],
    ) -> np.ndarray | None:
        """Walk from the output delta back to the input; return ``dE/dX`` (or ``None``).

        ``on_affine(i, layer, x, delta_z)`` is called for every affine layer,
        last to first, with its input ``x`` and the delta at its output, before
        the recursion moves below it (with a workspace, ``x`` is overwritten
        right after).
        """
        values, work = trace.values, trace.workspace
        for i, kind, layer in self._backward_steps:
            if kind is _AFFINE:
                on_affine(i, layer, values[i], delta)
                if i == self._first_affine and not need_input:
                    return None
                if work is None:
                    delta = np.matmul(delta, layer.weight)  # delta_x = delta_z W
                else:
                    delta = np.matmul(delta, layer.weight, out=work.scratch(delta.shape[0], layer.n_in))
            elif kind is _ACTIVATION_IN_PLACE and work is not None:
                a = values[i + 1]
                for rows in work.row_blocks(*a.shape):
                    layer._delta_in_place(a[rows], delta[rows])  # f'(z) * delta, into a's memory
                delta = a
            elif kind is _SCALING:
                delta = layer.input_gradient(delta)
            else:
                delta = delta * layer.derivative(values[i], values[i + 1])  # f'(z) * delta
        return delta

    def _check_d_out(self, trace: Trace, d_out: Any) -> np.ndarray:
        if not isinstance(trace, Trace) or len(trace.values) != len(self.layers) + 1:
            raise TypeError("trace must be the Trace returned by this network's forward()")
        work = trace.workspace
        if work is not None and trace.generation != work.generation:
            raise ValueError(
                "this trace's workspace arrays were overwritten by a later forward() or used by "
                "an earlier backward(); run forward() again"
            )
        expected = trace.values[-1].shape
        if not (type(d_out) is np.ndarray and d_out.dtype == self.dtype):
            d_out = as_float_array(d_out, "d_out", self.dtype)
        if d_out.shape != expected:
            raise ValueError(f"d_out must have the output's shape {expected}, got shape {d_out.shape}")
        if work is not None:
            work.generation += 1  # the backward pass about to run consumes the trace
        return d_out

    # ----------------------------------------------------------------- derivatives per sample
    def jacobian(self, X: Any) -> np.ndarray:
        """``J[i * n_out + k, p] = d output[i, k] / d theta[p]``, by backpropagation.

        Shape ``(n * n_out, n_params)``; columns follow :meth:`get_vector`.
        For output ``k`` the recursion is seeded with ``delta = e_k`` for every
        sample, and each sample keeps its own outer product ``delta_i x_i^T``
        instead of the batch sum that :meth:`backward` forms.
        """
        trace, n = self._trace_of(X)
        J = np.empty((n, self.n_out, self.n_params), dtype=self.dtype)
        for k in range(self.n_out):
            seed = self._output_seed(n, k)
            columns: list[np.ndarray] = []

            def per_sample(i: int, layer: Affine, x: np.ndarray, delta: np.ndarray) -> None:
                if layer.bias is not None:
                    columns.append(delta)
                columns.append((delta[:, :, None] * x[:, None, :]).reshape(n, -1))

            self._delta_recursion(trace, seed, False, per_sample)
            J[:, k, :] = np.concatenate(columns[::-1], axis=1)  # collected last layer first
        return J.reshape(n * self.n_out, self.n_params)

    def input_gradient(self, X: Any) -> np.ndarray:
        """``G[i, k, j] = d output[i, k] / d X[i, j]``, shape ``(n, n_out, n_in)``."""
        trace, n = self._trace_of(X)
        G = np.empty((n, self.n_out, self.n_in), dtype=self.dtype)
        for k in range(self.n_out):
            G[:, k, :] = self._delta_recursion(trace, self._output_seed(n, k), True, lambda *_: None)
        return G

    def _trace_of(self, X: Any) -> tuple[Trace, int]:
        _, trace = self.forward(X)
        return trace, trace.values[0].shape[0]

    def _output_seed(self, n: int, k: int) -> np.ndarray:
        """``delta = e_k`` for every sample: the derivative of output ``k`` alone."""
        seed = np.zeros((n, self.n_out), dtype=self.dtype)
        seed[:, k] = 1.0
        return seed

    # ----------------------------------------------------------------- utilities
    def copy(self, dtype: Any = None) -> "Network":
        """An independent copy (same layers and weights), optionally in another dtype."""
        layers = copy.deepcopy(self.layers)
        return Network(layers, dtype=self.dtype if dtype is None else dtype, init=None)

    def __repr__(self) -> str:
        inner = ", ".join(repr(layer) for layer in self.layers)
        return f"Network([{inner}], dtype={self.dtype.name})"


_PREDICT_ROWS = 4096  # rows per block in predict

# np.longdouble (x86 extended precision, no BLAS, slow) is accepted for the
# numerical references in tinyprop.check; float32 and float64 are the working dtypes.
_DTYPES = (np.dtype(np.float32), np.dtype(np.float64), np.dtype(np.longdouble))


def _is_batch(X: Any, n_in: int, dtype: np.dtype) -> bool:
    """An ndarray of ``dtype`` and shape ``(n, n_in)``, ``n >= 1``."""
    return type(X) is np.ndarray and X.dtype == dtype and X.ndim == 2 and X.shape[1] == n_in and X.shape[0] > 0


def _kind(layer: Layer, previous: Layer | None) -> _Kind:
    """A built-in activation right after an affine layer may overwrite that layer's output."""
    if isinstance(layer, Affine):
        return _AFFINE
    if isinstance(layer, Activation):
        in_place = works_in_place(layer) and isinstance(previous, Affine)
        return _ACTIVATION_IN_PLACE if in_place else _ACTIVATION
    return _SCALING


def _network_dtype(dtype: Any) -> np.dtype:
    try:
        resolved = np.dtype(dtype)
    except TypeError:
        raise TypeError(f"dtype must be float32 or float64, got {dtype!r}") from None
    if resolved not in _DTYPES:
        raise TypeError(f"dtype must be float32 or float64, got {resolved}")
    return resolved


def _check_layer_widths(layers: list[Layer]) -> tuple[int, int]:
    """Check that consecutive widths agree; return the network's ``(n_in, n_out)``."""
    if not layers:
        raise ValueError("a network needs at least one layer, got an empty list")
    width: int | None = None
    n_in: int | None = None
    for index, layer in enumerate(layers):
        if isinstance(layer, Activation):
            continue
        if isinstance(layer, Affine):
            layer_in, layer_out = layer.n_in, layer.n_out
        elif isinstance(layer, ColumnScaling):
            layer_in = layer_out = layer.width
        else:
            raise TypeError(
                f"layer {index} is {kind_of(layer)}; expected Affine, an Activation "
                "subclass, Standardize or Unstandardize"
            )
        if width is not None and layer_in != width:
            raise ValueError(
                f"layer {index} ({layer!r}) expects {layer_in} inputs but the layer before it "
                f"produces {width}"
            )
        if n_in is None:
            n_in = layer_in
        width = layer_out
    if not any(isinstance(layer, Affine) for layer in layers):
        raise ValueError("a network needs at least one Affine layer (it has no parameters otherwise)")
    assert n_in is not None and width is not None
    return n_in, width
