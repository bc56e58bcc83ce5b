"""Fingerprints, the activation registry, and model-file round trips."""

from __future__ import annotations

import hashlib
import json
import struct

import numpy as np
import pytest

import tinyprop as tp
from tinyprop.io import ModelFileError, fingerprint
from tinyprop.registry import activation_class, register_activation, registered_activations


def hand_set_network(dtype=np.float64) -> tp.Network:
    """A small network with weights written out by hand (synthetic), so no random draw is involved."""
    first = tp.Affine(2, 2)
    first.weight = np.array([[0.5, -1.0], [2.0, 0.25]])
    first.bias = np.array([0.125, -0.75])
    second = tp.Affine(2, 1, bias=False)
    second.weight = np.array([[1.5, -0.5]])
    layers = [tp.Standardize([1.0, 2.0], [4.0, 0.5]), first, tp.LeakyReLU(0.25), second, tp.Unstandardize([3.0], [2.0])]
    return tp.Network(layers, dtype=dtype, init=None)


# ---------------------------------------------------------------- fingerprint
def independent_fingerprint(net: tp.Network) -> str:
    """The fingerprint recomputed from the specification in docs/model-file.md, with hashlib,
    struct and json only (no tinyprop helper), for the layer kinds of ``hand_set_network``."""

    def raw(a: np.ndarray) -> bytes:
        fmt = "<" + ("d" if a.dtype == np.float64 else "f") * a.size
        return struct.pack(fmt, *a.ravel(order="C").tolist())

    layers, arrays = [], []
    for i, layer in enumerate(net.layers):
        if isinstance(layer, tp.Affine):
            layers.append({"kind": "affine", "n_in": layer.n_in, "n_out": layer.n_out, "bias": layer.bias is not None})
            arrays += [(f"layer{i}.weight", layer.weight)] + ([(f"layer{i}.bias", layer.bias)] if layer.bias is not None else [])
        elif isinstance(layer, tp.LeakyReLU):
            bits = struct.pack(">d", layer.slope).hex()
            layers.append({"kind": "activation", "name": "LeakyReLU", "settings": {"slope": {"binary64": bits}}})
        else:
            kind = "standardize" if isinstance(layer, tp.Standardize) else "unstandardize"
            layers.append({"kind": kind, "width": layer.width})
            arrays += [(f"layer{i}.mean", layer.mean), (f"layer{i}.scale", layer.scale)]
    description = {
        "format": "tinyprop-fingerprint",
        "version": 1,
        "dtype": net.dtype.name,
        "layers": layers,
        "arrays": [
            {"name": n, "dtype": a.dtype.name, "shape": list(a.shape), "sha256": hashlib.sha256(raw(a)).hexdigest()}
            for n, a in arrays
        ],
    }
    text = json.dumps(description, sort_keys=True, separators=(",", ":"), ensure_ascii=True)
    return hashlib.sha256(text.encode("ascii")).hexdigest()


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_fingerprint_matches_the_documented_recipe(dtype):
    net = hand_set_network(dtype)
    assert fingerprint(net) == independent_fingerprint(net)


def test_fingerprint_is_pinned_for_a_hand_set_network():
    # Regression pin (computed by this implementation when the format was fixed):
    # a change here means files written earlier no longer verify.
    assert fingerprint(hand_set_network()) == "f9a46cf03ff4b6ebd29f25260f9fc2f7e834e85e01f691c93fc2387c21d77edb"


def test_fingerprint_is_stable_across_copies_and_independent_of_memory_layout():
    net = hand_set_network()
    other = net.copy()
    other.layers[1].weight = np.asfortranarray(other.layers[1].weight)
    assert fingerprint(net) == fingerprint(other) == fingerprint(net)


@pytest.mark.parametrize(
    "change",
    [
        "flip_lowest_weight_bit",
        "other_slope",
        "other_activation",
        "other_scaling_mean",
    ],
)
def test_fingerprint_changes_with_any_part_of_the_model(change):
    base = hand_set_network()
    net = base.copy()
    if change == "flip_lowest_weight_bit":
        net.layers[1].weight.view(np.uint64)[0, 0] ^= np.uint64(1)
    elif change == "other_slope":
        net.layers[2] = tp.LeakyReLU(0.5)
    elif change == "other_activation":
        net.layers[2] = tp.ReLU()
    else:
        net.layers[0] = tp.Standardize([1.0, 2.5], [4.0, 0.5])
    assert fingerprint(net) != fingerprint(base)


def test_fingerprint_separates_float32_from_float64_with_equal_values():
    # every hand-set value is exactly representable in float32, so only the dtype differs
    net64 = hand_set_network(np.float64)
    net32 = hand_set_network(np.float32)
    assert np.array_equal(net64.get_vector(), net32.get_vector())
    assert fingerprint(net64) != fingerprint(net32)


def test_fingerprint_refuses_an_unregistered_activation_and_says_how_to_register():
    class Unlisted(tp.Activation):
        def value(self, z):
            return z

        def derivative(self, z, a):
            return np.ones_like(z)

    net = tp.Network([tp.Affine(1, 1), Unlisted()], seed=0)
    with pytest.raises(ModelFileError, match=r"Unlisted.*not registered.*register_activation"):
        fingerprint(net)


def test_fingerprint_refuses_a_non_network():
    with pytest.raises(TypeError, match="expected a tinyprop Network, got list"):
        fingerprint([tp.Affine(1, 1)])


# ---------------------------------------------------------------- registry
class Cube(tp.Activation):
    """f(z) = z**3 (synthetic custom activation for the tests)."""

    def value(self, z):
        return z**3

    def derivative(self, z, a):
        return 3 * z**2


class ScaledTanh(tp.Activation):
    """f(z) = amplitude * tanh(z); a custom activation with a setting."""

    def __init__(self, amplitude: float = 1.0) -> None:
        self.amplitude = float(amplitude)

    def value(self, z):
        return self.amplitude * np.tanh(z)

    def derivative(self, z, a):
        return self.amplitude * (1.0 - np.tanh(z) ** 2)

    def settings(self):
        return {"amplitude": self.amplitude}


register_activation(Cube)
register_activation(ScaledTanh, "tests.ScaledTanh")


def test_builtins_are_registered_under_their_class_names():
    for cls in (tp.Sigmoid, tp.Tanh, tp.ReLU, tp.LeakyReLU, tp.Softplus, tp.Identity):
        assert activation_class(cls.__name__) is cls
    assert registered_activations()["Cube"] is Cube


def test_registering_the_same_pair_again_is_harmless():
    assert register_activation(Cube) is Cube
    assert register_activation(ScaledTanh, "tests.ScaledTanh") is ScaledTanh


def test_a_name_cannot_be_bound_to_a_second_class():
    class Tanh(tp.Activation):  # same name as the built-in
        pass

    with pytest.raises(ValueError, match=r"'Tanh' is already registered for tinyprop\.activations\.Tanh"):
        register_activation(Tanh)
    assert activation_class("Tanh") is tp.Tanh


def test_a_class_cannot_take_a_second_name():
    with pytest.raises(ValueError, match=r"already registered as 'Cube'"):
        register_activation(Cube, "Cubic")
    assert activation_class("Cubic") is None


@pytest.mark.parametrize("bad", [tp.Tanh(), int, tp.Activation, "Tanh"])
def test_only_activation_subclasses_can_be_registered(bad):
    with pytest.raises(TypeError, match="expects a subclass of tinyprop.Activation"):
        register_activation(bad)


@pytest.mark.parametrize("bad", ["", "9lives", "a b", "x" * 101, "naïve", 3])
def test_registered_names_are_plain_ascii(bad):
    class Fresh(tp.Activation):
        pass

    with pytest.raises(ValueError, match="an activation name must start with"):
        register_activation(Fresh, bad)
