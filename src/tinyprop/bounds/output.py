"""Guaranteed bounds on every output of a network over an input box.

See ``docs/guarantees.md`` for the method, its sources and what is (and is
not) guaranteed.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from ..network import Network
from ._box import Clock, check_max_splits, check_tolerance, checked_box, local_minimiser, resolution, starting_points
from ._program import Program
from ._relax import linear_lower_bound, tight_intervals
from ._search import Problem, minimise

__all__ = ["OutputBounds", "output_bounds"]

METHOD = (
    "interval arithmetic (Moore 1966; Gowal et al. 2018) and backward linear relaxation "
    "(Zhang et al. 2018), which also tightens the hidden units' intervals, refined by branch and "
    "bound on the input box; rounding covered by proven error margins and outward rounding"
)


@dataclass(frozen=True)
class OutputBounds:
    """What :func:`output_bounds` proved and found, per output ``k``.

    ``lower[k] <= net.predict(x)[0, k] <= upper[k]`` for every ``x`` in the box
    (guaranteed). ``lowest_found[k]`` is ``net.predict`` at ``lowest_input[k]``
    (a point of the box, evaluated as a single row), the smallest value found;
    likewise ``highest_*``.
    ``lower_gap = lowest_found - lower`` and ``upper_gap = upper - highest_found``
    say how far the guarantee may be from the true extremes. ``met`` is True
    when every gap is within ``tolerance`` times the output's range found
    (``highest_found - lowest_found``); ``stopped`` says, per output, why the
    search for each bound ended (``"tolerance"``; ``"rounding"``: the gap is
    within twice the rounding allowance at a single point, which no splitting
    can reduce; ``"time"``; ``"split limit"``; or ``"resolution"``: the boxes
    left are as narrow as the dtype allows).
    """

    lower: np.ndarray
    upper: np.ndarray
    lowest_found: np.ndarray
    highest_found: np.ndarray
    lowest_input: np.ndarray
    highest_input: np.ndarray
    low: np.ndarray
    high: np.ndarray
    tolerance: float
    stopped: tuple[tuple[str, str], ...]
    splits: int
    seconds: float
    dtype: str
    method: str = METHOD

    @property
    def lower_gap(self) -> np.ndarray:
        return self.lowest_found - self.lower

    @property
    def upper_gap(self) -> np.ndarray:
        return self.upper - self.highest_found

    @property
    def met(self) -> bool:
        allowed = self.tolerance * (self.highest_found - self.lowest_found)
        return bool(np.all(self.lower_gap <= allowed) and np.all(self.upper_gap <= allowed))

    def __str__(self) -> str:
        lines = [f"output bounds over the box ({self.dtype} network, {self.seconds:.2f} s, {self.splits} splits):"]
        for k in range(self.lower.size):
            lines.append(
                f"  output {k}: [{self.lower[k]:.10g}, {self.upper[k]:.10g}] guaranteed; "
                f"found [{self.lowest_found[k]:.10g}, {self.highest_found[k]:.10g}]; "
                f"gaps {self.lower_gap[k]:.3g} / {self.upper_gap[k]:.3g}; stopped by {' / '.join(self.stopped[k])}"
            )
        lines.append(f"  tolerance {self.tolerance:g} of the range {'met' if self.met else 'NOT met'}")
        return "\n".join(lines)


def output_bounds(
    net: Network,
    low: Any,
    high: Any,
    *,
    tolerance: float = 1e-6,
    max_seconds: float = 10.0,
    max_splits: int | None = None,
    seed: int | None = 0,
) -> OutputBounds:
    """Guaranteed lower and upper bounds of every output of ``net`` over the box ``[low, high]``.

    Parameters
    ----------
    net:
        A network whose activations declare their shape (all built-ins do;
        see :class:`tinyprop.ActivationShape`).
    low, high:
        The box: one number per input each (a scalar for a one-input network).
    tolerance:
        Stop refining a bound once the gap between it and the best value found
        is at most ``tolerance`` times the range of the output found.
    max_seconds:
        Time for the whole search, shared equally among the ``2 * n_out``
        bounds; when it runs out, the bounds so far are returned (still
        guaranteed, with a larger gap).
    max_splits:
        Optional limit on the boxes split per bound (a budget that does not
        depend on the machine's speed).
    seed:
        Seed of the random starting points.

    The bounds hold for ``net.predict`` in the network's own dtype at any point
    of the box (inputs are rounded to the dtype first, outputs include the
    rounding of the evaluation). Method: interval arithmetic and backward
    linear relaxation, refined by branch and bound (``docs/guarantees.md``).

    >>> import numpy as np, tinyprop as tp
    >>> net = tp.Network([tp.Affine(1, 1), tp.Tanh()], seed=0, init=None)
    >>> net.set_vector([2.0, 0.0])
    >>> result = tp.output_bounds(net, -1.0, 1.0)
    >>> bool(result.lower[0] <= np.tanh(-2.0) and np.tanh(2.0) <= result.upper[0]), result.met
    (True, True)
    """
    program = Program(net)
    low, high = checked_box(low, high, net.n_in, net.dtype)
    tolerance = check_tolerance(tolerance)
    max_splits = check_max_splits(max_splits)
    clock = Clock(max_seconds, 2 * net.n_out)
    box_lo, box_hi = program.computed_box(low, high)
    starts = starting_points(low, high, seed)
    sampled = net.predict(starts).astype(np.float64)
    spread = sampled.max(axis=0) - sampled.min(axis=0)

    n_out = net.n_out
    lower, upper = np.empty(n_out), np.empty(n_out)
    lowest, highest = np.empty(n_out), np.empty(n_out)
    lowest_x, highest_x = np.empty((n_out, net.n_in)), np.empty((n_out, net.n_in))
    stopped, splits = [], 0
    for k in range(n_out):
        reasons = []
        for sign in (1.0, -1.0):
            problem = _problem(program, k, sign, low, high, box_lo, box_hi)
            outcome = minimise(problem, starts, target=tolerance * spread[k], deadline=clock.next_deadline(),
                               max_splits=max_splits)
            found = float(net.predict(outcome.best_x[None, :])[0, k])  # as a reviewer evaluates it: one row
            if sign > 0:
                lower[k], lowest[k], lowest_x[k] = min(outcome.bound, found), found, outcome.best_x
            else:
                upper[k], highest[k], highest_x[k] = max(-outcome.bound, found), found, outcome.best_x
            reasons.append(outcome.stopped)
            splits += outcome.splits
        stopped.append(tuple(reasons))
    return OutputBounds(lower, upper, lowest, highest, lowest_x, highest_x, low, high, tolerance,
                        tuple(stopped), splits, clock.seconds, net.dtype.name)


def _problem(program: Program, k: int, sign: float, low, high, box_lo, box_hi) -> Problem:
    """Minimise ``sign * output_k``."""
    net = program.net
    objective = np.zeros(net.n_out)
    objective[k] = sign

    def bound(lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
        found = tight_intervals(program, lo, hi)
        interval = found.lo[-1][:, k] if sign > 0 else -found.hi[-1][:, k]
        return np.maximum(linear_lower_bound(program, found, objective), interval)

    def evaluate(X: np.ndarray) -> np.ndarray:
        return sign * net.predict(X)[:, k].astype(np.float64)

    def value_and_gradient(x: np.ndarray) -> tuple[float, np.ndarray]:
        row = x.reshape(1, -1)
        value = sign * float(net.predict(row)[0, k])
        return value, sign * net.input_gradient(row)[0, k].astype(np.float64)

    polish = local_minimiser(value_and_gradient, low, high)
    return Problem(bound, evaluate, polish, box_lo, box_hi, low, high, resolution(net.dtype))
