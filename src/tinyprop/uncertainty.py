"""How far to trust a network fitted by least squares.

Classical nonlinear-regression statistics (Bates & Watts (1988), "Nonlinear
Regression Analysis and Its Applications", Wiley; Seber & Wild (1989),
"Nonlinear Regression", Wiley) applied to all parameters ``theta`` of a
network, with the Jacobian ``J = d output / d theta`` from backpropagation
(:meth:`~tinyprop.network.Network.jacobian`, one row per sample and output).

Parameter covariance, at a least-squares solution with residuals ``r``
(``N = n * n_out`` residuals, ``p`` parameters)::

    s^2 = RSS / (N - p),   RSS = r^T r
    C   = s^2 (J^T J)^-1

``(J^T J)^-1`` is never formed by inverting ``J^T J``. The columns of ``J``
are first scaled to unit length, ``J = A D`` with ``D = diag(||J_j||)``, and
the singular value decomposition ``A = U diag(sigma) V^T`` gives::

    C = s^2 D^-1 V diag(1 / sigma^2) V^T D^-1

Standard errors are ``sqrt(C_jj)``, correlations ``C_ij / sqrt(C_ii C_jj)``.
The column scaling makes the verdict below independent of the units of the
parameters (multiplying a parameter by a constant changes nothing in the
statistics, so it must not change the verdict) and improves the accuracy of
the small singular values (van der Sluis (1969), Numer. Math. 14).

Rank deficiency: ``A`` is numerically rank-deficient when a singular value
``sigma_i <= max(N, p) * eps * sigma_max`` (``eps`` of float64). Then some
combination of parameters has no measurable effect on the outputs, ``C``
does not exist, and :func:`parameter_uncertainty` raises
:class:`RankDeficientError` naming the condition number
``sigma_max / sigma_min``, the numerical rank and the parameters involved,
instead of returning meaningless numbers. A full-rank but ill-conditioned fit
is returned with its ``condition_number``: read the standard errors in the
light of it.

Prediction intervals by the delta method, for a new input ``x0`` and output
``k``, with ``g = d f_k(x0) / d theta`` (a row of ``net.jacobian(x0)``) and
``t = t_{1 - alpha/2, N - p}`` (Student's t quantile, ``scipy.stats.t.ppf``);
the linear-approximation formulas of Bates & Watts (1988), chapter 2
("Nonlinear Regression: Iterative Estimation and Linear Approximations"), and
of Seber & Wild (1989)::

    standard error of the fitted mean   se_mean = sqrt(g^T C g)
    confidence interval of the mean     f_k(x0) +- t * se_mean
    prediction interval (new y)         f_k(x0) +- t * sqrt(s^2 + g^T C g)

Several outputs share one error variance ``s^2``: :func:`~tinyprop.solve.solve`
minimises the unweighted sum of squares over all outputs, which is the
maximum-likelihood fit only when every output has the same noise level. Scale
the targets so that this holds (or fit one network per output).

A regularised fit (``solve(..., regularization="evidence")`` or a fixed
penalty) is not a plain least-squares solution: for its result,
:func:`parameter_uncertainty` returns the Gaussian posterior of
:mod:`tinyprop.posterior` instead (covariance ``H^-1``,
``H = sum_k beta_k J_k^T J_k + alpha I``, one noise level per target), whose
intervals have the same form.

These results assume that the model is locally linear in ``theta`` near the
solution, that the model form is right, and that the errors are independent,
Gaussian, with constant variance; see ``docs/uncertainty.md``.

:func:`uncertainty_report` adds the input sensitivities of
:mod:`tinyprop.sensitivity` to these statistics.

All statistics are computed in float64 on a float64 copy of the network.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np

from ._json import finite_or_none
from ._validate import as_samples, as_targets, real_in_range, require_finite
from .activations import Activation
from .intervals import PredictionIntervals
from .layers import Affine
from .network import Network
from .sensitivity import input_sensitivity
from .solve import SolveResult

if TYPE_CHECKING:
    from .posterior import PosteriorUncertainty

__all__ = [
    "ParameterUncertainty",
    "PredictionIntervals",
    "RankDeficientError",
    "parameter_labels",
    "parameter_uncertainty",
    "uncertainty_report",
]

_EPS = float(np.finfo(np.float64).eps)
_MAX_NAMED = 6  # parameters named per unidentifiable direction in the error message
_MAX_GROUPS = 3  # unidentifiable directions listed in the error message


class RankDeficientError(ValueError):
    """The Jacobian is numerically rank-deficient; the covariance does not exist.

    ``condition_number`` is ``sigma_max / sigma_min`` of the column-scaled
    Jacobian (``inf`` when a singular value is exactly zero), ``rank`` the
    numerical rank, ``n_params`` the number of parameters, ``singular_values``
    all singular values (descending) and ``unidentifiable`` the parameters
    that can move together without changing the outputs: one tuple of labels
    per numerically null right singular vector (its components of at least 10%
    of the largest, at most six; identical tuples listed once).
    """

    def __init__(
        self,
        message: str,
        *,
        condition_number: float,
        rank: int,
        n_params: int,
        singular_values: np.ndarray,
        unidentifiable: tuple[tuple[str, ...], ...],
    ) -> None:
        super().__init__(message)
        self.condition_number = condition_number
        self.rank = rank
        self.n_params = n_params
        self.singular_values = singular_values
        self.unidentifiable = unidentifiable

    def to_dict(self) -> dict[str, Any]:
        """JSON-able summary; an infinite condition number is written as ``None``."""
        return {
            "rank_deficient": True,
            "message": str(self),
            "condition_number": finite_or_none(self.condition_number),
            "rank": self.rank,
            "n_params": self.n_params,
            "unidentifiable": [list(group) for group in self.unidentifiable],
        }


@dataclass(frozen=True, kw_only=True, eq=False)
class ParameterUncertainty:
    """What :func:`parameter_uncertainty` returns (formulas in the module docstring).

    ``theta``: the float64 parameters (order of ``net.get_vector()``);
    ``labels``: one label per parameter (:func:`parameter_labels`).
    ``standard_errors``: ``sqrt(diag C)``; ``covariance``: ``C``;
    ``correlation``: ``C`` scaled to unit diagonal.
    ``residual_sd``: ``s``; ``residual_variance``: ``s^2``; ``rss``: ``r^T r``.
    ``n_residuals``: ``N = n * n_out``; ``n_params``: ``p``;
    ``degrees_of_freedom``: ``N - p``.
    ``singular_values`` (descending) and ``right_singular_vectors`` (``V``,
    columns) of the column-scaled Jacobian ``A = J D^-1``; ``column_norms``:
    the diagonal of ``D``. ``condition_number``: ``sigma_max / sigma_min`` of
    ``A``. ``gradient_cosine``: ``max_j |J_j^T r| / (||J_j|| ||r||)``, 0 at an
    exact least-squares solution (MINPACK's ``gtol`` measure); a value far
    from 0 means the network was not fitted to a least-squares minimum and the
    formulas do not apply. ``network``: a float64 copy of the network at
    ``theta``, used by :meth:`prediction_intervals`.
    """

    theta: np.ndarray = field(repr=False)
    labels: tuple[str, ...] = field(repr=False)
    standard_errors: np.ndarray = field(repr=False)
    covariance: np.ndarray = field(repr=False)
    correlation: np.ndarray = field(repr=False)
    residual_sd: float
    residual_variance: float
    rss: float
    n_residuals: int
    n_params: int
    degrees_of_freedom: int
    singular_values: np.ndarray = field(repr=False)
    right_singular_vectors: np.ndarray = field(repr=False)
    column_norms: np.ndarray = field(repr=False)
    condition_number: float
    gradient_cosine: float
    network: Network = field(repr=False)

    def prediction_intervals(self, X: Any, *, level: float = 0.95) -> PredictionIntervals:
        """Delta-method confidence and prediction intervals at new inputs ``X`` ``(m, n_in)``.

        ``level`` is the confidence level, in (0, 1). ``g^T C g`` is evaluated
        as ``s^2 ||diag(1/sigma) V^T D^-1 g||^2``, which is never negative.
        """
        from scipy import stats  # imported on first use: scipy.stats is slow to import and only this needs it

        level = real_in_range(level, "level", low=0.0, high=1.0, low_open=True, high_open=True)
        X64 = as_samples(X, "X", self.network.n_in, self.network.dtype)
        out = self.network.predict(X64)
        G = self.network.jacobian(X64)
        B = (G / self.column_norms) @ self.right_singular_vectors / self.singular_values
        mean_variance = self.residual_variance * np.einsum("ij,ij->i", B, B).reshape(out.shape)
        t = float(stats.t.ppf(0.5 + level / 2, self.degrees_of_freedom))
        return PredictionIntervals.from_variances(
            level, t, self.degrees_of_freedom, out, mean_variance, self.residual_variance
        )

    def to_dict(self) -> dict[str, Any]:
        """JSON-able summary: scalars, and per parameter its value and standard error."""
        return {
            "rank_deficient": False,
            "residual_sd": self.residual_sd,
            "rss": self.rss,
            "n_residuals": self.n_residuals,
            "n_params": self.n_params,
            "degrees_of_freedom": self.degrees_of_freedom,
            "condition_number": self.condition_number,
            "gradient_cosine": self.gradient_cosine,
            "max_abs_correlation": _max_off_diagonal(self.correlation),
            "parameters": [
                {"label": label, "value": float(value), "standard_error": float(se)}
                for label, value, se in zip(self.labels, self.theta, self.standard_errors)
            ],
        }


def parameter_labels(net: Network) -> tuple[str, ...]:
    """One label per parameter, in the order of ``net.get_vector()``.

    ``"layer i weight[k, j]"`` or ``"layer i bias[k]"``, with ``i`` the
    position of the :class:`~tinyprop.layers.Affine` layer in ``net.layers``.

    >>> import tinyprop as tp
    >>> tp.parameter_labels(tp.Network([tp.Affine(2, 1), tp.Tanh()], seed=0))
    ('layer 0 weight[0, 0]', 'layer 0 weight[0, 1]', 'layer 0 bias[0]')
    """
    labels: list[str] = []
    for index, layer in enumerate(net.layers):
        if not isinstance(layer, Affine):
            continue
        labels += [f"layer {index} weight[{k}, {j}]" for k in range(layer.n_out) for j in range(layer.n_in)]
        if layer.bias is not None:
            labels += [f"layer {index} bias[{k}]" for k in range(layer.n_out)]
    return tuple(labels)


def parameter_uncertainty(
    net: Network, X: Any = None, y: Any = None, *, result: SolveResult | None = None
) -> ParameterUncertainty | PosteriorUncertainty:
    """Parameter covariance and standard errors of a least-squares fitted network.

    Give either ``X`` and ``y`` (the data the network was fitted to; the
    Jacobian and residuals are computed at the network's current parameters)
    or ``result``, the :class:`~tinyprop.solve.SolveResult` of
    ``solve(net, X, y)`` (its float64 ``theta``, residuals and Jacobian are
    used; ``net`` must be the network ``solve`` fitted, unchanged since).
    ``net`` is not modified. For the result of a regularised fit the answer is
    the posterior of :mod:`tinyprop.posterior`
    (:class:`~tinyprop.posterior.PosteriorUncertainty`: covariance ``H^-1``,
    per-target noise levels, intervals from the normal quantile).

    Raises :class:`RankDeficientError` (a ``ValueError``) when the Jacobian
    is numerically rank-deficient, and ``ValueError`` when there are no
    degrees of freedom left (``N <= p``).

    >>> import numpy as np, tinyprop as tp
    >>> x = np.array([[0.0], [1.0], [2.0], [3.0]])
    >>> y = np.array([0.1, 0.9, 2.1, 2.9])           # synthetic
    >>> net = tp.Network([tp.Affine(1, 1)], init=None)
    >>> net.layers[0].weight[:], net.layers[0].bias[:] = 0.96, 0.06  # least-squares line
    >>> u = tp.parameter_uncertainty(net, x, y)
    >>> u.degrees_of_freedom, round(u.residual_sd, 6), np.round(u.standard_errors, 6).tolist()
    (2, 0.126491, [0.056569, 0.10583])

    (Straight line: ``s / sqrt(Sxx) = s / sqrt(5)`` for the slope and
    ``s * sqrt(1/4 + 1.5**2 / 5)`` for the intercept, the textbook values.)
    """
    if not isinstance(net, Network):
        raise TypeError(f"net must be a tinyprop Network, got {type(net).__name__}")
    if result is None:
        if X is None or y is None:
            raise TypeError("give the fitted data X and y, or result=<the SolveResult of solve(net, X, y)>")
        work = net.copy(np.float64)
        X64 = as_samples(X, "X", net.n_in, work.dtype)
        y64 = as_targets(y, "y", X64.shape[0], net.n_out, work.dtype)
        residuals = (work.predict(X64) - y64).ravel()
        jacobian = work.jacobian(X64)
    else:
        if X is not None or y is not None:
            raise TypeError("give either X and y or result, not both")
        work = _network_at_solution(net, result)
        if getattr(result, "regularization", None) is not None:
            from .posterior import posterior_uncertainty

            return posterior_uncertainty(work, result, parameter_labels(work))
        if result.jacobian is None:
            raise ValueError(
                f"result of method {result.method!r} keeps no Jacobian; give the fitted data instead: "
                "parameter_uncertainty(net, X, y)"
            )
        residuals = np.asarray(result.residuals, dtype=np.float64)
        jacobian = np.asarray(result.jacobian, dtype=np.float64)
    require_finite(residuals, "the residual vector (network output - y)")
    require_finite(jacobian, "the Jacobian at the network's parameters")
    return _from_jacobian(work, jacobian, residuals)


def _network_at_solution(net: Network, result: Any) -> Network:
    """A float64 copy of ``net`` at ``result.theta``, after checking they belong together."""
    try:
        theta = np.asarray(result.theta, dtype=np.float64)
        kept = result.jacobian if result.jacobian is not None else result.normal_matrices
        shapes = (np.shape(result.residuals), np.shape(kept))
    except AttributeError:
        raise TypeError(
            f"result must be the SolveResult of solve(net, X, y), got {type(result).__name__}"
        ) from None
    if theta.shape != (net.n_params,) or shapes[1][-1] != net.n_params:
        raise ValueError(
            f"result does not belong to this network: it has {theta.size} parameters and a Jacobian "
            f"(or normal matrices) of shape {shapes[1]}, the network has {net.n_params} parameters"
        )
    if not np.array_equal(net.get_vector(), theta.astype(net.dtype)):
        raise ValueError(
            "the network's parameters differ from result.theta; pass the network that solve fitted, unchanged since"
        )
    work = net.copy(np.float64)
    work.set_vector(theta)
    return work


def _from_jacobian(work: Network, jacobian: np.ndarray, residuals: np.ndarray) -> ParameterUncertainty:
    n_residuals, n_params = jacobian.shape
    dof = n_residuals - n_params
    if dof < 1:
        raise ValueError(
            f"no degrees of freedom for the residual variance: {n_residuals} residuals (samples x outputs) "
            f"for {n_params} parameters; at least {n_params + 1} residuals are needed"
        )
    norms = np.linalg.norm(jacobian, axis=0)
    inert = norms == 0  # parameters without any effect on the data
    norms = np.where(inert, 1.0, norms)
    _, sigma, Vt = np.linalg.svd(jacobian / norms, full_matrices=False)
    V = Vt.T
    labels = parameter_labels(work)
    _require_full_rank(work, sigma, V, inert, labels, n_residuals)
    rss = float(residuals @ residuals)
    s2 = rss / dof
    scaled = V / sigma / norms[:, None]  # D^-1 V diag(1/sigma): C = s^2 * scaled @ scaled.T
    unscaled = scaled @ scaled.T  # (J^T J)^-1
    diagonal = np.einsum("ij,ij->i", scaled, scaled)
    root = np.sqrt(diagonal)
    correlation = unscaled / root[:, None] / root[None, :]
    np.fill_diagonal(correlation, 1.0)
    return ParameterUncertainty(
        theta=work.get_vector(),
        labels=labels,
        standard_errors=np.sqrt(s2 * diagonal),
        covariance=s2 * unscaled,
        correlation=correlation,
        residual_sd=math.sqrt(s2),
        residual_variance=s2,
        rss=rss,
        n_residuals=n_residuals,
        n_params=n_params,
        degrees_of_freedom=dof,
        singular_values=sigma,
        right_singular_vectors=V,
        column_norms=norms,
        condition_number=float(sigma[0] / sigma[-1]),
        gradient_cosine=_gradient_cosine(jacobian, residuals, norms),
        network=work,
    )


def _require_full_rank(
    work: Network, sigma: np.ndarray, V: np.ndarray, inert: np.ndarray, labels: tuple[str, ...], n_residuals: int
) -> None:
    """Raise :class:`RankDeficientError` unless every ``sigma_i > max(N, p) eps sigma_max``."""
    n_params = sigma.size
    small = sigma <= max(n_residuals, n_params) * _EPS * sigma[0]
    if not (small.any() or inert.any()):
        return
    rank = int(np.count_nonzero(~small))
    # an exactly zero column makes the condition number infinite; its computed singular value need not be 0
    condition = math.inf if inert.any() or sigma[-1] == 0 else float(sigma[0] / sigma[-1])
    groups = tuple(dict.fromkeys(_involved(V[:, i], labels) for i in np.flatnonzero(small)))
    listed = "; ".join(f"{{{', '.join(group)}}}" for group in groups[:_MAX_GROUPS])
    if len(groups) > _MAX_GROUPS:
        listed += f"; and {len(groups) - _MAX_GROUPS} more (see the error's .unidentifiable)"
    raise RankDeficientError(
        f"the Jacobian is rank-deficient: numerical rank {rank} of {n_params} parameters, condition number "
        f"{condition:.3g} (column-scaled; rank-deficient above 1/(max(N, p) eps) = "
        f"{1 / (max(n_residuals, n_params) * _EPS):.3g}). "
        f"These parameters can change together without changing any output: {listed}. "
        "Their covariance does not exist and no standard errors or intervals are given; remove the redundant "
        "parameters (for example a duplicated hidden unit, or one that is saturated or inactive on all the data) "
        f"or add data that separates them{_rescaling_hint(work)}",
        condition_number=condition,
        rank=rank,
        n_params=n_params,
        singular_values=sigma,
        unidentifiable=groups,
    )


def _rescaling_hint(work: Network) -> str:
    """A note when hidden units are (piecewise) linear, which makes J rank-deficient by construction.

    For ``a = f(z)`` with ``f(c z) = c f(z)`` for ``c > 0`` (the activations that
    declare ``positively_homogeneous``: ReLU, LeakyReLU, Identity), multiplying
    a hidden unit's incoming weights and bias by ``c``
    and its outgoing weights by ``1/c`` leaves the network unchanged, so every
    such unit adds a null direction to ``J`` (Euler's theorem on homogeneous
    functions; Identity units, being linear, add more).
    """
    last_affine = max(i for i, layer in enumerate(work.layers) if isinstance(layer, Affine))
    hidden = {type(layer).__name__ for layer in work.layers[:last_affine]
              if isinstance(layer, Activation) and layer.positively_homogeneous}
    if not hidden:
        return ""
    return (
        f". Note: this network has {', '.join(sorted(hidden))} hidden units; scaling such a unit's incoming "
        "weights and bias by c > 0 and its outgoing weights by 1/c leaves the network unchanged, so each one "
        "adds at least one null direction. Use a smooth activation (Tanh, Sigmoid, Softplus) when the "
        "uncertainty must be stated"
    )


def _involved(direction: np.ndarray, labels: tuple[str, ...]) -> tuple[str, ...]:
    """Labels of the largest components (at least 10% of the largest) of a null direction."""
    size = np.abs(direction)
    order = np.argsort(-size, kind="stable")
    keep = [i for i in order[:_MAX_NAMED] if size[i] >= 0.1 * size[order[0]]]
    return tuple(labels[i] for i in sorted(keep))


def _gradient_cosine(jacobian: np.ndarray, residuals: np.ndarray, norms: np.ndarray) -> float:
    r_norm = float(np.linalg.norm(residuals))
    if r_norm == 0.0:
        return 0.0
    return float(np.max(np.abs(jacobian.T @ residuals) / norms) / r_norm)


# --------------------------------------------------------------------------- report
def uncertainty_report(
    net: Network,
    X: Any,
    y: Any,
    *,
    level: float = 0.95,
    input_names: Sequence[str] | None = None,
    output_names: Sequence[str] | None = None,
    result: SolveResult | None = None,
) -> dict[str, Any]:
    """Everything above for a fitted network, as a JSON-able dict (for reports and the command line).

    ``X``, ``y``: the fitted data. ``result``: the fit's
    :class:`~tinyprop.solve.SolveResult`, needed for a regularised fit (its
    posterior is reported, per target) and optional otherwise.

    Keys: ``"parameters"`` (:meth:`ParameterUncertainty.to_dict`, or
    :meth:`RankDeficientError.to_dict` when the Jacobian is rank-deficient,
    with ``"rank_deficient"`` telling which); ``"prediction_interval"``
    (``None`` when rank-deficient, else the level and, per output, the mean
    and largest prediction-interval half-width over the rows of ``X``);
    ``"input_sensitivity"`` (:meth:`SensitivityTable.to_dict`). Only finite
    floats, ints, strings, lists, dicts and ``None`` appear.
    """
    table = input_sensitivity(net, X, input_names=input_names, output_names=output_names)
    try:
        regularised = result is not None and result.regularization is not None
        uncertainty = parameter_uncertainty(net, result=result) if regularised else parameter_uncertainty(net, X, y)
    except RankDeficientError as exc:
        return {"parameters": exc.to_dict(), "prediction_interval": None, "input_sensitivity": table.to_dict()}
    intervals = uncertainty.prediction_intervals(X, level=level)
    half = intervals.half_width
    return {
        "parameters": uncertainty.to_dict(),
        "prediction_interval": {
            "level": intervals.level,
            "t_quantile": intervals.t_quantile,
            "half_width_on_data": {
                output: {"mean": float(half[:, k].mean()), "max": float(half[:, k].max())}
                for k, output in enumerate(table.output_names)
            },
        },
        "input_sensitivity": table.to_dict(),
    }


def _max_off_diagonal(correlation: np.ndarray) -> float | None:
    """Largest ``|correlation|`` between two different parameters (``None`` for one parameter)."""
    if correlation.shape[0] < 2:
        return None
    off = np.abs(correlation[~np.eye(correlation.shape[0], dtype=bool)])
    return float(off.max())
