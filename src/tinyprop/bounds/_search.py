"""Branch and bound on an input box: the smallest value of an objective, guaranteed and found.

``minimise`` keeps a set of sub-boxes, each with a guaranteed lower bound of
the objective over it, and the best value found so far by evaluating the
network at points (box centres, sampled starts, local optimisation). Each
round it splits the boxes whose lower bound is furthest below the best value
(in halves along the dimension that is widest relative to the whole box),
bounds both halves (never below the parent's bound: a half lies inside its
parent), evaluates their centres, and discards every box whose lower bound is
not below the best value found, since it cannot hold anything smaller. The
smallest lower bound left (or the best value, if smaller) is a guaranteed lower
bound of the objective over the whole box; the search stops when the gap to
the best value is within ``target``, the time or split budget is spent, or
no box can be split further in the network's dtype. A target below twice the
gap that remains on a box of a single point (the rounding allowance of a
float32 network, say) cannot be reached by splitting; the search then stops
at that level and says ``"rounding"``.

Everything is vectorised over boxes: one round bounds up to ``_BATCH`` halves
in a few numpy calls.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Callable

import numpy as np

_BATCH = 1024  # boxes split per round
_LOCAL_EVERY = 16  # rounds between local optimisations (when the best value improved)

Bound = Callable[[np.ndarray, np.ndarray], np.ndarray]
Evaluate = Callable[[np.ndarray], np.ndarray]
Polish = Callable[[np.ndarray], tuple[np.ndarray, float]]


@dataclass(frozen=True)
class Outcome:
    """Result of one minimisation: ``bound <= objective <= best`` over the box; ``best`` at ``best_x``."""

    bound: float
    best: float
    best_x: np.ndarray
    stopped: str  # "tolerance", "rounding", "time", "split limit" or "resolution"
    splits: int
    boxes_left: int


@dataclass(frozen=True)
class Problem:
    """One objective over one box.

    ``bound(lo, hi)`` gives guaranteed lower bounds over boxes (rows);
    ``evaluate(X)`` the objective at points inside ``[inside_lo, inside_hi]``;
    ``polish(x)`` improves a point by local optimisation (or returns it).
    The search covers ``[box_lo, box_hi]`` (which contains the inside box),
    and does not split a box narrower than ``resolution(lo, hi)``.
    """

    bound: Bound
    evaluate: Evaluate
    polish: Polish
    box_lo: np.ndarray
    box_hi: np.ndarray
    inside_lo: np.ndarray
    inside_hi: np.ndarray
    resolution: Callable[[np.ndarray, np.ndarray], np.ndarray]


def minimise(
    problem: Problem, starts: np.ndarray, *, target: float, deadline: float, max_splits: int | None
) -> Outcome:
    """Branch and bound from the whole box; ``starts`` (rows inside the box) seed the best value."""
    values = problem.evaluate(starts)
    order = np.argsort(values)
    best, best_x = float(values[order[0]]), starts[order[0]].copy()
    best, best_x = _polish_best(problem, best, best_x)
    point = best_x[None, :]
    floor = 2.0 * max(best - float(_sound(problem.bound, point, point)[0]), 0.0)  # gap left on one point
    floor = floor if np.isfinite(floor) else 0.0
    reachable = target >= floor
    target = max(target, floor)
    lo, hi = problem.box_lo[None, :].copy(), problem.box_hi[None, :].copy()
    lb = _sound(problem.bound, lo, hi)
    span = problem.box_hi - problem.box_lo
    has_width = span > 0
    span = np.where(has_width, span, 1.0)
    splits, rounds, improved = 0, 0, False
    while True:
        keep = lb < best
        lo, hi, lb = lo[keep], hi[keep], lb[keep]
        if lb.size == 0 or best - lb.min() <= target:
            stopped = "tolerance" if reachable else "rounding"
            break
        if time.monotonic() >= deadline:
            stopped = "time"
            break
        if max_splits is not None and splits >= max_splits:
            stopped = "split limit"
            break
        width = hi - lo
        relative = np.where((width > problem.resolution(lo, hi)) & has_width, width / span, -1.0)
        dim = np.argmax(relative, axis=1)
        rows = np.arange(lo.shape[0])
        candidates = np.flatnonzero((lb < best - target) & (relative[rows, dim] > 0))
        if candidates.size == 0:
            stopped = "resolution"
            break
        budget = _BATCH if max_splits is None else max(1, min(_BATCH, max_splits - splits))
        if candidates.size > budget:
            candidates = candidates[np.argpartition(lb[candidates], budget - 1)[:budget]]
        lo, hi, lb = _split(lo, hi, lb, candidates, dim[candidates], problem.bound)
        new = slice(lo.shape[0] - 2 * candidates.size, None)
        centres = np.clip(0.5 * lo[new] + 0.5 * hi[new], problem.inside_lo, problem.inside_hi)
        values = problem.evaluate(centres)
        i = int(np.argmin(values))
        if values[i] < best:
            best, best_x, improved = float(values[i]), centres[i].copy(), True
        splits += candidates.size
        rounds += 1
        if improved and rounds % _LOCAL_EVERY == 0:
            best, best_x = _polish_best(problem, best, best_x)
            improved = False
    best, best_x = _polish_best(problem, best, best_x)
    bound = min(float(lb.min()) if lb.size else best, best)
    return Outcome(bound, best, best_x, stopped, splits, int(lb.size))


def _sound(bound: Bound, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """``bound(lo, hi)``, where an interval that overflowed (NaN) proves nothing: -inf, so it prunes no box."""
    with np.errstate(over="ignore", invalid="ignore"):
        lb = bound(lo, hi)
    return np.where(np.isnan(lb), -np.inf, lb)


def _polish_best(problem: Problem, best: float, best_x: np.ndarray) -> tuple[float, np.ndarray]:
    x, v = problem.polish(best_x)
    return (v, x) if v < best else (best, best_x)


def _split(lo, hi, lb, rows, dim, bound: Bound):
    """Replace boxes ``rows`` by their halves along ``dim``; the halves keep at least the parent's bound."""
    parent_lo, parent_hi, parent_lb = lo[rows], hi[rows], lb[rows]
    pick = np.arange(rows.size)
    mid = np.clip(0.5 * parent_lo[pick, dim] + 0.5 * parent_hi[pick, dim], parent_lo[pick, dim], parent_hi[pick, dim])
    left_hi, right_lo = parent_hi.copy(), parent_lo.copy()
    left_hi[pick, dim] = mid
    right_lo[pick, dim] = mid
    child_lo = np.concatenate([parent_lo, right_lo])
    child_hi = np.concatenate([left_hi, parent_hi])
    child_lb = np.maximum(_sound(bound, child_lo, child_hi), np.concatenate([parent_lb, parent_lb]))
    rest = np.ones(lo.shape[0], bool)
    rest[rows] = False
    return (
        np.concatenate([lo[rest], child_lo]),
        np.concatenate([hi[rest], child_hi]),
        np.concatenate([lb[rest], child_lb]),
    )
