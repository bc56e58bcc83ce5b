"""Model files, fingerprints and a printable description of a network.

A model file is an archive (:mod:`tinyprop.archive`: numpy's ``.npz``
container, members stored uncompressed, no pickle) holding one ``.npy`` member
per array (``layer<i>.weight``, ``layer<i>.bias``, ``layer<i>.mean``,
``layer<i>.scale``, with ``i`` the position in ``net.layers``) and a
``manifest.json`` describing the layers, the arrays with their SHA-256, the
model's fingerprint and the user's metadata. ``docs/model-file.md`` specifies
every field so that another language can read and verify the file.

``fingerprint(net)`` is a SHA-256 hex digest over a canonical description of
the network: its dtype, its layers (kind and settings, activations by their
registered name) and, for every array, its name, dtype, shape and the SHA-256
of its raw bytes (little-endian, C order). It does not depend on how or where
the network is stored.

Every problem with a file's content, or with a network or metadata that cannot
be written, raises :class:`ModelFileError` (a ``ValueError``); ``OSError`` is
raised unchanged when a file cannot be opened or written at all.
"""

from __future__ import annotations

import json
import math
import os
import re
import struct
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from ._json import canonical_json, json_copy, sha256_hex
from ._validate import require_finite
from ._version import __version__
from .activations import Activation
from .archive import ArchiveError, array_record, check_json, read_archive, write_archive
from .layers import Affine, Standardize, Unstandardize
from .network import Network
from .registry import activation_class, activation_name, registered_activations

__all__ = [
    "ModelFileError",
    "ModelFile",
    "fingerprint",
    "save",
    "load",
    "load_model_file",
    "model_parts",
    "model_from_parts",
    "describe",
]

MODEL_FORMAT = "tinyprop-model"
MODEL_FORMAT_VERSION = 1
FINGERPRINT_FORMAT = "tinyprop-fingerprint"
FINGERPRINT_VERSION = 1

_MANIFEST_KEYS = (
    "format", "format_version", "tinyprop_version", "dtype", "n_params", "fingerprint", "layers", "metadata"
)
_LAYER_KEYS = {
    "affine": {"kind", "n_in", "n_out", "bias"},
    "activation": {"kind", "name", "settings"},
    "standardize": {"kind", "width"},
    "unstandardize": {"kind", "width"},
}
_SCALING_CLASSES: dict[str, type[Standardize] | type[Unstandardize]] = {
    "standardize": Standardize,
    "unstandardize": Unstandardize,
}
_SCALING_DTYPE = np.dtype(np.float64)  # Standardize/Unstandardize keep mean and scale in float64
_NETWORK_DTYPES = ("float64", "float32")
_MAX_WIDTH = 2**31 - 1
_MAX_LAYERS = 10_000
_SETTING_KEY = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
_LARGEST_EXACT_INT = 2**53
_HEX64 = re.compile(r"[0-9a-f]{64}")


class ModelFileError(ArchiveError):
    """A model file is unreadable or inconsistent, or a network or metadata cannot be written to one.

    A subclass of ``ValueError`` (through :class:`tinyprop.archive.ArchiveError`).
    The message names what is wrong: the file, member, field or layer, what was
    expected and what was found.
    """


@dataclass(frozen=True)
class ModelFile:
    """What :func:`load_model_file` read: the network plus the file's own facts.

    ``fingerprint`` has been recomputed from the loaded network and matches
    the file; ``tinyprop_version`` is the version that wrote the file.
    """

    network: Network
    metadata: dict[str, Any]
    fingerprint: str
    tinyprop_version: str
    format_version: int


# ---------------------------------------------------------------- fingerprint
def fingerprint(net: Network) -> str:
    """SHA-256 (64 lowercase hex digits) of the network's architecture and arrays.

    ``sha256(canonical JSON of {format, version, dtype, layers, arrays})``;
    ``docs/model-file.md`` gives the exact bytes. Two networks have the same
    fingerprint exactly when they have the same dtype, the same layers with the
    same settings and bit-identical parameters and scalings.

    >>> import tinyprop as tp
    >>> net = tp.Network([tp.Affine(2, 1)], seed=0)
    >>> len(tp.fingerprint(net)), tp.fingerprint(net) == tp.fingerprint(net.copy())
    (64, True)
    """
    layers, arrays = _layer_records(net)
    return _fingerprint_of(net.dtype.name, layers, [array_record(name, array) for name, array in arrays])


def _description(dtype: str, layers: list[dict[str, Any]], arrays: list[dict[str, Any]]) -> dict[str, Any]:
    return {
        "format": FINGERPRINT_FORMAT, "version": FINGERPRINT_VERSION, "dtype": dtype, "layers": layers, "arrays": arrays
    }


def _fingerprint_of(dtype: str, layers: list[dict[str, Any]], arrays: list[dict[str, Any]]) -> str:
    return sha256_hex(_canonical_json(_description(dtype, layers, arrays)))


def _canonical_json(value: Any) -> str:
    """JSON text with sorted keys, no whitespace, ASCII only, floats as bit patterns.

    Every float becomes ``{"binary64": "<16 hex digits>"}``, the big-endian
    IEEE-754 double in lowercase hex, so no decimal formatting rule is
    involved. (Floats only occur in activation settings, whose values cannot
    be objects, so the substitution cannot be confused with a real setting.)
    """
    return canonical_json(_floats_as_bits(value))


def _floats_as_bits(value: Any) -> Any:
    if isinstance(value, float):
        return {"binary64": struct.pack(">d", value).hex()}
    if isinstance(value, list):
        return [_floats_as_bits(item) for item in value]
    if isinstance(value, dict):
        return {key: _floats_as_bits(item) for key, item in value.items()}
    return value


def _layer_records(net: Network) -> tuple[list[dict[str, Any]], list[tuple[str, np.ndarray]]]:
    """Layer records (kind and settings) and the named arrays, in layer order."""
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
        elif kind in (Standardize, Unstandardize):
            records.append({"kind": kind.__name__.lower(), "width": layer.width})
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
    _check_activation_settings(settings, f"settings of activation {name!r} (layer {index})")
    return {"kind": "activation", "name": name, "settings": settings}


def _check_activation_settings(settings: Any, where: str) -> None:
    """Refuse settings that cannot be stored and hashed portably.

    Allowed: a dict with identifier keys whose values are ``None``, ``bool``,
    ``str``, integers of magnitude at most 2**53, finite floats, or lists of
    those nested at most 8 deep. Objects inside values are not allowed.
    """
    if not isinstance(settings, dict):
        raise ModelFileError(f"{where} must be a dict, found {type(settings).__name__}")
    for key, value in settings.items():
        if not isinstance(key, str) or not _SETTING_KEY.fullmatch(key):
            raise ModelFileError(f"{where}: keys must be ASCII identifiers (constructor arguments), found {key!r}")
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
        f"{where} has type {type(value).__name__}; settings values must be None, bool, str, int, finite float "
        "or lists of these (at most 8 levels deep)"
    )


# ---------------------------------------------------------------- saving
def save(net: Network, path: str | os.PathLike[str], *, metadata: dict[str, Any] | None = None) -> str:
    """Write ``net`` (and JSON-compatible ``metadata``) to ``path`` atomically; return its fingerprint.

    Refused with :class:`ModelFileError`: unregistered activations, activations
    that ``cls(**settings)`` does not rebuild equal, non-finite parameters or
    scalings, layer types a file cannot hold, and metadata that is not a dict
    of JSON values (see :func:`tinyprop.archive.check_json`). The write is
    atomic: a failure leaves an earlier file at ``path`` as it was. Neither
    ``net`` nor ``metadata`` is modified. The file is
    ``write_archive(path, *model_parts(net, metadata))``.
    """
    arrays, manifest = model_parts(net, metadata)
    try:
        write_archive(path, arrays, manifest)
    except ArchiveError as exc:
        raise ModelFileError(str(exc)) from None
    return manifest["fingerprint"]


def model_parts(net: Network, metadata: dict[str, Any] | None = None) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
    """What a model file holds, without the file: ``(arrays, manifest)``.

    ``arrays`` maps the array names (``layer<i>.weight``, ...) to copies of
    the network's arrays, in layer order; ``manifest`` is the model-file
    manifest of ``docs/model-file.md`` without its ``"arrays"`` field (which
    :func:`tinyprop.archive.write_archive` adds), with a copy of ``metadata``.
    :func:`save` writes exactly these; :func:`model_from_parts` reverses them,
    so other containers (an ensemble file, say) can embed model files
    without temporary files. Refuses what :func:`save` refuses, with the same
    :class:`ModelFileError`; neither ``net`` nor ``metadata`` is modified.

    >>> import tinyprop as tp
    >>> net = tp.Network([tp.Affine(2, 1)], seed=0)
    >>> arrays, manifest = tp.model_parts(net, {"units": "V"})
    >>> list(arrays), manifest["fingerprint"] == tp.fingerprint(net)
    (['layer0.weight', 'layer0.bias'], True)
    >>> tp.model_from_parts(arrays, manifest).metadata
    {'units': 'V'}
    """
    layers, arrays = _layer_records(net)
    for record, layer in zip(layers, net.layers):
        if record["kind"] == "activation":
            _check_rebuilds(record, layer)
    for name, array in arrays:
        _require_finite(name, array)
    if metadata is None:
        metadata = {}
    if not isinstance(metadata, dict):
        raise ModelFileError(f"metadata must be a dict of JSON values or None, got {type(metadata).__name__}")
    records = [array_record(name, array) for name, array in arrays]
    manifest = {
        "format": MODEL_FORMAT,
        "format_version": MODEL_FORMAT_VERSION,
        "tinyprop_version": __version__,
        "dtype": net.dtype.name,
        "n_params": net.n_params,
        "fingerprint": _fingerprint_of(net.dtype.name, layers, records),
        "layers": layers,
        "metadata": _json_copy(metadata, "metadata"),
    }
    return {name: array.copy() for name, array in arrays}, manifest


def _json_copy(value: Any, where: str) -> Any:
    """A deep copy of a JSON value; :class:`ModelFileError` naming ``where`` if it is not one (:func:`check_json`)."""
    try:
        check_json(value, where)
    except ArchiveError as exc:
        raise ModelFileError(str(exc)) from None
    return json_copy(value)


def _check_rebuilds(record: dict[str, Any], activation: Activation) -> None:
    """``cls(**settings)`` must give an activation that computes the same, as loading will build it.

    Compared: ``settings()``, and ``value`` and ``derivative`` on the probe
    points -4, -3.5, ..., 4 (float64), bit for bit.
    """
    rebuilt = _rebuild_activation(type(activation), record["name"], record["settings"])
    z = np.linspace(-4.0, 4.0, 17)
    a, a_rebuilt = activation.value(z), rebuilt.value(z)
    same = (
        rebuilt.settings() == record["settings"]
        and np.array_equal(a, a_rebuilt, equal_nan=True)
        and np.array_equal(activation.derivative(z, a), rebuilt.derivative(z, a_rebuilt), equal_nan=True)
    )
    if not same:
        raise ModelFileError(
            f"activation {record['name']!r}: {type(activation).__name__}(**{record['settings']!r}) does not recreate "
            f"it (different settings or values at z = -4, -3.5, ..., 4); settings() must return the constructor "
            "arguments that recreate the activation"
        )


def _rebuild_activation(cls: type[Activation], name: str, settings: dict[str, Any]) -> Activation:
    try:
        return cls(**settings)
    except Exception as exc:  # user-defined constructors may raise anything; report it as a file problem
        raise ModelFileError(
            f"activation {name!r} could not be rebuilt as {cls.__name__}(**{settings!r}): "
            f"{type(exc).__name__}: {exc}"
        ) from None


def _require_finite(name: str, array: np.ndarray) -> None:
    """:func:`~tinyprop._validate.require_finite` for a stored array, refusing with :class:`ModelFileError`."""
    try:
        require_finite(array, f"array {name}")
    except ValueError as exc:
        raise ModelFileError(str(exc)) from None


# ---------------------------------------------------------------- loading
def load(path: str | os.PathLike[str]) -> Network:
    """Read, verify and rebuild the network saved at ``path``.

    Equivalent to ``load_model_file(path).network``; use
    :func:`load_model_file` to get the metadata as well.
    """
    return load_model_file(path).network


def load_model_file(path: str | os.PathLike[str]) -> ModelFile:
    """Read a model file, check every field and hash, and rebuild the network.

    Nothing in the file is unpickled or executed; activations are looked up
    by registered name. Raises :class:`ModelFileError` naming the file and
    what is wrong, or ``OSError`` if the file cannot be read.
    """
    try:
        arrays, manifest = read_archive(path)
        return _model_from(arrays, manifest)
    except ArchiveError as exc:
        raise ModelFileError(f"{os.fspath(path)}: {exc}") from None


def model_from_parts(arrays: Mapping[str, np.ndarray], manifest: Mapping[str, Any]) -> ModelFile:
    """Check ``(arrays, manifest)`` as :func:`load_model_file` checks a file, and rebuild the network.

    The reverse of :func:`model_parts`: ``manifest`` is a model-file manifest
    without its ``"arrays"`` field, ``arrays`` its arrays by name in layer
    order (as :func:`tinyprop.archive.read_archive` returns them). Every field,
    shape, dtype and value is checked and the fingerprint recomputed; the
    network and metadata are built from copies, so nothing passed in is
    modified or shared. Raises :class:`ModelFileError` naming what is wrong.
    """
    if not isinstance(arrays, Mapping) or not isinstance(manifest, Mapping):
        raise TypeError(
            f"arrays and manifest must be dicts, got {type(arrays).__name__} and {type(manifest).__name__}"
        )
    copies = {}
    for name, array in arrays.items():
        if not isinstance(array, np.ndarray):
            raise ModelFileError(f"array {name!r} must be a numpy array, found {type(array).__name__}")
        copies[name] = np.array(array, dtype=array.dtype.newbyteorder("="), order="C")
    return _model_from(copies, _json_copy(dict(manifest), "the manifest"))


def _model_from(arrays: dict[str, np.ndarray], manifest: dict[str, Any]) -> ModelFile:
    _check_manifest_fields(manifest)
    dtype = np.dtype(manifest["dtype"])
    expected = _expected_arrays(manifest["layers"], dtype)
    if list(arrays) != [name for name, _, _ in expected]:
        raise ModelFileError(
            f"the arrays {list(arrays)} do not match the layers, which need {[name for name, _, _ in expected]}"
        )
    for name, array_dtype, shape in expected:
        array = arrays[name]
        if array.dtype != array_dtype or array.shape != shape:
            raise ModelFileError(
                f"array {name} is {array.dtype} of shape {array.shape}; its layer needs {array_dtype} of shape {shape}"
            )
        _require_finite(name, array)
    net = _build_network(manifest["layers"], arrays, dtype)
    if net.n_params != manifest["n_params"]:
        raise ModelFileError(f"manifest field 'n_params' is {manifest['n_params']}, the layers hold {net.n_params}")
    recomputed = fingerprint(net)
    if recomputed != manifest["fingerprint"]:
        raise ModelFileError(
            f"fingerprint mismatch: the manifest lists {manifest['fingerprint']}, the file's contents give "
            f"{recomputed}; the layers, settings or dtype were changed after saving"
        )
    return ModelFile(net, manifest["metadata"], recomputed, manifest["tinyprop_version"], manifest["format_version"])


def _check_manifest_fields(manifest: dict[str, Any]) -> None:
    missing = [key for key in _MANIFEST_KEYS if key not in manifest]
    unknown = sorted(key for key in manifest if key not in _MANIFEST_KEYS)
    if missing or unknown:
        raise ModelFileError(
            f"manifest fields: missing {missing}, unknown {unknown}; expected exactly "
            f"{list(_MANIFEST_KEYS)}"
        )
    if manifest["format"] != MODEL_FORMAT:
        raise ModelFileError(f"manifest field 'format' is {manifest['format']!r}, expected {MODEL_FORMAT!r}")
    version = manifest["format_version"]
    if not _is_int(version) or version != MODEL_FORMAT_VERSION:
        raise ModelFileError(
            f"manifest field 'format_version' is {version!r}; this tinyprop reads version {MODEL_FORMAT_VERSION}"
        )
    if not isinstance(manifest["tinyprop_version"], str) or not 0 < len(manifest["tinyprop_version"]) <= 64:
        raise ModelFileError(
            "manifest field 'tinyprop_version' must be a string of 1 to 64 characters, "
            f"found {manifest['tinyprop_version']!r}"
        )
    if manifest["dtype"] not in _NETWORK_DTYPES:
        raise ModelFileError(
            f"manifest field 'dtype' is {manifest['dtype']!r}, expected one of "
            f"{list(_NETWORK_DTYPES)}"
        )
    if not _is_int(manifest["n_params"]) or manifest["n_params"] < 1:
        raise ModelFileError(f"manifest field 'n_params' must be a positive integer, found {manifest['n_params']!r}")
    if not isinstance(manifest["fingerprint"], str) or not _HEX64.fullmatch(manifest["fingerprint"]):
        raise ModelFileError(
            f"manifest field 'fingerprint' must be 64 lowercase hex digits, found {manifest['fingerprint']!r}"
        )
    if not isinstance(manifest["metadata"], dict):
        raise ModelFileError(
            "manifest field 'metadata' must be an object, found "
            f"{type(manifest['metadata']).__name__}"
        )
    layers = manifest["layers"]
    if not isinstance(layers, list) or not 0 < len(layers) <= _MAX_LAYERS:
        found = f"{len(layers)} entries" if isinstance(layers, list) else type(layers).__name__
        raise ModelFileError(f"manifest field 'layers' must be a list of 1 to {_MAX_LAYERS} layers, found {found}")
    for index, layer in enumerate(layers):
        _check_layer_record(index, layer)


def _check_layer_record(index: int, layer: Any) -> None:
    where = f"layer {index}"
    kind = layer.get("kind") if isinstance(layer, dict) else type(layer).__name__
    if not isinstance(kind, str) or kind not in _LAYER_KEYS or not isinstance(layer, dict):
        raise ModelFileError(f"{where}: kind must be one of {sorted(_LAYER_KEYS)}, found {kind!r}")
    keys = _LAYER_KEYS[layer["kind"]]
    if set(layer) != keys:
        raise ModelFileError(
            f"{where} ({layer['kind']}) must have exactly the fields {sorted(keys)}, found "
            f"{sorted(layer)}"
        )
    if layer["kind"] == "affine":
        for field in ("n_in", "n_out"):
            if not _is_int(layer[field]) or not 1 <= layer[field] <= _MAX_WIDTH:
                raise ModelFileError(
                    f"{where}: {field} must be an integer from 1 to {_MAX_WIDTH}, found "
                    f"{layer[field]!r}"
                )
        if not isinstance(layer["bias"], bool):
            raise ModelFileError(f"{where}: bias must be true or false, found {layer['bias']!r}")
    elif layer["kind"] == "activation":
        name = layer["name"]
        if not isinstance(name, str):
            raise ModelFileError(f"{where}: the activation name must be a string, found {name!r}")
        if activation_class(name) is None:
            raise ModelFileError(
                f"{where}: the file names the activation {name!r}, which is not registered in this program; "
                f"import the module that defines it and call tinyprop.registry.register_activation(<class>, "
                f"name={name!r}) before loading (registered: {sorted(registered_activations())})"
            )
        _check_activation_settings(layer["settings"], f"{where}: settings of activation {name!r}")
    elif not _is_int(layer["width"]) or not 1 <= layer["width"] <= _MAX_WIDTH:
        raise ModelFileError(f"{where}: width must be an integer from 1 to {_MAX_WIDTH}, found {layer['width']!r}")


def _expected_arrays(layers: list[dict[str, Any]], dtype: np.dtype) -> list[tuple[str, np.dtype, tuple[int, ...]]]:
    expected: list[tuple[str, np.dtype, tuple[int, ...]]] = []
    for index, layer in enumerate(layers):
        if layer["kind"] == "affine":
            expected.append((f"layer{index}.weight", dtype, (layer["n_out"], layer["n_in"])))
            if layer["bias"]:
                expected.append((f"layer{index}.bias", dtype, (layer["n_out"],)))
        elif layer["kind"] in _SCALING_CLASSES:
            expected.append((f"layer{index}.mean", _SCALING_DTYPE, (layer["width"],)))
            expected.append((f"layer{index}.scale", _SCALING_DTYPE, (layer["width"],)))
    return expected


def _build_network(layers: list[dict[str, Any]], arrays: dict[str, np.ndarray], dtype: np.dtype) -> Network:
    built: list[Any] = []
    for index, record in enumerate(layers):
        kind = record["kind"]
        if kind == "affine":
            affine = Affine(record["n_in"], record["n_out"], bias=record["bias"])
            affine.weight = arrays[f"layer{index}.weight"]
            affine.bias = arrays[f"layer{index}.bias"] if record["bias"] else None
            built.append(affine)
        elif kind == "activation":
            cls = activation_class(record["name"])
            assert cls is not None  # checked with the manifest
            activation = _rebuild_activation(cls, record["name"], record["settings"])
            if activation.settings() != record["settings"]:
                raise ModelFileError(
                    f"layer {index}: activation {record['name']!r} rebuilt from settings {record['settings']!r} "
                    f"reports settings {activation.settings()!r}"
                )
            built.append(activation)
        else:
            try:
                built.append(_SCALING_CLASSES[kind](arrays[f"layer{index}.mean"], arrays[f"layer{index}.scale"]))
            except (TypeError, ValueError) as exc:
                raise ModelFileError(f"layer {index} ({kind}): {exc}") from None
    try:
        return Network(built, dtype=dtype, init=None)
    except (TypeError, ValueError) as exc:
        raise ModelFileError(f"the layers do not form a network: {exc}") from None


def _is_int(value: Any) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


# ---------------------------------------------------------------- description
def describe(net: Network, metadata: dict[str, Any] | None = None) -> str:
    """A plain-text account of a network: layers, array shapes, parameter count, dtype, fingerprint, metadata.

    Works for any network; one that a file cannot hold (an unregistered
    activation, say) is shown with ``fingerprint: none (<reason>)``.

    >>> import tinyprop as tp
    >>> print(tp.describe(tp.Network([tp.Affine(2, 1)], seed=0)).splitlines()[0])
    network: 2 inputs -> 1 output, 3 parameters, float64
    """
    if not isinstance(net, Network):
        raise TypeError(f"expected a tinyprop Network, got {type(net).__name__}")
    inputs = "input" if net.n_in == 1 else "inputs"
    outputs = "output" if net.n_out == 1 else "outputs"
    lines = [f"network: {net.n_in} {inputs} -> {net.n_out} {outputs}, {net.n_params} parameters, {net.dtype.name}"]
    try:
        lines.append(f"fingerprint: {fingerprint(net)}")
    except ModelFileError as exc:
        lines.append(f"fingerprint: none ({exc})")
    lines.append("layers:")
    lines.extend(f"  {index:>3}  {_layer_line(layer)}" for index, layer in enumerate(net.layers))
    if metadata:
        lines.append("metadata:")
        text = json.dumps(metadata, indent=2, ensure_ascii=False, default=repr)
        lines.extend("  " + line for line in text.splitlines())
    return "\n".join(lines)


def _layer_line(layer: Any) -> str:
    if isinstance(layer, Affine):
        shapes = ", ".join(f"{name} {p.shape}" for name, p in zip(("weight", "bias"), layer.params))
        count = sum(p.size for p in layer.params)
        return f"affine          {layer.n_in} -> {layer.n_out}, {shapes}, {count} parameters"
    if isinstance(layer, Activation):
        name = activation_name(layer) or f"{type(layer).__qualname__} (not registered)"
        settings = ", ".join(f"{key}={value!r}" for key, value in layer.settings().items())
        return f"activation      {name}({settings})"
    return f"{type(layer).__name__.lower():<15} width {layer.width}, fixed mean and scale"
