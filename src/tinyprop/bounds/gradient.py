"""Guaranteed bounds on every slope ``d output_k / d input_j`` over an input box.

From them: a monotonicity certificate per (output, input) pair, or a pair of
inputs, checked by evaluating the network, where the output moves the other
way; and a Lipschitz bound per pair. See ``docs/guarantees.md``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from ..network import Network
from ._box import Clock, check_max_splits, check_tolerance, checked_box, local_minimiser, resolution, starting_points
from ._program import Program
from ._relax import tight_intervals
from ._search import Problem, minimise
from ._slopes import gradient_intervals

__all__ = ["GradientBounds", "gradient_bounds"]

METHOD = (
    "the delta recursion in interval arithmetic (Moore 1966) over the hidden units' intervals "
    "(interval propagation, Gowal et al. 2018, tightened by backward linear relaxation, Zhang et "
    "al. 2018), refined by branch and bound on the input box; rounding covered by proven error "
    "margins and outward rounding"
)

_STEP_TRIES = 40  # step sizes tried for a witness pair, halving each time


@dataclass(frozen=True)
class GradientBounds:
    """What :func:`gradient_bounds` proved and found, arrays ``(n_out, n_in)``.

    ``lower[k, j] <= net.input_gradient(x)[0, k, j] <= upper[k, j]`` for every
    ``x`` in the box (guaranteed). ``lowest_found``/``highest_found``: the
    extreme slopes found, at ``lowest_input``/``highest_input``
    (``(n_out, n_in, n_in)``). ``direction[k, j]`` is ``1`` when output ``k`` is
    proven non-decreasing in input ``j`` over the box (``lower >= 0``), ``-1``
    when proven non-increasing, ``0`` when neither is proven. For a pair that is
    not proven monotone, ``falling_pairs[(k, j)]`` is ``(x_a, x_b)``: two
    points of the box that differ only in input ``j``, with ``x_b[j] > x_a[j]``
    and ``net.predict(x_b)[0, k] < net.predict(x_a)[0, k]`` (checked); likewise
    ``rising_pairs`` with the output rising. ``lipschitz[k, j] =
    max(|lower|, |upper|)``: guaranteed bound on how much output ``k`` can
    change per unit change of input ``j`` alone.
    """

    lower: np.ndarray
    upper: np.ndarray
    lowest_found: np.ndarray
    highest_found: np.ndarray
    lowest_input: np.ndarray
    highest_input: np.ndarray
    falling_pairs: dict[tuple[int, int], tuple[np.ndarray, np.ndarray]]
    rising_pairs: dict[tuple[int, int], tuple[np.ndarray, np.ndarray]]
    low: np.ndarray
    high: np.ndarray
    tolerance: float
    stopped: tuple[tuple[tuple[str, str], ...], ...]
    splits: int
    seconds: float
    dtype: str
    method: str = METHOD

    @property
    def direction(self) -> np.ndarray:
        return np.where(self.lower >= 0, 1, np.where(self.upper <= 0, -1, 0))

    @property
    def lipschitz(self) -> np.ndarray:
        return np.maximum(np.abs(self.lower), np.abs(self.upper))

    @property
    def lower_gap(self) -> np.ndarray:
        return self.lowest_found - self.lower

    @property
    def upper_gap(self) -> np.ndarray:
        return self.upper - self.highest_found

    @property
    def met(self) -> bool:
        allowed = self.tolerance * _scale(self.lowest_found, self.highest_found)
        return bool(np.all(self.lower_gap <= allowed) and np.all(self.upper_gap <= allowed))

    def __str__(self) -> str:
        words = {1: "non-decreasing (proven)", -1: "non-increasing (proven)", 0: "not proven monotone"}
        lines = [f"slope bounds over the box ({self.dtype} network, {self.seconds:.2f} s, {self.splits} splits):"]
        for k in range(self.lower.shape[0]):
            for j in range(self.lower.shape[1]):
                line = (f"  d output {k} / d input {j}: [{self.lower[k, j]:.6g}, {self.upper[k, j]:.6g}] "
                        f"guaranteed; found [{self.lowest_found[k, j]:.6g}, {self.highest_found[k, j]:.6g}]; "
                        f"{words[int(self.direction[k, j])]}")
                if (k, j) in self.falling_pairs and (k, j) in self.rising_pairs:
                    line += "; rises and falls (witness pairs checked)"
                lines.append(line)
        lines.append(f"  tolerance {self.tolerance:g} of the largest slope {'met' if self.met else 'NOT met'}")
        return "\n".join(lines)


def gradient_bounds(
    net: Network,
    low: Any,
    high: Any,
    *,
    tolerance: float = 1e-3,
    max_seconds: float = 10.0,
    max_splits: int | None = None,
    seed: int | None = 0,
) -> GradientBounds:
    """Guaranteed bounds on ``d output_k / d input_j`` for every ``x`` in the box ``[low, high]``.

    Parameters are those of :func:`tinyprop.output_bounds`; ``tolerance`` is
    relative to the largest slope found for the same output and input
    (``max(|lowest_found|, |highest_found|)``), and the time is shared among
    the ``2 * n_out * n_in`` bounds. The bounds hold for
    ``net.input_gradient`` in the network's dtype (the delta recursion run in
    interval arithmetic, with its rounding covered), refined by branch and
    bound; interval arithmetic converges linearly as boxes shrink, so a loose
    ``tolerance`` is the sensible default here.

    >>> import numpy as np, tinyprop as tp
    >>> net = tp.Network([tp.Affine(1, 1), tp.Tanh()], seed=0, init=None)
    >>> net.set_vector([2.0, 0.0])
    >>> result = tp.gradient_bounds(net, -1.0, 1.0)
    >>> int(result.direction[0, 0]), bool(result.upper[0, 0] >= 2.0)  # slope 2 (1 - tanh(2x)**2) <= 2
    (1, True)
    """
    program = Program(net)
    low, high = checked_box(low, high, net.n_in, net.dtype)
    tolerance = check_tolerance(tolerance)
    max_splits = check_max_splits(max_splits)
    n_out, n_in = net.n_out, net.n_in
    clock = Clock(max_seconds, 2 * n_out * n_in)
    box_lo, box_hi = program.computed_box(low, high)
    starts = starting_points(low, high, seed)
    sampled = net.input_gradient(starts).astype(np.float64)
    scale = _scale(sampled.min(axis=0), sampled.max(axis=0))

    lower, upper = np.empty((n_out, n_in)), np.empty((n_out, n_in))
    lowest, highest = np.empty((n_out, n_in)), np.empty((n_out, n_in))
    lowest_x, highest_x = np.empty((n_out, n_in, n_in)), np.empty((n_out, n_in, n_in))
    stopped, splits = [], 0
    for k in range(n_out):
        per_input = []
        for j in range(n_in):
            reasons = []
            for sign in (1.0, -1.0):
                problem = _problem(program, k, j, sign, low, high, box_lo, box_hi)
                outcome = minimise(problem, starts, target=tolerance * scale[k, j], deadline=clock.next_deadline(),
                                   max_splits=max_splits)
                found = float(net.input_gradient(outcome.best_x[None, :])[0, k, j])  # one row, as a reviewer would
                if sign > 0:
                    lower[k, j], lowest[k, j], lowest_x[k, j] = min(outcome.bound, found), found, outcome.best_x
                else:
                    upper[k, j], highest[k, j], highest_x[k, j] = max(-outcome.bound, found), found, outcome.best_x
                reasons.append(outcome.stopped)
                splits += outcome.splits
            per_input.append(tuple(reasons))
        stopped.append(tuple(per_input))
    falling, rising = {}, {}
    for k in range(n_out):
        for j in range(n_in):
            if lower[k, j] >= 0 or upper[k, j] <= 0:
                continue  # proven monotone: there is nothing to witness against
            if lowest[k, j] < 0:
                _store(falling, (k, j), witness_pair(net, lowest_x[k, j], k, j, low, high, falling=True))
            if highest[k, j] > 0:
                _store(rising, (k, j), witness_pair(net, highest_x[k, j], k, j, low, high, falling=False))
    return GradientBounds(lower, upper, lowest, highest, lowest_x, highest_x, falling, rising, low, high,
                          tolerance, tuple(stopped), splits, clock.seconds, net.dtype.name)


def _scale(lowest: np.ndarray, highest: np.ndarray) -> np.ndarray:
    return np.maximum(np.abs(lowest), np.abs(highest))


def _store(pairs: dict, key: tuple[int, int], pair: tuple[np.ndarray, np.ndarray] | None) -> None:
    if pair is not None:
        pairs[key] = pair


def witness_pair(
    net: Network, x: np.ndarray, k: int, j: int, low: np.ndarray, high: np.ndarray, *, falling: bool
) -> tuple[np.ndarray, np.ndarray] | None:
    """Two points of the box, ``x_b = x_a + h e_j`` with ``h > 0``, where output ``k`` falls (rises).

    Starts at the point ``x`` where the slope has the wanted sign and tries
    steps from a quarter of the box's width down, halving; each pair is
    checked by evaluating ``net.predict``. ``None`` if no step shows it.
    """
    width = high[j] - low[j]
    h = 0.25 * width
    for _ in range(_STEP_TRIES):
        if h <= 0:
            break
        for a_j in (x[j], x[j] - h, x[j] - 0.5 * h):
            a = x.copy()
            a[j] = min(max(a_j, low[j]), high[j] - h)
            b = a.copy()
            b[j] = min(a[j] + h, high[j])
            if not b[j] > a[j]:
                continue
            ya, yb = net.predict(np.stack([a, b]))[:, k]
            if (yb < ya) if falling else (yb > ya):
                return a, b
        h *= 0.5
    return None


def _problem(program: Program, k: int, j: int, sign: float, low, high, box_lo, box_hi) -> Problem:
    """Minimise ``sign * d output_k / d input_j``."""
    net = program.net

    def bound(lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
        g_lo, g_hi = gradient_intervals(program, tight_intervals(program, lo, hi), k)
        return g_lo[:, j] if sign > 0 else -g_hi[:, j]

    def evaluate(X: np.ndarray) -> np.ndarray:
        return sign * net.input_gradient(X)[:, k, j].astype(np.float64)

    def value_and_gradient(x: np.ndarray) -> tuple[float, np.ndarray]:
        # the slope's own gradient (a second derivative) by central differences of input_gradient
        step = 1e-6 * np.maximum(1.0, np.abs(x))
        n = x.size
        rows = np.clip(np.concatenate([x[None, :], x + np.diag(step), x - np.diag(step)]), low, high)
        slopes = sign * net.input_gradient(rows)[:, k, j].astype(np.float64)
        spacing = np.diagonal(rows[1:n + 1] - rows[n + 1:])
        safe = np.where(spacing > 0, spacing, 1.0)
        return float(slopes[0]), np.where(spacing > 0, (slopes[1:n + 1] - slopes[n + 1:]) / safe, 0.0)

    polish = local_minimiser(value_and_gradient, low, high)
    return Problem(bound, evaluate, polish, box_lo, box_hi, low, high, resolution(net.dtype))
