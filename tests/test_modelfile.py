"""Fingerprints, the activation registry, and model-file round trips."""

from __future__ import annotations

import copy
import errno
import hashlib
import io
import json
import os
import pickle
import struct
import zipfile

import numpy as np
import pytest

import tinyprop as tp
from tinyprop.archive import ArchiveError, array_record, read_archive, write_archive
from tinyprop.modelfile import (
    ModelFileError,
    describe,
    fingerprint,
    load,
    load_model_file,
    model_from_parts,
    model_parts,
    save,
)
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
            arrays += [(f"layer{i}.weight", layer.weight)] + ([(f"layer{i}.bias",
                                                                layer.bias)] if layer.bias is not None else [])
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


register_activation(Cube, "test_modelfile.Cube")
register_activation(ScaledTanh, "test_modelfile.ScaledTanh")


def test_builtins_are_registered_under_their_class_names():
    for cls in (tp.Sigmoid, tp.Tanh, tp.ReLU, tp.LeakyReLU, tp.Softplus, tp.Identity):
        assert activation_class(cls.__name__) is cls
    assert registered_activations()["test_modelfile.Cube"] is Cube


def test_registering_the_same_pair_again_is_harmless():
    assert register_activation(Cube, "test_modelfile.Cube") is Cube
    assert register_activation(ScaledTanh, "test_modelfile.ScaledTanh") is ScaledTanh


def test_a_name_cannot_be_bound_to_a_second_class():
    class Tanh(tp.Activation):  # same name as the built-in
        pass

    with pytest.raises(ValueError, match=r"'Tanh' is already registered for tinyprop\.activations\.Tanh"):
        register_activation(Tanh)
    assert activation_class("Tanh") is tp.Tanh


def test_a_class_cannot_take_a_second_name():
    with pytest.raises(ValueError, match=r"already registered as 'test_modelfile\.Cube'; a class has one name"):
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


# ---------------------------------------------------------------- helpers for file tests
def read_members(path) -> dict[str, bytes]:
    """Every member of an archive, raw, in order."""
    with zipfile.ZipFile(path) as archive:
        return {info.filename: archive.read(info) for info in archive.infolist()}


def write_members(path, members: dict[str, bytes], compress_type=zipfile.ZIP_STORED) -> None:
    """A (possibly tampered) archive with valid ZIP checksums, so only tinyprop's own checks can object."""
    with zipfile.ZipFile(path, "w", compression=compress_type) as archive:
        for name, data in members.items():
            archive.writestr(name, data)


def npy_bytes(array: np.ndarray, allow_pickle: bool = False) -> bytes:
    buffer = io.BytesIO()
    np.save(buffer, array, allow_pickle=allow_pickle)
    return buffer.getvalue()


def edit_manifest(path, edit) -> None:
    """Apply ``edit(manifest_dict)`` in place and rewrite the archive (hashes untouched)."""
    members = read_members(path)
    manifest = json.loads(members["manifest.json"])
    edit(manifest)
    members["manifest.json"] = json.dumps(manifest).encode()
    write_members(path, members)


def replace_array(path, name: str, array: np.ndarray, *, update_record: bool) -> None:
    """Swap an array member; with ``update_record`` also rewrite its manifest record to match (a careful forger)."""
    members = read_members(path)
    members[name + ".npy"] = npy_bytes(array)
    if update_record:
        manifest = json.loads(members["manifest.json"])
        for record in manifest["arrays"]:
            if record["name"] == name:
                record.update(array_record(name, array))
        members["manifest.json"] = json.dumps(manifest).encode()
    write_members(path, members)


def assert_same_network(loaded: tp.Network, original: tp.Network) -> None:
    assert loaded.dtype == original.dtype
    assert [type(a) for a in loaded.layers] == [type(b) for b in original.layers]
    for a, b in zip(loaded.layers, original.layers):
        if isinstance(a, tp.Affine):
            assert np.array_equal(a.weight, b.weight) and a.weight.dtype == b.weight.dtype
            assert (a.bias is None) == (b.bias is None)
            if a.bias is not None:
                assert np.array_equal(a.bias, b.bias) and a.bias.dtype == b.bias.dtype
        elif isinstance(a, tp.Activation):
            assert a == b
        else:
            assert np.array_equal(a.mean, b.mean) and np.array_equal(a.scale, b.scale)
    X = np.linspace(-2.0, 2.0, 6 * original.n_in).reshape(6, original.n_in)
    assert np.array_equal(loaded.predict(X), original.predict(X))
    assert fingerprint(loaded) == fingerprint(original)


@pytest.fixture
def saved(tmp_path):
    """A saved hand-set network: (path, network)."""
    net = hand_set_network()
    path = tmp_path / "model.npz"
    save(net, path, metadata={"data": "synthetic"})
    return path, net


# ---------------------------------------------------------------- round trip
@pytest.mark.parametrize("dtype", [np.float64, np.float32])
@pytest.mark.parametrize("bias", [True, False])
@pytest.mark.parametrize(
    "hidden",
    [tp.Sigmoid(), tp.Tanh(), tp.ReLU(), tp.LeakyReLU(0.3), tp.Softplus(), tp.Identity(), Cube(), ScaledTanh(2.5)],
    ids=repr,
)
def test_round_trip_gives_identical_weights_and_predictions(tmp_path, dtype, bias, hidden):
    net = tp.build_mlp([3, 5, 4, 2], activation=hidden, output_activation=tp.Sigmoid(), bias=bias, seed=7, dtype=dtype)
    path = tmp_path / "net.npz"
    digest = save(net, path)
    loaded = load(path)
    assert_same_network(loaded, net)
    assert digest == fingerprint(net)
    assert [p.dtype for p in loaded.params] == [np.dtype(dtype)] * len(net.params)


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_round_trip_keeps_scaling_layers_and_metadata(tmp_path, dtype):
    rng = np.random.default_rng(3)  # synthetic data
    X, y = rng.normal(5.0, 3.0, (40, 2)), rng.normal(-1.0, 0.1, (40, 1))
    layers = [tp.Standardize.from_data(X), tp.Affine(2, 4), tp.Tanh(), tp.Affine(4, 1), tp.Unstandardize.from_data(y)]
    net = tp.Network(layers, seed=1, dtype=dtype)
    metadata = {"data": "synthetic, seed 3", "epochs": 12, "loss": [0.5, 0.25], "unit": "°C", "ok": True, "note": None}
    path = tmp_path / "scaled.npz"
    save(net, path, metadata=metadata)
    model = load_model_file(path)
    assert_same_network(model.network, net)
    assert model.metadata == metadata
    assert model.fingerprint == fingerprint(net)
    assert model.format_version == 1 and model.tinyprop_version == tp.__version__


def test_save_writes_numpys_npz_container(saved):
    path, net = saved
    # external reader: numpy's own .npz loader, with pickle disabled
    with np.load(path, allow_pickle=False) as archive:
        assert np.array_equal(archive["layer1.weight"], net.layers[1].weight)
        assert np.array_equal(archive["layer0.scale"], net.layers[0].scale)
        manifest = json.loads(archive["manifest.json"])
    assert manifest["fingerprint"] == fingerprint(net)
    assert manifest["metadata"] == {"data": "synthetic"}
    with zipfile.ZipFile(path) as archive:
        assert {info.compress_type for info in archive.infolist()} == {zipfile.ZIP_STORED}


def test_saving_twice_gives_byte_identical_files(tmp_path):
    net = hand_set_network()
    save(net, tmp_path / "a.npz", metadata={"k": [1, 2]})
    save(net, tmp_path / "b.npz", metadata={"k": [1, 2]})
    assert (tmp_path / "a.npz").read_bytes() == (tmp_path / "b.npz").read_bytes()


def test_save_modifies_neither_network_nor_metadata(tmp_path):
    net = hand_set_network()
    before = [p.copy() for p in net.params]
    metadata = {"nested": {"list": [1, 2.5]}}
    snapshot = copy.deepcopy(metadata)
    save(net, tmp_path / "m.npz", metadata=metadata)
    assert metadata == snapshot
    assert all(np.array_equal(a, b) for a, b in zip(net.params, before))


def test_save_over_an_existing_file_replaces_it(saved):
    path, net = saved
    other = net.copy()
    other.layers[1].weight[0, 0] = 42.0
    save(other, path)
    assert load(path).layers[1].weight[0, 0] == 42.0
    assert sorted(p.name for p in path.parent.iterdir()) == ["model.npz"]


# ---------------------------------------------------------------- parts without a file
def test_model_parts_are_exactly_what_save_writes(saved, tmp_path):
    path, net = saved
    arrays, manifest = model_parts(net, {"data": "synthetic"})
    stored_arrays, stored_manifest = read_archive(path)
    assert manifest == stored_manifest and "arrays" not in manifest
    assert_same_arrays(arrays, stored_arrays)
    write_archive(tmp_path / "from_parts.npz", arrays, manifest)
    assert (tmp_path / "from_parts.npz").read_bytes() == path.read_bytes()


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_model_from_parts_round_trip_shares_nothing(dtype):
    net = hand_set_network(dtype)
    metadata = {"nested": {"list": [1, 2.5]}}
    arrays, manifest = model_parts(net, metadata)
    for array in arrays.values():  # copies: changing the parts leaves the network alone
        assert not any(np.shares_memory(array, p) for p in net.params)
    assert manifest["metadata"] == metadata and manifest["metadata"] is not metadata
    kept_arrays = {name: array.copy() for name, array in arrays.items()}
    kept_manifest = copy.deepcopy(manifest)
    model = model_from_parts(arrays, manifest)
    assert_same_network(model.network, net)
    assert (model.metadata, model.fingerprint, model.format_version) == (metadata, fingerprint(net), 1)
    for p in model.network.params:
        p += 1.0  # training the rebuilt network must not reach the parts
    model.metadata["nested"]["list"].append(3)
    assert manifest == kept_manifest
    assert all(np.array_equal(arrays[name], kept_arrays[name]) for name in arrays)


def test_model_from_parts_accepts_big_endian_and_fortran_arrays():
    net = hand_set_network()
    arrays, manifest = model_parts(net)
    swapped = {name: np.asfortranarray(array.astype(array.dtype.newbyteorder(">"))) for name, array in arrays.items()}
    assert_same_network(model_from_parts(swapped, manifest).network, net)


@pytest.mark.parametrize(
    "change, error, message",
    [
        (lambda a, m: a["layer1.weight"].__setitem__((0, 0), 9.0), ModelFileError, "fingerprint mismatch"),
        (lambda a, m: a.pop("layer3.weight"), ModelFileError, r"do not match the layers"),
        (lambda a, m: a.update({"layer1.bias": [0.0, 0.0]}), ModelFileError,
         r"array 'layer1.bias' must be a numpy array, found list"),
        (lambda a, m: a.update({"layer1.bias": np.array([0.0, np.nan])}), ModelFileError,
         r"layer1.bias has a non-finite value"),
        (lambda a, m: m.update(arrays=[]), ModelFileError, r"missing \[\], unknown \['arrays'\]"),
        (lambda a, m: m.update(dtype="float16"), ModelFileError, r"manifest field 'dtype' is 'float16'"),
        (lambda a, m: m["layers"][0].update(width=(2,)), ModelFileError,
         r"the manifest\['layers'\]\[0\]\['width'\] has type tuple"),
    ],
    ids=["changed-weight", "missing-array", "list-not-array", "nan", "arrays-field", "dtype", "tuple-in-manifest"],
)
def test_model_from_parts_refuses_what_load_refuses(change, error, message):
    arrays, manifest = model_parts(hand_set_network())
    change(arrays, manifest)
    with pytest.raises(error, match=message):
        model_from_parts(arrays, manifest)


def test_model_from_parts_refuses_non_dicts():
    arrays, manifest = model_parts(hand_set_network())
    with pytest.raises(TypeError, match="arrays and manifest must be dicts, got list and dict"):
        model_from_parts(list(arrays.values()), manifest)


# ---------------------------------------------------------------- what save refuses
class Forgetful(tp.Activation):
    """Its settings() omits the constructor argument, so a file could not rebuild it."""

    def __init__(self, gain: float = 1.0) -> None:
        self.gain = gain

    def value(self, z):
        return self.gain * z

    def derivative(self, z, a):
        return np.full_like(z, self.gain)


register_activation(Forgetful, "test_modelfile.Forgetful")


class WiderAffine(tp.Affine):
    """A subclass could change value(); a file cannot know, so it is refused."""


@pytest.mark.parametrize(
    "make, metadata, message",
    [
        (lambda: tp.Network([tp.Affine(1, 1), Forgetful(3.0)], seed=0), None,
         r"Forgetful\(\*\*\{\}\) does not recreate it .*settings\(\) must return the constructor arguments"),
        (lambda: tp.Network([WiderAffine(1, 1)], seed=0), None, r"layer 0 is a WiderAffine"),
        (hand_set_network, {"shape": (2, 3)}, r"metadata\['shape'\] has type tuple.*\(use a list\)"),
        (hand_set_network, {"n": np.int64(3)}, r"metadata\['n'\] has type int64.*convert it with int\(\)"),
        (hand_set_network, {"loss": float("nan")}, r"metadata\['loss'\] is nan; JSON holds finite numbers only"),
        (hand_set_network, {1: "a"}, r"metadata has the key 1 of type int; JSON keys are strings"),
        (hand_set_network, ["a"], r"metadata must be a dict of JSON values or None, got list"),
    ],
    ids=["incomplete-settings", "affine-subclass", "tuple", "numpy-int", "nan", "int-key", "list"],
)
def test_save_refuses_what_a_file_cannot_hold(tmp_path, make, metadata, message):
    path = tmp_path / "m.npz"
    with pytest.raises(ModelFileError, match=message):
        save(make(), path, metadata=metadata)
    assert list(tmp_path.iterdir()) == []
    with pytest.raises(ModelFileError, match=message):
        model_parts(make(), metadata)


def test_save_refuses_self_containing_metadata(tmp_path):
    metadata: dict = {}
    metadata["self"] = metadata
    with pytest.raises(ModelFileError, match=r"nested more than 64 levels deep \(or contains itself\)"):
        save(hand_set_network(), tmp_path / "m.npz", metadata=metadata)


def test_save_refuses_non_finite_weights(tmp_path):
    net = hand_set_network()
    net.layers[3].weight[0, 1] = np.inf
    with pytest.raises(ModelFileError, match=r"array layer3.weight has a non-finite value \(inf\) at row 0, column 1"):
        save(net, tmp_path / "m.npz")
    with pytest.raises(ModelFileError, match=r"array layer3.weight has a non-finite value \(inf\) at row 0, column 1"):
        model_parts(net)


# ---------------------------------------------------------------- tampering
def test_flipped_byte_in_an_array_is_refused(saved):
    path, net = saved
    data = bytearray(path.read_bytes())
    at = data.index(net.layers[1].weight.tobytes())  # layer1.weight as stored (little-endian machine)
    data[at + 3] ^= 0x01
    path.write_bytes(bytes(data))
    with pytest.raises(ModelFileError, match=r"model\.npz: the archive is damaged or truncated "
                                             r".*CRC-32 for file 'layer1\.weight\.npy'"):
        load(path)


def test_changed_array_with_recomputed_zip_checksum_is_refused_by_sha256(saved):
    path, net = saved
    changed = net.layers[1].weight.copy()
    changed[0, 0] = np.nextafter(changed[0, 0], 1.0)  # one unit in the last place
    replace_array(path, "layer1.weight", changed, update_record=False)
    with pytest.raises(ModelFileError,
                       match=r"array 'layer1\.weight': SHA-256 of the stored data is [0-9a-f]{64}, the manifest lists"):
        load(path)


def test_edited_shape_in_the_manifest_is_refused(saved):
    path, _ = saved

    def edit(manifest):
        manifest["arrays"][2]["shape"] = [1, 4]

    edit_manifest(path, edit)
    with pytest.raises(ModelFileError, match=r"array 'layer1\.weight': the manifest lists shape \[1, 4\] "
                                             r"but the member holds shape \[2, 2\]"):
        load(path)


def test_edited_layer_width_in_the_manifest_is_refused(saved):
    path, _ = saved
    edit_manifest(path, lambda m: m["layers"][1].update(n_out=3))
    with pytest.raises(ModelFileError, match=r"array layer1\.weight is float64 of shape \(2, 2\); "
                                             r"its layer needs float64 of shape \(3, 2\)"):
        load(path)


@pytest.mark.parametrize("keep", [0, 1, 30, 200, -200, -22, -1])
def test_truncated_file_is_refused(saved, keep):
    path, _ = saved
    data = path.read_bytes()
    path.write_bytes(data[:keep] if keep >= 0 else data[:keep])
    with pytest.raises(ModelFileError,
                       match=r"model\.npz: (not a tinyprop archive|the archive is damaged or truncated)"):
        load(path)


def test_array_of_another_dtype_is_refused(saved):
    path, net = saved
    replace_array(path, "layer1.weight", net.layers[1].weight.astype(np.float32), update_record=False)
    with pytest.raises(ModelFileError,
                       match=r"manifest lists dtype float64 \(<f8\) but the member holds dtype float32 \(<f4\)"):
        load(path)


def test_array_of_another_dtype_with_a_matching_record_is_refused(saved):
    path, net = saved
    replace_array(path, "layer1.weight", net.layers[1].weight.astype(np.float32), update_record=True)
    with pytest.raises(ModelFileError,
                       match=r"array layer1\.weight is float32 of shape \(2, 2\); its layer needs float64"):
        load(path)


def test_big_endian_array_is_refused(saved):
    path, net = saved
    replace_array(path, "layer1.bias", net.layers[1].bias.astype(">f8"), update_record=False)
    with pytest.raises(ModelFileError, match=r"member holds dtype >f8 \(>f8\)"):
        load(path)


def test_unexpected_member_is_refused(saved):
    path, _ = saved
    members = read_members(path)
    members["extra.npy"] = npy_bytes(np.zeros(3))
    write_members(path, members)
    with pytest.raises(ModelFileError, match=r"unexpected member\(s\) \['extra\.npy'\], not listed in the manifest"):
        load(path)


def test_missing_member_is_refused(saved):
    path, _ = saved
    members = read_members(path)
    del members["layer3.weight.npy"]
    write_members(path, members)
    with pytest.raises(ModelFileError,
                       match=r"member\(s\) \['layer3\.weight\.npy'\] listed in the manifest are missing"):
        load(path)


def test_duplicate_member_is_refused(saved):
    path, _ = saved
    with zipfile.ZipFile(path, "a") as archive, pytest.warns(UserWarning, match="Duplicate name"):
        archive.writestr("layer1.bias.npy", npy_bytes(np.zeros(2)))
    with pytest.raises(ModelFileError, match=r"more than one member named \['layer1\.bias\.npy'\]"):
        load(path)


def test_compressed_member_is_refused(saved):
    path, _ = saved
    write_members(path, read_members(path), compress_type=zipfile.ZIP_DEFLATED)
    with pytest.raises(ModelFileError, match=r"member 'manifest\.json' is compressed \(ZIP method 8\)"):
        load(path)


@pytest.mark.parametrize(
    "edit, message",
    [
        (lambda m: m["layers"][1].update(n_in="2"), r"layer 1: n_in must be an integer from 1 to \d+, found '2'"),
        (lambda m: m["layers"][1].update(n_out=2.0), r"layer 1: n_out must be an integer .* found 2\.0"),
        (lambda m: m["layers"][1].update(n_in=True), r"layer 1: n_in must be an integer .* found True"),
        (lambda m: m["layers"][3].update(bias=0), r"layer 3: bias must be true or false, found 0"),
        (lambda m: m["layers"][0].update(width=-2), r"layer 0: width must be an integer from 1 .* found -2"),
        (lambda m: m["layers"][2].update(kind="convolution"), r"layer 2: kind must be one of .* found 'convolution'"),
        (lambda m: m["layers"][2].update(extra=1),
         r"layer 2 \(activation\) must have exactly the fields \['kind', 'name', 'settings'\]"),
        (lambda m: m["layers"][2].update(settings=[0.25]),
         r"settings of activation 'LeakyReLU' must be a dict, found list"),
        (lambda m: m["layers"][2].update(name=7), r"layer 2: the activation name must be a string, found 7"),
        (lambda m: m.update(layers={"0": {}}), r"'layers' must be a list of 1 to 10000 layers, found dict"),
        (lambda m: m.update(layers=[]), r"'layers' must be a list of 1 to 10000 layers, found 0 entries"),
        (lambda m: m.update(format_version="1"), r"'format_version' is '1'; this tinyprop reads version 1"),
        (lambda m: m.update(format_version=2), r"'format_version' is 2; this tinyprop reads version 1"),
        (lambda m: m.update(format="other"), r"'format' is 'other', expected 'tinyprop-model'"),
        (lambda m: m.update(dtype="float16"), r"'dtype' is 'float16', expected one of \['float64', 'float32'\]"),
        (lambda m: m.update(n_params=9), r"'n_params' is 9, the layers hold 8"),
        (lambda m: m.update(n_params=None), r"'n_params' must be a positive integer, found None"),
        (lambda m: m.update(fingerprint=m["fingerprint"].upper()), r"'fingerprint' must be 64 lowercase hex digits"),
        (lambda m: m.update(metadata=["a"]), r"'metadata' must be an object, found list"),
        (lambda m: m.update(tinyprop_version=1), r"'tinyprop_version' must be a string of 1 to 64 characters, found 1"),
        (lambda m: m.update(extra=1), r"manifest fields: missing \[\], unknown \['extra'\]"),
        (lambda m: m.pop("dtype"), r"manifest fields: missing \['dtype'\], unknown \[\]"),
        (lambda m: m.update(arrays={}), r"manifest field 'arrays' must be a list, found dict"),
        (lambda m: m["arrays"][0].update(sha256="0" * 63),
         r"array 'layer0\.mean': sha256 must be 64 lowercase hex digits"),
        (lambda m: m["arrays"][0].update(dtype="object"), r"array 'layer0\.mean': dtype 'object' is not allowed"),
        (lambda m: m["arrays"][0].update(shape=[-2]),
         r"array 'layer0\.mean': shape must be a list of at most 32 non-negative integers"),
        (lambda m: m["arrays"][0].update(name="../evil"), r"'name' must be a new array name .* found '\.\./evil'"),
        (lambda m: m["arrays"][0].pop("sha256"),
         r"'arrays'\[0\] must be an object with keys \['dtype', 'name', 'sha256', 'shape'\]"),
        (lambda m: m["arrays"].reverse(),
         r"the arrays \['layer4\.scale', .*\] do not match the layers, which need \['layer0\.mean'"),
    ],
)
def test_manifest_with_wrong_fields_is_refused(saved, edit, message):
    path, _ = saved
    edit_manifest(path, edit)
    with pytest.raises(ModelFileError, match=message):
        load(path)


def test_changed_activation_setting_is_refused_by_the_fingerprint(saved):
    path, _ = saved
    edit_manifest(path, lambda m: m["layers"][2]["settings"].update(slope=0.5))
    with pytest.raises(ModelFileError,
                       match=r"fingerprint mismatch: the manifest lists [0-9a-f]{64}, the file's contents give"):
        load(path)


def test_unknown_activation_name_is_refused_with_how_to_register(saved):
    path, _ = saved
    edit_manifest(path, lambda m: m["layers"][2].update(name="SwishOfMine", settings={}))
    with pytest.raises(
        ModelFileError,
        match=r"names the activation 'SwishOfMine', which is not registered in this program; "
        r".*register_activation\(<class>, name='SwishOfMine'\)",
    ):
        load(path)


def test_activation_constructor_failure_is_reported_as_a_file_problem(saved):
    path, _ = saved
    edit_manifest(path, lambda m: m["layers"][2].update(settings={"slope": -1.0}))
    with pytest.raises(ModelFileError, match=r"'LeakyReLU' could not be rebuilt as LeakyReLU\(\*\*"
                                             r"\{'slope': -1\.0\}\): "
                                             r"ValueError: LeakyReLU slope must be"):
        load(path)
    edit_manifest(path, lambda m: m["layers"][2].update(settings={"steepness": 1.0}))
    with pytest.raises(ModelFileError, match=r"could not be rebuilt .*TypeError: .*'steepness'"):
        load(path)


def test_non_positive_scale_is_refused_even_with_consistent_hashes(saved):
    path, _ = saved
    replace_array(path, "layer0.scale", np.array([4.0, -0.5]), update_record=True)
    with pytest.raises(ModelFileError, match=r"layer 0 \(standardize\): scale must be positive, got -0\.5 at column 1"):
        load(path)


def test_non_finite_weight_is_refused_even_with_consistent_hashes(saved):
    path, net = saved
    weight = net.layers[1].weight.copy()
    weight[1, 0] = np.nan
    replace_array(path, "layer1.weight", weight, update_record=True)
    with pytest.raises(ModelFileError, match=r"array layer1\.weight has a non-finite value \(nan\) at row 1, column 0"):
        load(path)


@pytest.mark.parametrize(
    "text, message",
    [
        (b"\xff\xfe not utf-8", r"manifest\.json is not valid UTF-8 JSON"),
        (b'{"format": "tinyprop-model",', r"manifest\.json is not valid UTF-8 JSON: Expecting"),
        (b'{"a": 1, "a": 2}', r"duplicate key\(s\) \['a'\]"),
        (b'{"a": NaN}', r"NaN is not a JSON number"),
        (b"[" * 100_000 + b"]" * 100_000, r"manifest\.json is not valid UTF-8 JSON"),
        (b"[1, 2]", r"manifest\.json must hold a JSON object, found list"),
    ],
    ids=["not-utf8", "cut-json", "duplicate-key", "nan", "deeply-nested", "not-object"],
)
def test_malformed_manifest_text_is_refused(saved, text, message):
    path, _ = saved
    members = read_members(path)
    members["manifest.json"] = text
    write_members(path, members)
    with pytest.raises(ModelFileError, match=message):
        load(path)


# ---------------------------------------------------------------- no pickle, ever
class LeavesAMark:
    """Unpickling this creates the file at ``marker`` (the side effect the tests look for)."""

    def __init__(self, marker: str) -> None:
        self.marker = marker

    def __reduce__(self):
        return (open, (self.marker, "w"))


def test_the_payload_really_has_a_side_effect(tmp_path):
    marker = tmp_path / "marker"
    pickle.loads(pickle.dumps(LeavesAMark(str(marker)))).close()  # control: the payload works when unpickled
    assert marker.exists()


@pytest.mark.parametrize("claim_object_dtype", [False, True])
def test_pickled_object_array_is_refused_and_never_run(saved, tmp_path, claim_object_dtype):
    path, _ = saved
    marker = tmp_path / "marker"
    payload = np.empty(4, dtype=object)
    payload[:] = [LeavesAMark(str(marker))] * 4
    members = read_members(path)
    members["layer1.weight.npy"] = npy_bytes(payload, allow_pickle=True)
    if claim_object_dtype:
        manifest = json.loads(members["manifest.json"])
        manifest["arrays"][2]["dtype"] = "object"
        members["manifest.json"] = json.dumps(manifest).encode()
    write_members(path, members)
    expected = r"dtype 'object' is not allowed" if claim_object_dtype else (
        r"array 'layer1\.weight': the manifest lists dtype float64 \(<f8\) but the member holds dtype object \(\|O\)"
    )
    with pytest.raises(ModelFileError, match=expected):
        load(path)
    assert not marker.exists()


def test_a_plain_pickle_file_is_refused_and_never_run(tmp_path):
    marker = tmp_path / "marker"
    path = tmp_path / "model.npz"
    path.write_bytes(pickle.dumps(LeavesAMark(str(marker))))
    with pytest.raises(ModelFileError, match=r"not a tinyprop archive: it does not start with a ZIP signature"):
        load(path)
    assert not marker.exists()


def test_a_lone_npy_file_holding_a_pickle_is_refused_and_never_run(tmp_path):
    marker = tmp_path / "marker"
    path = tmp_path / "model.npz"
    payload = np.empty(1, dtype=object)
    payload[0] = LeavesAMark(str(marker))
    path.write_bytes(npy_bytes(payload, allow_pickle=True))
    with pytest.raises(ModelFileError, match=r"does not start with a ZIP signature \(first bytes b'\\x93NUMPY"):
        load(path)
    assert not marker.exists()


# ---------------------------------------------------------------- crash safety
def temporary_files(folder) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if p.name.endswith(".tmp"))


@pytest.mark.parametrize("failing_call", ["write", "fsync", "replace"])
def test_a_failed_save_leaves_the_previous_file_intact(saved, monkeypatch, failing_call):
    path, net = saved
    before = path.read_bytes()
    real = getattr(os, failing_call)
    calls = []

    def fail_midway(*args):
        calls.append(args)
        if failing_call == "write" and len(calls) == 1:
            fd, data = args
            return real(fd, bytes(data[: len(data) // 2]))  # a short write: half the archive reaches the disk
        raise OSError(errno.ENOSPC, f"simulated failure in os.{failing_call}")

    monkeypatch.setattr(os, failing_call, fail_midway)
    other = net.copy()
    other.layers[1].weight[...] = 0.0
    with pytest.raises(OSError, match=f"simulated failure in os.{failing_call}"):
        save(other, path)
    monkeypatch.undo()
    assert calls, "the simulated failure was never reached"
    assert path.read_bytes() == before
    assert_same_network(load(path), net)
    assert temporary_files(path.parent) == []


def test_an_interrupted_save_removes_its_temporary_file(saved, monkeypatch):
    path, net = saved
    before = path.read_bytes()

    def interrupt(fd):
        raise KeyboardInterrupt

    monkeypatch.setattr(os, "fsync", interrupt)
    with pytest.raises(KeyboardInterrupt):
        save(net, path, metadata={"second": True})
    monkeypatch.undo()
    assert path.read_bytes() == before
    assert temporary_files(path.parent) == []


def test_a_failed_first_save_leaves_nothing_behind(tmp_path, monkeypatch):
    def fail(*args):
        raise OSError(errno.EIO, "simulated I/O error")

    monkeypatch.setattr(os, "replace", fail)
    with pytest.raises(OSError, match="simulated I/O error"):
        save(hand_set_network(), tmp_path / "new.npz")
    monkeypatch.undo()
    assert list(tmp_path.iterdir()) == []


def test_saving_into_a_missing_folder_raises_os_error(tmp_path):
    with pytest.raises(FileNotFoundError):
        save(hand_set_network(), tmp_path / "no" / "such" / "model.npz")
    assert list(tmp_path.iterdir()) == []


def test_loading_a_missing_file_raises_os_error(tmp_path):
    with pytest.raises(FileNotFoundError):
        load(tmp_path / "absent.npz")


# ---------------------------------------------------------------- description
def test_describe_lists_layers_shapes_counts_fingerprint_and_metadata():
    net = hand_set_network()
    text = describe(net, {"data": "synthetic", "epochs": 40})
    lines = text.splitlines()
    assert lines[0] == "network: 2 inputs -> 1 output, 8 parameters, float64"
    assert lines[1] == f"fingerprint: {fingerprint(net)}"
    assert "affine          2 -> 2, weight (2, 2), bias (2,), 6 parameters" in text
    assert "affine          2 -> 1, weight (1, 2), 2 parameters" in text
    assert "activation      LeakyReLU(slope=0.25)" in text
    assert "standardize     width 2" in text and "unstandardize   width 1" in text
    assert '"epochs": 40' in text


def test_describe_works_for_a_network_a_file_cannot_hold():
    class Unlisted(tp.Activation):
        pass

    text = describe(tp.Network([tp.Affine(2, 3), Unlisted(), tp.Affine(3, 2)], seed=0))
    assert "network: 2 inputs -> 2 outputs, 17 parameters, float64" in text
    assert "fingerprint: none (layer 1 is the activation" in text
    assert "Unlisted (not registered)()" in text


# ---------------------------------------------------------------- the reusable archive
def assert_same_arrays(found: dict[str, np.ndarray], expected: dict[str, np.ndarray]) -> None:
    """The same names in the same order, and per name the same dtype, shape and bytes (NaN payloads included)."""
    assert list(found) == list(expected)
    for name, array in expected.items():
        assert found[name].dtype == array.dtype and found[name].shape == array.shape
        assert found[name].tobytes() == array.tobytes()


def assert_archive_round_trip(path, arrays: dict[str, np.ndarray], manifest: dict) -> None:
    """``read_archive`` gives back exactly what ``write_archive`` wrote to ``path``."""
    write_archive(path, arrays, manifest)
    read_arrays, read_manifest = read_archive(path)
    assert read_manifest == manifest
    assert_same_arrays(read_arrays, arrays)


def test_archive_round_trip_with_nested_names_and_state_like_content(tmp_path):
    arrays = {
        "weights/0": np.arange(6.0).reshape(2, 3),
        "optimizer/m/0": np.zeros((2, 3), np.float32),
        "counts": np.array([3, 1], np.int64),
        "mask": np.array([True, False]),
        "scalar": np.array(2.5),
    }
    manifest = {"epoch": 4, "rng": {"state": 2**100 + 7, "inc": 3}, "history": [0.5, 0.25], "note": None}
    path = tmp_path / "state.npz"
    assert_archive_round_trip(path, arrays, manifest)
    with np.load(path, allow_pickle=False) as archive:  # numpy's own reader
        assert np.array_equal(archive["optimizer/m/0"], arrays["optimizer/m/0"])


def test_archive_writes_big_endian_and_fortran_arrays_in_the_standard_layout(tmp_path):
    array = np.asfortranarray(np.arange(6.0).reshape(2, 3)).astype(">f8")
    write_archive(tmp_path / "a.npz", {"a": array}, {})
    read = read_archive(tmp_path / "a.npz")[0]["a"]
    assert read.dtype.str == "<f8" and read.flags.c_contiguous and np.array_equal(read, array)


@pytest.mark.parametrize(
    "arrays, manifest, message",
    [
        ({"../escape": np.zeros(1)}, {}, r"array names are 1 to 200 characters.*got '\.\./escape'"),
        ({"a//b": np.zeros(1)}, {}, r"array names are .*got 'a//b'"),
        ({"w": [1.0, 2.0]}, {}, r"array 'w' must be a numpy array, got list"),
        ({"w": np.array(["x"])}, {}, r"array 'w' has dtype <U1; allowed: bool, int8"),
        ({"w": np.array([None])}, {}, r"array 'w' has dtype object; allowed"),
        ({"w": np.zeros(2, np.complex128)}, {}, r"array 'w' has dtype complex128; allowed"),
        ({}, {"arrays": []}, r"the manifest key 'arrays' is reserved"),
        ({}, [("a", 1)], r"the manifest must be a dict, got list"),
        ({}, {"loss": float("inf")}, r"manifest\['loss'\] is inf; JSON holds finite numbers only"),
        ([np.zeros(1)], {}, r"arrays must be a dict of name to numpy array, got list"),
    ],
)
def test_archive_refuses_what_it_cannot_store(tmp_path, arrays, manifest, message):
    with pytest.raises(ArchiveError, match=message):
        write_archive(tmp_path / "a.npz", arrays, manifest)
    assert list(tmp_path.iterdir()) == []
