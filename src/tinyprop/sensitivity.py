"""Which inputs drive the output: statistics of ``d output_k / d input_j`` over a data set.

:func:`input_sensitivity` summarises :meth:`~tinyprop.network.Network.input_gradient`
over the rows of a data set: mean absolute value, its standard deviation and
the signed mean, in output units per input unit. All statistics are computed
in float64 on a float64 copy of the network.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from ._validate import as_samples
from .network import Network

__all__ = ["SensitivityTable", "input_sensitivity"]


@dataclass(frozen=True, kw_only=True, eq=False)
class SensitivityTable:
    """Per-input summary of ``d output_k / d input_j`` over ``n_samples`` inputs.

    Arrays have shape ``(n_out, n_in)``, in output units per input unit (the
    derivative is taken through any fixed scaling layers, so the units are
    those of the raw inputs and outputs). ``mean_abs``: mean of
    ``|d output / d input|``; ``sd_abs``: its standard deviation over the
    samples (population formula, ``ddof=0``: a description of this data set,
    not an estimate); ``mean``: the signed mean (the direction of the effect).
    """

    input_names: tuple[str, ...]
    output_names: tuple[str, ...]
    n_samples: int
    mean_abs: np.ndarray
    sd_abs: np.ndarray
    mean: np.ndarray

    def __str__(self) -> str:
        width = max(len("input"), *(len(name) for name in self.input_names))
        lines = [f"input sensitivity d output / d input over {self.n_samples} samples (output units per input unit)"]
        for k, output in enumerate(self.output_names):
            lines.append(f"{output}:")
            lines.append(f"  {'input':<{width}}  {'mean |d/dx|':>12}  {'sd |d/dx|':>12}  {'mean d/dx':>12}")
            for j in np.argsort(-self.mean_abs[k], kind="stable"):
                lines.append(
                    f"  {self.input_names[j]:<{width}}  {self.mean_abs[k, j]:>12.4g}  "
                    f"{self.sd_abs[k, j]:>12.4g}  {self.mean[k, j]:>+12.4g}"
                )
        return "\n".join(lines)

    def to_dict(self) -> dict[str, Any]:
        """JSON-able: per output, per input the three statistics."""
        return {
            "n_samples": self.n_samples,
            "outputs": {
                output: {
                    name: {
                        "mean_abs": float(self.mean_abs[k, j]),
                        "sd_abs": float(self.sd_abs[k, j]),
                        "mean": float(self.mean[k, j]),
                    }
                    for j, name in enumerate(self.input_names)
                }
                for k, output in enumerate(self.output_names)
            },
        }


def input_sensitivity(
    net: Network,
    X: Any,
    *,
    input_names: Sequence[str] | None = None,
    output_names: Sequence[str] | None = None,
) -> SensitivityTable:
    """Which inputs drive the output: statistics of ``net.input_gradient(X)`` over the rows of ``X``.

    ``input_names`` / ``output_names`` default to ``"input j"`` / ``"output k"``.

    >>> import numpy as np, tinyprop as tp
    >>> net = tp.Network([tp.Affine(2, 1)], init=None)
    >>> net.layers[0].weight[:] = [[2.0, -0.5]]
    >>> table = tp.input_sensitivity(net, np.zeros((3, 2)), input_names=["voltage_V", "current_A"])
    >>> table.mean_abs.tolist(), table.mean.tolist()
    ([[2.0, 0.5]], [[2.0, -0.5]])
    """
    if not isinstance(net, Network):
        raise TypeError(f"net must be a tinyprop Network, got {type(net).__name__}")
    inputs = _names(input_names, "input_names", net.n_in, "input")
    outputs = _names(output_names, "output_names", net.n_out, "output")
    work = net.copy(np.float64)
    G = work.input_gradient(as_samples(X, "X", net.n_in, work.dtype))
    magnitude = np.abs(G)
    return SensitivityTable(
        input_names=inputs,
        output_names=outputs,
        n_samples=int(G.shape[0]),
        mean_abs=magnitude.mean(axis=0),
        sd_abs=magnitude.std(axis=0),
        mean=G.mean(axis=0),
    )


def _names(names: Sequence[str] | None, what: str, count: int, default: str) -> tuple[str, ...]:
    if names is None:
        return tuple(f"{default} {i}" for i in range(count))
    wrong = TypeError(f"{what} must be a sequence of {count} strings, got {names!r}")
    if isinstance(names, str) or not isinstance(names, Iterable):
        raise wrong
    names = tuple(names)
    if not all(isinstance(name, str) for name in names):
        raise wrong
    if len(names) != count:
        raise ValueError(f"{what} must have {count} entries (one per network {default}), got {len(names)}")
    return names
