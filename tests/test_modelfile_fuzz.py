"""Property tests: whatever is done to a model file, ``load`` returns the saved network or raises ModelFileError.

All networks and data here are synthetic. Every example gets a generous
deadline (5 s against a typical 1-3 ms) that acts as a hang guard, not as a
speed requirement. The ``slow`` variants run the same properties with far more
examples (``pytest -m slow``).
"""

from __future__ import annotations

import atexit
import copy
import json
import shutil
import tempfile
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

import tinyprop as tp
from test_modelfile import (
    Cube,
    ScaledTanh,
    assert_archive_round_trip,
    assert_same_network,
    hand_set_network,
    read_members,
    write_members,
)
from tinyprop.archive import ARRAY_DTYPES, ArchiveError, read_archive
from tinyprop.modelfile import ModelFileError, _fingerprint_of, fingerprint, load, load_model_file, save

GUARD = dict(deadline=5000, suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
FAST = settings(max_examples=250, **GUARD)
SLOW = settings(max_examples=5000, **GUARD)

WORKDIR = Path(tempfile.mkdtemp(prefix="tinyprop-fuzz-"))  # every example rewrites its own file here
atexit.register(shutil.rmtree, WORKDIR, ignore_errors=True)
ORIGINAL = hand_set_network()
ORIGINAL_PATH = WORKDIR / "original.npz"
save(ORIGINAL, ORIGINAL_PATH, metadata={"data": "synthetic", "epochs": [1, 2, 3]})
ORIGINAL_BYTES = ORIGINAL_PATH.read_bytes()
ORIGINAL_MEMBERS = read_members(ORIGINAL_PATH)
ORIGINAL_MANIFEST = json.loads(ORIGINAL_MEMBERS["manifest.json"])


def load_or_refuse(data: bytes) -> tp.Network | None:
    """Write ``data`` as a model file and load it: the network, or None when refused with ModelFileError."""
    path = WORKDIR / "mutated.npz"
    path.write_bytes(data)
    try:
        net = load(path)
    except ModelFileError as exc:  # any other exception type fails the test
        event("refused: " + next((k for k in REASONS if k in str(exc)), "other reason"))
        return None
    event("loaded")
    return net


REASONS = ("ZIP signature", "damaged or truncated", "SHA-256", "fingerprint mismatch", "manifest field", "member",
           "layer")


# ---------------------------------------------------------------- file bytes
N = len(ORIGINAL_BYTES)
byte_mutations = st.one_of(
    st.lists(st.tuples(st.integers(0, N - 1), st.integers(1, 255)), min_size=1, max_size=8).map(lambda f: ("flip", f)),
    st.integers(0, N - 1).map(lambda k: ("truncate", k)),
    st.tuples(st.integers(0, N), st.binary(min_size=1, max_size=32)).map(lambda t: ("insert", t)),
    st.tuples(st.integers(0, N - 1), st.binary(min_size=1, max_size=32)).map(lambda t: ("overwrite", t)),
)


def mutate(mutation: tuple[str, Any]) -> bytes:
    kind, arg = mutation
    data = bytearray(ORIGINAL_BYTES)
    if kind == "flip":
        for position, mask in arg:
            data[position] ^= mask
    elif kind == "truncate":
        del data[arg:]
    elif kind == "insert":
        data[arg[0]:arg[0]] = arg[1]
    else:
        data[arg[0]:arg[0] + len(arg[1])] = arg[1]
    return bytes(data)


def check_byte_mutation(mutation: tuple[str, Any]) -> None:
    loaded = load_or_refuse(mutate(mutation))
    if loaded is not None:
        assert_same_network(loaded, ORIGINAL)


@FAST
@given(byte_mutations)
def test_mutated_file_bytes_load_unchanged_or_are_refused(mutation):
    check_byte_mutation(mutation)


@pytest.mark.slow
@SLOW
@given(byte_mutations)
def test_mutated_file_bytes_load_unchanged_or_are_refused_long(mutation):
    check_byte_mutation(mutation)


@FAST
@given(st.binary(max_size=400), st.sampled_from([b"", b"PK\x03\x04", b"PK\x05\x06", b"\x93NUMPY"]))
def test_arbitrary_bytes_are_refused(data, prefix):
    assert load_or_refuse(prefix + data) is None


# ---------------------------------------------------------------- manifest structure
def paths(node: Any, prefix: tuple = ()) -> list[tuple]:
    """Every position in a JSON tree, as a tuple of keys and indices."""
    found = [prefix]
    if isinstance(node, dict):
        for key, value in node.items():
            found += paths(value, prefix + (key,))
    elif isinstance(node, list):
        for index, value in enumerate(node):
            found += paths(value, prefix + (index,))
    return found


MANIFEST_PATHS = paths(ORIGINAL_MANIFEST)[1:]
plausible = st.sampled_from(
    [0, 1, 2, -1, 2**31, 2**53 + 1, 1.5, True, None, "", "affine", "activation", "standardize", "Tanh",
     "LeakyReLU", "float32", "float64", "object", "layer1.weight", "layer0.mean", "0" * 64, [], {}, [2, 2], [2]]
)
plausible_keys = st.sampled_from(["kind", "name", "settings", "slope", "bias", "n_in", "n_out", "width", "arrays",
                                  "shape"])
json_values = st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats(allow_nan=False,
                                                          allow_infinity=False) | st.text(max_size=8) | plausible,
    lambda children: st.lists(children, max_size=4) | st.dictionaries(st.text(max_size=6) | plausible_keys, children,
                                                                      max_size=4),
    max_leaves=12,
)
manifest_edits = st.lists(
    st.tuples(st.sampled_from(["replace", "delete", "add"]), st.sampled_from(MANIFEST_PATHS), json_values,
              st.text(max_size=6) | plausible_keys),
    min_size=1,
    max_size=3,
)


def edited_manifest(edits: list[tuple[str, tuple, Any, str]]) -> dict[str, Any]:
    manifest = copy.deepcopy(ORIGINAL_MANIFEST)
    for action, path, value, new_key in edits:
        parent = manifest
        try:
            for step in path[:-1]:
                parent = parent[step]
            last = path[-1]
            if action == "replace":
                parent[last] = copy.deepcopy(value)
            elif action == "delete":
                del parent[last]
            elif isinstance(parent, dict):
                parent[new_key] = copy.deepcopy(value)
            elif isinstance(parent, list):
                parent.insert(last, copy.deepcopy(value))
        except (KeyError, IndexError, TypeError):
            pass  # an earlier edit removed or replaced this position
    return manifest


def with_manifest(manifest: dict[str, Any]) -> bytes:
    members = dict(ORIGINAL_MEMBERS)
    members["manifest.json"] = json.dumps(manifest).encode()
    path = WORKDIR / "edited.npz"
    write_members(path, members)
    return path.read_bytes()


def check_manifest_edit(edits) -> None:
    loaded = load_or_refuse(with_manifest(edited_manifest(edits)))
    if loaded is not None:
        assert_same_network(loaded, ORIGINAL)


@FAST
@given(manifest_edits)
def test_edited_manifests_load_unchanged_or_are_refused(edits):
    check_manifest_edit(edits)


@pytest.mark.slow
@SLOW
@given(manifest_edits)
def test_edited_manifests_load_unchanged_or_are_refused_long(edits):
    check_manifest_edit(edits)


def check_forged_manifest(edits) -> None:
    """A forger who also rewrites the fingerprint can make a different, but self-consistent, network load."""
    manifest = edited_manifest(edits)
    try:
        manifest["fingerprint"] = _fingerprint_of(manifest["dtype"], manifest["layers"], manifest["arrays"])
    except (KeyError, TypeError, ValueError):
        pass  # the edit broke a field the fingerprint needs; loading must refuse it anyway
    path = WORKDIR / "forged.npz"
    path.write_bytes(with_manifest(manifest))
    try:
        model = load_model_file(path)
    except ModelFileError as exc:
        event("refused: " + next((k for k in REASONS if k in str(exc)), "other reason"))
        return
    event("loaded")
    assert model.fingerprint == manifest["fingerprint"] == fingerprint(model.network)
    assert np.all(np.isfinite(model.network.get_vector()))


@FAST
@given(manifest_edits)
def test_forged_manifests_load_self_consistent_or_are_refused(edits):
    check_forged_manifest(edits)


@pytest.mark.slow
@SLOW
@given(manifest_edits)
def test_forged_manifests_load_self_consistent_or_are_refused_long(edits):
    check_forged_manifest(edits)


# ---------------------------------------------------------------- architectures
activations = st.sampled_from(
    [tp.Sigmoid(), tp.Tanh(), tp.ReLU(), tp.LeakyReLU(0.05), tp.Softplus(), tp.Identity(), Cube(), ScaledTanh(0.5)]
)


@st.composite
def networks(draw) -> tp.Network:
    sizes = draw(st.lists(st.integers(1, 5), min_size=2, max_size=5))
    layers: list[Any] = []
    if draw(st.booleans()):
        layers.append(tp.Standardize(draw(st.lists(st.floats(-9, 9), min_size=sizes[0], max_size=sizes[0])),
                                     draw(st.lists(st.floats(0.01, 9), min_size=sizes[0], max_size=sizes[0]))))
    for n_in, n_out in zip(sizes[:-1], sizes[1:]):
        layers.append(tp.Affine(n_in, n_out, bias=draw(st.booleans())))
        if draw(st.booleans()):
            layers.append(draw(activations))
    if draw(st.booleans()):
        layers.append(tp.Unstandardize([draw(st.floats(-9, 9))] * sizes[-1], [draw(st.floats(0.01, 9))] * sizes[-1]))
    dtype = draw(st.sampled_from([np.float32, np.float64]))
    return tp.Network(layers, seed=draw(st.integers(0, 2**32 - 1)), dtype=dtype)


@settings(max_examples=60, **GUARD)
@given(networks(), json_values)
def test_any_architecture_round_trips(net, metadata_value):
    path = WORKDIR / "architecture.npz"
    save(net, path, metadata={"value": metadata_value})
    model = load_model_file(path)
    assert_same_network(model.network, net)
    assert model.metadata == {"value": metadata_value}


# ---------------------------------------------------------------- the reusable archive
@st.composite
def named_arrays(draw) -> dict[str, np.ndarray]:
    names = draw(st.lists(st.from_regex(r"[A-Za-z0-9_][A-Za-z0-9_.\-]{0,8}(/[A-Za-z0-9_][A-Za-z0-9_.\-]{0,8}){0,2}",
                                        fullmatch=True), max_size=4, unique=True))
    arrays = {}
    for name in names:
        dtype = np.dtype(draw(st.sampled_from(sorted(ARRAY_DTYPES))))
        shape = tuple(draw(st.lists(st.integers(0, 3), max_size=3)))
        raw = draw(st.binary(min_size=dtype.itemsize * int(np.prod(shape)),
                             max_size=dtype.itemsize * int(np.prod(shape))))
        array = np.frombuffer(raw, dtype=np.uint8).view(dtype).reshape(shape) if raw else np.zeros(shape, dtype)
        arrays[name] = array.astype(bool) if dtype == np.dtype(bool) else array
    return arrays


@settings(max_examples=100, **GUARD)
@given(named_arrays(), st.dictionaries(st.text(max_size=6).filter(lambda k: k != "arrays"), json_values, max_size=4))
def test_archive_round_trips_any_allowed_arrays_bit_for_bit(arrays, manifest):
    assert_archive_round_trip(WORKDIR / "archive.npz", arrays, manifest)  # bit for bit, NaN payloads included


@FAST
@given(byte_mutations)
def test_archive_reader_raises_only_archive_error(mutation):
    path = WORKDIR / "archive-mutated.npz"
    path.write_bytes(mutate(mutation))
    try:
        read_archive(path)
    except ArchiveError:
        pass
