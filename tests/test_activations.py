"""Built-in activations: closed-form derivatives against scipy's numerical derivative,
textbook identities, and numerical stability."""

from __future__ import annotations

import warnings
from types import SimpleNamespace

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import special

import tinyprop as tp
from net_strategies import BUILT_IN_ACTIVATIONS

IDS = [repr(a) for a in BUILT_IN_ACTIVATIONS]


@pytest.mark.parametrize("activation", BUILT_IN_ACTIVATIONS, ids=IDS)
def test_default_grid_check_passes(activation):
    report = tp.check_activation(activation)
    assert report.passed, str(report)
    assert report.max_error < 1e-8


@settings(max_examples=40, deadline=None)
@given(
    st.sampled_from(BUILT_IN_ACTIVATIONS),
    st.lists(st.floats(-60, 60, allow_nan=False).filter(lambda z: abs(z) > 1e-3 or z == 0.0), min_size=1, max_size=30),
)
def test_derivative_matches_scipy_on_generated_points(activation, points):
    # External reference: scipy.differentiate.derivative, via check_activation.
    report = tp.check_activation(activation, points=points)
    assert report.passed, str(report)


def test_sigmoid_identity_and_known_values():
    # Common practice: sigma'(z) = sigma(z)(1 - sigma(z)), sigma'(0) = 1/4, tanh'(0) = 1.
    z = np.linspace(-20, 20, 401)
    s = tp.Sigmoid()
    a = s.value(z)
    direct = np.exp(-z) / (1.0 + np.exp(-z)) ** 2  # a different formula for the same derivative
    np.testing.assert_allclose(s.derivative(z, a), a * (1 - a), rtol=1e-15)
    # a (1 - a) loses relative (not absolute) accuracy where 1 - a is tiny: compare absolutely
    np.testing.assert_allclose(s.derivative(z, a), direct, rtol=1e-9, atol=np.finfo(float).eps)
    np.testing.assert_allclose(a, special.expit(z), rtol=1e-15)  # scipy.special.expit as reference
    zero = np.zeros(1)
    assert s.derivative(zero, s.value(zero))[0] == 0.25
    assert tp.Tanh().derivative(zero, tp.Tanh().value(zero))[0] == 1.0


def test_softplus_matches_log1p_exp_and_its_derivative_is_the_sigmoid():
    z = np.linspace(-30, 30, 301)
    sp = tp.Softplus()
    np.testing.assert_allclose(sp.value(z), np.logaddexp(0.0, z), rtol=1e-14)
    np.testing.assert_allclose(sp.derivative(z, sp.value(z)), special.expit(z), rtol=1e-14)


def test_kink_conventions():
    zero = np.zeros(3)
    assert np.all(tp.ReLU().derivative(zero, tp.ReLU().value(zero)) == 0.0)
    leaky = tp.LeakyReLU(0.2)
    assert np.all(leaky.derivative(zero, leaky.value(zero)) == 0.2)


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("activation", BUILT_IN_ACTIVATIONS, ids=IDS)
def test_stable_for_large_inputs(activation, dtype):
    z = np.array([-1e4, -1e3, -100.0, -30.0, 0.0, 30.0, 100.0, 1e3, 1e4], dtype=dtype)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        with np.errstate(over="raise", invalid="raise", divide="raise"):
            a = activation.value(z)
            d = activation.derivative(z, a)
    assert a.dtype == dtype and d.dtype == dtype
    assert np.all(np.isfinite(a)) and np.all(np.isfinite(d))


def test_sigmoid_limits_for_large_negative_and_positive_inputs():
    for dtype in (np.float32, np.float64):
        a = tp.Sigmoid().value(np.array([-1e4, 1e4], dtype=dtype))
        assert a[0] == 0.0 and a[1] == 1.0


def test_activations_do_not_modify_their_input():
    z = np.linspace(-3, 3, 13)
    before = z.copy()
    for act in BUILT_IN_ACTIVATIONS:
        act.derivative(z, act.value(z))
    np.testing.assert_array_equal(z, before)


def test_leaky_relu_rejects_bad_slope():
    with pytest.raises(ValueError, match="slope"):
        tp.LeakyReLU(float("nan"))
    with pytest.raises(ValueError, match="slope"):
        tp.LeakyReLU(-1.0)


# ----------------------------------------------------------------------------- one list, every declaration
_EXPORT_DECLARATIONS = ("_c_statements", "_python_statements", "_rounding")


def _missing_declarations(activation: tp.Activation) -> list[str]:
    """What a built-in must declare on its class (DEVELOPERS.md, "Adding an activation") and does not."""
    from tinyprop.activations import declaration
    from tinyprop.init import SCHEMES

    missing = [] if activation.declared_shape() is not None else ["declared_shape"]
    arguments = {"_c_statements": [("float", repr), ("double", repr)], "_python_statements": [()],
                 "_rounding": [(4.0,)]}
    for method in _EXPORT_DECLARATIONS:
        declared = declaration(activation, method)
        if declared is None or any(declared(*args) is None for args in arguments[method]):
            missing.append(method)
    if declaration(activation, "_fixed_point_form") is None:  # a decision by the class, even "not supported"
        missing.append("_fixed_point_form")
    if activation.suggested_init not in SCHEMES:  # build_mlp(init="auto")
        missing.append("suggested_init")
    z = np.linspace(-3.0, 3.0, 13)  # the uncertainty hint lists the positively homogeneous ones
    if activation.positively_homogeneous != np.allclose(activation.value(2.5 * z), 2.5 * activation.value(z)):
        missing.append("positively_homogeneous")
    return missing


def test_every_built_in_activation_declares_every_fact():
    """Adding a class to BUILT_IN_ACTIVATIONS without one of its declarations fails here."""
    from tinyprop.activations import BUILT_IN_ACTIVATIONS as CLASSES
    from tinyprop.export import _activations, bound
    from tinyprop.export._fixed_program import _check_activations
    from tinyprop.export._plan import ActivationStep
    from tinyprop.recipes import ACTIVATIONS
    from tinyprop.registry import activation_name

    assert set(CLASSES) == {type(a) for a in BUILT_IN_ACTIVATIONS}
    assert set(tp.__all__) >= {cls.__name__ for cls in CLASSES}
    assert set(ACTIVATIONS.values()) == set(CLASSES) - {tp.Identity}  # the command line offers all but Identity
    fixed_point_unsupported = {tp.Softplus}  # no integer form yet (DEVELOPERS.md, "Adding an activation")
    for activation in BUILT_IN_ACTIVATIONS:
        cls = type(activation)
        assert _missing_declarations(activation) == [], cls.__name__
        assert activation_name(activation) == cls.__name__  # model files
        if cls is tp.Identity:  # generated code: no code at all for Identity,
            assert _activations.activation_kind(activation) is None
        else:  # a built-in form for the others, never the custom protocol
            for ctype in ("float", "double"):
                _activations.c_body(activation, ctype, repr)
            _activations.python_body(activation)
        step = ActivationStep(0, activation, 3)
        lipschitz, units = bound._activation_constants(step, 4.0)  # agreement_bound
        assert lipschitz > 0 and units >= 0
        plan = SimpleNamespace(steps=[step])  # the fixed-point export
        if cls in fixed_point_unsupported:
            with pytest.raises(TypeError, match=f"{cls.__name__}, which the fixed-point export does not support"):
                _check_activations(plan)
        else:
            _check_activations(plan)


class _Softsign(tp.Activation):
    """``z / (1 + |z|)``, declaring nothing but its value and derivative (synthetic, for the checks below)."""

    def value(self, z):
        return z / (1.0 + np.abs(z))

    def derivative(self, z, a):
        return 1.0 / (1.0 + np.abs(z)) ** 2


class _ScaledTanh(tp.Tanh):
    """``tanh(2 z)``: a subclass, which must not inherit Tanh's forms (synthetic)."""

    def value(self, z):
        return np.tanh(2.0 * z)

    def derivative(self, z, a):
        return 2.0 * (1.0 - a * a)


def test_declaration_check_names_what_a_class_lacks():
    """The check above can fail: a class with value and derivative alone lacks every declaration."""
    assert _missing_declarations(_Softsign()) == ["declared_shape", *_EXPORT_DECLARATIONS, "_fixed_point_form"]
    assert "_c_statements" in _missing_declarations(_ScaledTanh())


@pytest.mark.parametrize(
    ("activation", "scheme"),
    [(tp.ReLU(), "he"), (tp.LeakyReLU(0.1), "he"), (tp.Tanh(), "glorot"), (tp.Softplus(), "glorot"),
     (_Softsign(), "glorot")],
)
def test_build_mlp_auto_init_is_the_one_the_activation_suggests(activation, scheme):
    auto = tp.build_mlp([3, 5, 1], activation=activation, seed=0)
    named = tp.build_mlp([3, 5, 1], activation=activation, init=scheme, seed=0)
    np.testing.assert_array_equal(auto.get_vector(), named.get_vector())


@pytest.mark.parametrize("activation", [_Softsign(), _ScaledTanh()], ids=["undeclared", "subclass"])
def test_undeclared_activation_is_refused_by_every_exporter(activation, tmp_path):
    """Without its own declarations an activation keeps the custom behaviour: clear refusals."""
    net = tp.Network([tp.Affine(2, 2), activation, tp.Affine(2, 1)], seed=0)
    X = np.zeros((3, 2))
    name = type(activation).__name__
    with pytest.raises(TypeError, match=f"cannot write the activation {name} in C"):
        tp.export_c(net, tmp_path)
    with pytest.raises(TypeError, match=f"cannot write the activation {name} in Python"):
        tp.export_python(net, tmp_path)
    with pytest.raises(TypeError, match=f"{name}, whose Lipschitz constant and rounding are unknown"):
        tp.agreement_bound(net, X)
    with pytest.raises(TypeError, match=f"{name}, which the fixed-point export does not support"):
        tp.export_c_fixed_point(net, tmp_path, X)
