"""Lower bounds on linear functions of a layer's output over boxes, by a backward linear relaxation.

The method of Zhang et al. 2018 (NeurIPS, "Efficient neural network robustness
certification with general activation functions"): starting from ``lambda``
at the output of some step, walk back through the steps, keeping
``lambda_top . v_top >= lambda . v + const`` for the input ``v`` of the
current step:

- affine ``z = W x + b``: ``lambda . z = (lambda W) . x + lambda . b``;
- scaling ``y = x * gain + offset``: ``lambda . y = (lambda * gain) . x + lambda . offset``;
- activation ``a = f(z)``: each unit with ``lambda_i >= 0`` takes its lower
  line, each with ``lambda_i < 0`` its upper line (``_rules.ActivationRules.lines``).

At the input, ``lambda . x >= lambda . centre - |lambda| . radius`` over the box.

:func:`tight_intervals` runs interval propagation and, after every affine step
that follows an activation, intersects its intervals with the bounds of this
walk for each unit (both signs at once): the intermediate bounds of Zhang et
al., which interval propagation alone leaves loose. :func:`linear_lower_bound`
bounds one objective at the output.

Rounding: the bound covers the network as computed in its dtype (each affine
step's output may differ from the exact one by ``gamma_n (|W| |x| + |b|)``,
which costs ``|lambda| . gamma_n (|W| |x| + |b|)``) and the float64 rounding
of this walk (``lambda W`` computed is within ``gamma_m |lambda| |W|`` of the
exact product, which costs that times ``|x|``; the constant, a long sum, is
within ``gamma_N`` of the sum of its absolute terms). These are collected in
``slack``, doubled, and subtracted; the result is rounded down.
"""

from __future__ import annotations

import numpy as np

from ._arith import FLOAT64, centre_radius, down, magnitude
from ._program import ActivationStep, AffineStep, Intervals, Program

_ELEMENTS = 1 << 22  # largest lambda array (boxes x objectives x width) built at once


def linear_lower_bound(program: Program, found: Intervals, objective: np.ndarray) -> np.ndarray:
    """Sound lower bound of ``objective . output`` over each box of ``found`` (``(B,)``)."""
    batch = found.lo[0].shape[0]
    lam = np.broadcast_to(np.asarray(objective, np.float64), (batch, 1, program.n_out))
    return _walk(program, found, lam, len(program.steps))[:, 0]


def tight_intervals(program: Program, lo: np.ndarray, hi: np.ndarray) -> Intervals:
    """Interval propagation, tightened after each affine step that follows an activation."""
    found = Intervals([lo], [hi], {}, {})
    nonlinear = False
    for i, step in enumerate(program.steps):
        program.advance(found, i)
        nonlinear = nonlinear or isinstance(step, ActivationStep)
        if nonlinear and isinstance(step, AffineStep):
            width = step.weight.shape[0]
            both = np.concatenate([np.eye(width), -np.eye(width)])
            widest = max(max(s.weight.shape) for s in program.steps[: i + 1] if isinstance(s, AffineStep))
            chunk = max(1, _ELEMENTS // (2 * width * widest))
            for j in range(i):  # lines of the activations below, once for the whole batch
                if isinstance(program.steps[j], ActivationStep):
                    program.lines(found, j)
            lower, upper = [], []
            for start in range(0, lo.shape[0], chunk):
                part = _slice(found, start, start + chunk)
                lam = np.broadcast_to(both, (part.lo[0].shape[0], 2 * width, width))
                bounds = _walk(program, part, lam, i + 1)
                lower.append(bounds[:, :width])
                upper.append(-bounds[:, width:])
            found.lo[-1] = np.maximum(found.lo[-1], np.concatenate(lower))
            found.hi[-1] = np.minimum(found.hi[-1], np.concatenate(upper))
    return found


def _slice(found: Intervals, start: int, stop: int) -> Intervals:
    rows = slice(start, stop)
    return Intervals([a[rows] for a in found.lo], [a[rows] for a in found.hi],
                     {i: t[rows] for i, t in found.terms.items()},
                     {i: tuple(x[rows] for x in v) for i, v in found.lines.items()})


def _walk(program: Program, found: Intervals, lam: np.ndarray, top: int) -> np.ndarray:
    """Lower bounds ``(B, m)`` of ``lam[:, r] . v_top`` (``v_top`` the input of step ``top``) over each box."""
    net = program.rounding
    batch, m = lam.shape[:2]
    const = np.zeros((batch, m))
    absolute = np.zeros((batch, m))  # sum of |terms| added to const
    slack = np.zeros((batch, m))
    terms_added = 0
    for i in range(top - 1, -1, -1):
        step = program.steps[i]
        lo, hi = found.lo[i], found.hi[i]
        if isinstance(step, AffineStep):
            const += lam @ step.bias
            absolute += np.abs(lam) @ np.abs(step.bias)
            slack += step.gamma * np.einsum("bmk,bk->bm", np.abs(lam), found.terms[i])
            lam = (lam.reshape(batch * m, -1) @ step.weight).reshape(batch, m, -1)  # one 2-D product: faster
            terms_added += step.bias.size
        elif isinstance(step, ActivationStep):
            alpha_l, beta_l, alpha_u, beta_u = program.lines(found, i)
            take_lower = lam >= 0
            alpha = np.where(take_lower, alpha_l[:, None, :], alpha_u[:, None, :])
            beta = np.where(take_lower, beta_l[:, None, :], beta_u[:, None, :])
            product = lam * beta
            const += product.sum(axis=2)
            absolute += np.abs(product).sum(axis=2)
            lam = lam * alpha
            slack += FLOAT64.u * np.einsum("bmk,bk->bm", np.abs(lam), magnitude(lo, hi))
            terms_added += lam.shape[2]
        else:
            term = magnitude(lo, hi) * np.abs(step.gain) + np.abs(step.offset)
            const += lam @ step.offset
            absolute += np.abs(lam) @ np.abs(step.offset)
            slack += (net.gamma(2) + FLOAT64.gamma(2)) * np.einsum("bmk,bk->bm", np.abs(lam), term)
            lam = lam * step.gain
            terms_added += step.offset.size
    centre, radius = centre_radius(found.lo[0], found.hi[0])
    value = np.einsum("bmk,bk->bm", lam, centre) - np.einsum("bmk,bk->bm", np.abs(lam), radius) + const
    n = program.n_in + 2
    slack += FLOAT64.gamma(n) * (np.einsum("bmk,bk->bm", np.abs(lam), np.abs(centre) + radius) + np.abs(const))
    slack += FLOAT64.gamma(terms_added + 2) * absolute
    return down(value - 2.0 * slack - 2.0 * (terms_added + n) * (FLOAT64.tiny + net.tiny))
