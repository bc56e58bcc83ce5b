"""Lower bounds on ``c . output`` over boxes by a backward linear relaxation.

The method of Zhang et al. 2018 (NeurIPS, "Efficient neural network robustness
certification with general activation functions"), with the intermediate
intervals taken from interval propagation (as in Zhang et al. 2020, "Towards
stable and efficient training of verifiably robust neural networks"):
starting from ``lambda = c`` at the output, walk back through the steps,
keeping ``c . output >= lambda . v + const`` for the input ``v`` of the
current step:

- affine ``z = W x + b``: ``lambda . z = (lambda W) . x + lambda . b``;
- scaling ``y = x * gain + offset``: ``lambda . y = (lambda * gain) . x + lambda . offset``;
- activation ``a = f(z)``: each unit with ``lambda_i >= 0`` takes its lower
  line, each with ``lambda_i < 0`` its upper line (``_rules.ActivationRules.lines``).

At the input, ``lambda . x >= lambda . centre - |lambda| . radius`` over the box.

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


def linear_lower_bound(program: Program, found: Intervals, objective: np.ndarray) -> np.ndarray:
    """Sound lower bound of ``objective . output`` over each box of ``found`` (``(B,)``)."""
    net = program.rounding
    batch = found.lo[0].shape[0]
    lam = np.broadcast_to(np.asarray(objective, np.float64), (batch, program.n_out)).copy()
    const = np.zeros(batch)
    absolute = np.zeros(batch)  # sum of |terms| added to const
    slack = np.zeros(batch)
    terms_added = 0
    for i in range(len(program.steps) - 1, -1, -1):
        step = program.steps[i]
        lo, hi = found.lo[i], found.hi[i]
        if isinstance(step, AffineStep):
            const += lam @ step.bias
            absolute += np.abs(lam) @ np.abs(step.bias)
            slack += step.gamma * np.einsum("bk,bk->b", np.abs(lam), found.terms[i])
            lam = lam @ step.weight
            terms_added += step.bias.size
        elif isinstance(step, ActivationStep):
            alpha_l, beta_l, alpha_u, beta_u = step.rules.lines(lo, hi)
            take_lower = lam >= 0
            alpha = np.where(take_lower, alpha_l, alpha_u)
            beta = np.where(take_lower, beta_l, beta_u)
            product = lam * beta
            const += product.sum(axis=1)
            absolute += np.abs(product).sum(axis=1)
            lam = lam * alpha
            slack += FLOAT64.u * np.einsum("bk,bk->b", np.abs(lam), magnitude(lo, hi))
            terms_added += lam.shape[1]
        else:
            term = magnitude(lo, hi) * np.abs(step.gain) + np.abs(step.offset)
            const += lam @ step.offset
            absolute += np.abs(lam) @ np.abs(step.offset)
            slack += (net.gamma(2) + FLOAT64.gamma(2)) * np.einsum("bk,bk->b", np.abs(lam), term)
            lam = lam * step.gain
            terms_added += step.offset.size
    centre, radius = centre_radius(found.lo[0], found.hi[0])
    value = np.einsum("bk,bk->b", lam, centre) - np.einsum("bk,bk->b", np.abs(lam), radius) + const
    n = program.n_in + 2
    slack += FLOAT64.gamma(n) * (np.einsum("bk,bk->b", np.abs(lam), np.abs(centre) + radius) + np.abs(const))
    slack += FLOAT64.gamma(terms_added + 2) * absolute
    return down(value - 2.0 * slack - 2.0 * (terms_added + n) * (FLOAT64.tiny + net.tiny))
