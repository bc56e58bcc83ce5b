"""Model files and fingerprints.

``fingerprint(net)`` is a SHA-256 hex digest over a canonical description of
the network: its dtype, its layers (kind and settings, activations by their
registered name) and, for every array (affine weights and biases, scaling
means and scales), its name, dtype, shape and the SHA-256 of its raw bytes
(little-endian, C order). It does not depend on how or where the network is
stored, and ``docs/model-file.md`` specifies the bytes exactly so that another
language can recompute it.
"""

from __future__ import annotations

import hashlib
import json
import math
import re
import struct
from typing import Any

import numpy as np

from .activations import Activation
from .layers import Affine, Standardize, Unstandardize
from .network import Network
from .registry import activation_name

__all__ = ["ModelFileError", "fingerprint"]

FINGERPRINT_FORMAT = "tinyprop-fingerprint"
FINGERPRINT_VERSION = 1

_SCALING_KINDS: dict[type, str] = {Standardize: "standardize", Unstandardize: "unstandardize"}
_SCALING_DTYPE = np.dtype(np.float64)  # Standardize/Unstandardize keep mean and scale in float64
_SETTING_KEY = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
_LARGEST_EXACT_INT = 2**53


class ModelFileError(ValueError):
    """A model file is unreadable or inconsistent, or a network cannot be written to one.

    The message names what is wrong: the member, field or layer, what was
    expected and what was found.
    """


def fingerprint(net: Network) -> str:
    """SHA-256 (64 lowercase hex digits) of the network's architecture and arrays.

    ``sha256(canonical_json(description))`` with ``description`` as returned by
    :func:`fingerprint_description`; see ``docs/model-file.md`` for the exact
    bytes. Two networks have the same fingerprint exactly when they have the
    same dtype, the same layers with the same settings and bit-identical
    parameters and scalings.

    >>> import tinyprop as tp
    >>> from tinyprop.io import fingerprint
    >>> net = tp.Network([tp.Affine(2, 1)], seed=0)
    >>> len(fingerprint(net)), fingerprint(net) == fingerprint(net.copy())
    (64, True)
    """
    return hashlib.sha256(canonical_json(fingerprint_description(net)).encode("ascii")).hexdigest()


def fingerprint_description(net: Network) -> dict[str, Any]:
    """The object whose canonical JSON is hashed by :func:`fingerprint`."""
    layers, arrays = describe_layers(net)
    return {
        "format": FINGERPRINT_FORMAT,
        "version": FINGERPRINT_VERSION,
        "dtype": net.dtype.name,
        "layers": layers,
        "arrays": [array_record(name, array) for name, array in arrays],
    }


def canonical_json(value: Any) -> str:
    """JSON text with sorted keys, no whitespace, ASCII only, floats as bit patterns.

    Every float becomes ``{"binary64": "<16 hex digits>"}``, the big-endian
    IEEE-754 double written in lowercase hex, so no decimal formatting rule is
    involved. (Floats only occur in activation settings, which may not hold
    objects, so the substitution cannot be confused with a real setting.)
    """
    return json.dumps(
        _floats_as_bits(value), sort_keys=True, separators=(",", ":"), ensure_ascii=True, allow_nan=False
    )


def array_record(name: str, array: np.ndarray) -> dict[str, Any]:
    """``{"name", "dtype", "shape", "sha256"}`` of an array; the hash is over its little-endian C-order bytes."""
    return {
        "name": name,
        "dtype": array.dtype.name,
        "shape": list(array.shape),
        "sha256": hashlib.sha256(array_bytes(array)).hexdigest(),
    }


def array_bytes(array: np.ndarray) -> bytes:
    """The array's elements as little-endian bytes in C (row-major) order."""
    return np.asarray(array, dtype=array.dtype.newbyteorder("<")).tobytes(order="C")


def describe_layers(net: Network) -> tuple[list[dict[str, Any]], list[tuple[str, np.ndarray]]]:
    """Layer records (kind and settings) and the named arrays, in layer order.

    Arrays are named ``layer<i>.weight``, ``layer<i>.bias``, ``layer<i>.mean``
    and ``layer<i>.scale`` with ``i`` the position in ``net.layers``.
    """
    if not isinstance(net, Network):
        raise TypeError(f"expected a tinyprop Network, got {type(net).__name__}")
    records: list[dict[str, Any]] = []
    arrays: list[tuple[str, np.ndarray]] = []
    for index, layer in enumerate(net.layers):
        kind = type(layer)
        if kind is Affine:
            records.append({"kind": "affine", "n_in": layer.n_in, "n_out": layer.n_out, "bias": layer.bias is not None})
            arrays.append(_checked_array(f"layer{index}.weight", layer.weight, net.dtype, (layer.n_out, layer.n_in)))
            if layer.bias is not None:
                arrays.append(_checked_array(f"layer{index}.bias", layer.bias, net.dtype, (layer.n_out,)))
        elif kind in _SCALING_KINDS:
            records.append({"kind": _SCALING_KINDS[kind], "width": layer.width})
            for field in ("mean", "scale"):
                arrays.append(
                    _checked_array(f"layer{index}.{field}", getattr(layer, field), _SCALING_DTYPE, (layer.width,))
                )
        elif isinstance(layer, Activation):
            records.append(_activation_record(index, layer))
        else:
            raise ModelFileError(
                f"layer {index} is a {kind.__name__}; a model file holds Affine, registered activations, "
                "Standardize and Unstandardize layers (subclasses of Affine and of the scalings are not covered)"
            )
    return records, arrays


def _checked_array(name: str, array: Any, dtype: np.dtype, shape: tuple[int, ...]) -> tuple[str, np.ndarray]:
    if not isinstance(array, np.ndarray) or array.dtype != dtype or array.shape != shape:
        found = f"{array.dtype} array of shape {array.shape}" if isinstance(array, np.ndarray) else type(array).__name__
        raise ModelFileError(f"{name} must be a {dtype} array of shape {shape}, found {found}")
    return name, array


def _activation_record(index: int, activation: Activation) -> dict[str, Any]:
    name = activation_name(activation)
    cls = type(activation)
    if name is None:
        raise ModelFileError(
            f"layer {index} is the activation {cls.__module__}.{cls.__qualname__}, which is not registered; "
            f"call tinyprop.registry.register_activation({cls.__name__}) (optionally with name=...) "
            "in the programs that save and load it"
        )
    settings = activation.settings()
    check_activation_settings(settings, f"settings of activation {name!r} (layer {index})")
    return {"kind": "activation", "name": name, "settings": settings}


def check_activation_settings(settings: Any, where: str) -> None:
    """Refuse settings that cannot be stored and hashed portably.

    Allowed: a dict with identifier keys whose values are ``None``, ``bool``,
    ``str``, integers of magnitude at most 2**53, finite floats, or (nested)
    lists of those. Objects inside values are not allowed.
    """
    if not isinstance(settings, dict):
        raise ModelFileError(f"{where} must be a dict, got {type(settings).__name__}")
    for key, value in settings.items():
        if not isinstance(key, str) or not _SETTING_KEY.fullmatch(key):
            raise ModelFileError(f"{where}: keys must be ASCII identifiers (constructor arguments), got {key!r}")
        _check_setting_value(value, f"{where}[{key!r}]", depth=0)


def _check_setting_value(value: Any, where: str, depth: int) -> None:
    if value is None or isinstance(value, (bool, str)):
        return
    if isinstance(value, int):
        if abs(value) > _LARGEST_EXACT_INT:
            raise ModelFileError(f"{where} = {value} is outside +-2**53, which other languages cannot hold exactly")
        return
    if isinstance(value, float):
        if not math.isfinite(value):
            raise ModelFileError(f"{where} = {value} is not a finite number")
        return
    if isinstance(value, list) and depth < 8:
        for i, item in enumerate(value):
            _check_setting_value(item, f"{where}[{i}]", depth + 1)
        return
    raise ModelFileError(
        f"{where} is a {type(value).__name__}; settings values must be None, bool, str, int, finite float "
        "or lists of these (at most 8 levels deep)"
    )


def _floats_as_bits(value: Any) -> Any:
    if isinstance(value, float):
        return {"binary64": struct.pack(">d", value).hex()}
    if isinstance(value, list):
        return [_floats_as_bits(item) for item in value]
    if isinstance(value, dict):
        return {key: _floats_as_bits(item) for key, item in value.items()}
    return value
