"""Ensemble: mean and spread, one-file save/load, exported code for the mean, and UCI concrete.

References outside the project:
- numpy's ``mean`` and ``std`` (ddof=0) for the two formulas;
- the variance decomposition of the mean squared error (a handbook identity:
  mean_k (y_k - t)^2 = (mean_k y_k - t)^2 + spread^2), which also proves that
  the ensemble's squared error never exceeds its members' average;
- gcc (``-std=c99 -Wall -Wextra -Werror -pedantic``) as the judge of the generated
  C, and ``python -I -S`` (no site packages) for the generated Python;
- the UCI concrete compressive strength data, Yeh, I-C. (1998), "Modeling of
  strength of high-performance concrete using artificial neural networks",
  Cement and Concrete Research 28(12), from the UCI Machine Learning Repository
  (Dua & Graff 2019), with the fixed splits of Hernandez-Lobato & Adams (2015).

Networks and inputs other than the concrete data are synthetic.
"""

from __future__ import annotations

import functools
import json
import shutil
import subprocess
import sys
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import tinyprop as tp
from tinyprop.archive import read_archive, write_archive
from tinyprop.datasets import load_uci
from tinyprop.ensemble import Ensemble
from tinyprop.modelfile import ModelFileError
from tinyprop.recipes import TabularRegression
from tinyprop.sweep import sweep

sys.path.insert(0, str(Path(__file__).resolve().parent))
from test_export_c import run_predict_driver  # noqa: E402  (the export tests' exact-input C driver)

CC = shutil.which("gcc") or shutil.which("cc")
needs_cc = pytest.mark.skipif(CC is None, reason="no C compiler: neither gcc nor cc is on PATH")


def random_members(count: int, sizes: list[int], seed: int, dtype=np.float64) -> list[tp.Network]:
    """Synthetic members: tanh networks of the given widths with weights drawn from N(0, 1)."""
    rng = np.random.default_rng(seed)
    members = []
    for _ in range(count):
        net = tp.build_mlp(sizes, activation=tp.Tanh(), dtype=dtype, seed=0)
        net.set_vector(rng.normal(0.0, 1.0, net.n_params))
        members.append(net)
    return members


MEMBERS = random_members(4, [3, 5, 2], seed=1)
INPUTS = np.random.default_rng(2).normal(0.0, 1.5, (9, 3))


# ----------------------------------------------------------------------------- formulas
@settings(max_examples=40, deadline=None)
@given(
    count=st.integers(1, 6),
    sizes=st.lists(st.integers(1, 5), min_size=2, max_size=4),
    seed=st.integers(0, 2**32 - 1),
    dtype=st.sampled_from([np.float32, np.float64]),
)
def test_mean_and_spread_match_numpy(count, sizes, seed, dtype):
    ensemble = Ensemble(random_members(count, sizes, seed, dtype))
    X = np.random.default_rng(seed).normal(0.0, 2.0, (7, sizes[0]))
    outputs = np.stack([net.predict(X.astype(dtype)) for net in ensemble.members])
    mean, spread = ensemble.predict_with_spread(X)
    assert mean.dtype == spread.dtype == np.dtype(dtype) and mean.shape == (7, sizes[-1])
    tolerance = 1e-5 if dtype is np.float32 else 1e-13
    np.testing.assert_allclose(mean, np.mean(outputs, axis=0), rtol=tolerance, atol=tolerance)
    np.testing.assert_allclose(spread, np.std(outputs, axis=0, ddof=0), rtol=tolerance * 10, atol=tolerance * 10)
    assert np.array_equal(ensemble.predict(X), mean)
    assert np.array_equal(ensemble.member_predictions(X), outputs)
    if count == 1:
        assert np.all(spread == 0)


def test_variance_decomposition_of_the_squared_error():
    ensemble = Ensemble(MEMBERS)
    target = np.random.default_rng(3).normal(size=(len(INPUTS), 2))  # synthetic targets
    mean, spread = ensemble.predict_with_spread(INPUTS)
    member_errors = np.mean((ensemble.member_predictions(INPUTS) - target) ** 2, axis=0)
    np.testing.assert_allclose(member_errors, (mean - target) ** 2 + spread**2, rtol=1e-12)


def test_members_are_copies():
    members = random_members(2, [2, 3, 1], seed=4)
    ensemble = Ensemble(members)
    before = ensemble.predict(INPUTS[:, :2])
    members[0].params[0][...] = 0.0
    assert np.array_equal(ensemble.predict(INPUTS[:, :2]), before)
    assert ensemble.members[0] is not members[0]


def test_summary_properties():
    ensemble = Ensemble(MEMBERS)
    assert (ensemble.n_members, ensemble.n_in, ensemble.n_out, ensemble.dtype) == (4, 3, 2, np.dtype(np.float64))
    assert repr(ensemble) == "Ensemble(4 members, 3 -> 2, float64)"


# ----------------------------------------------------------------------------- one file
def test_save_and_load_round_trip(tmp_path):
    ensemble = Ensemble(MEMBERS, metadata={"trained on": "synthetic", "seeds": [0, 1, 2, 3]})
    path = tmp_path / "ensemble.npz"
    digest = ensemble.save(path)
    loaded = Ensemble.load(path)
    assert digest == ensemble.fingerprint() == loaded.fingerprint()
    assert loaded.metadata == {"trained on": "synthetic", "seeds": [0, 1, 2, 3]}
    for a, b in zip(ensemble.members, loaded.members):
        assert tp.fingerprint(a) == tp.fingerprint(b)
        assert all(np.array_equal(p, q) for p, q in zip(a.params, b.params))
    assert np.array_equal(loaded.predict(INPUTS), ensemble.predict(INPUTS))
    # numpy reads the same file as an .npz, without pickle
    with np.load(path, allow_pickle=False) as archive:
        assert np.array_equal(archive["member2/layer0.weight"], MEMBERS[2].layers[0].weight)
        arrays = [name for name in archive.files if name != "manifest.json"]
        assert len(arrays) == 4 * 4  # four members, two affine layers with weight and bias each
    manifest = read_archive(path)[1]
    assert manifest["format"] == "tinyprop-ensemble" and manifest["n_members"] == 4
    assert [m["fingerprint"] for m in manifest["members"]] == [tp.fingerprint(net) for net in MEMBERS]


def test_fingerprint_is_the_documented_hash():
    import hashlib

    text = json.dumps({"format": "tinyprop-ensemble-fingerprint", "version": 1,
                       "members": [tp.fingerprint(net) for net in MEMBERS]}, sort_keys=True, separators=(",", ":"))
    assert Ensemble(MEMBERS).fingerprint() == hashlib.sha256(text.encode("ascii")).hexdigest()
    assert Ensemble(MEMBERS[::-1]).fingerprint() != Ensemble(MEMBERS).fingerprint()  # order matters (the sum's order)


def rewrite(path: Path, change) -> None:
    """Read the archive, let ``change(arrays, manifest)`` edit it, write it back consistently (fresh hashes)."""
    arrays, manifest = read_archive(path)
    change(arrays, manifest)
    write_archive(path, arrays, manifest)


def swap_members(arrays, manifest):
    manifest["members"][0], manifest["members"][1] = manifest["members"][1], manifest["members"][0]
    renamed = {}
    for name, array in arrays.items():
        head, _, rest = name.partition("/")
        head = {"member0": "member1", "member1": "member0"}.get(head, head)
        renamed[f"{head}/{rest}"] = array
    arrays.clear()
    arrays.update(renamed)


@pytest.mark.parametrize(
    "change, message",
    [
        (lambda arrays, manifest: arrays["member1/layer2.bias"].__iadd__(1.0), r"member 1: .*fingerprint mismatch"),
        (swap_members, "ensemble fingerprint mismatch"),
        (lambda arrays, manifest: arrays.update(extra=np.zeros(2)), r"array 'extra' belongs to no member"),
        (lambda arrays, manifest: arrays.update({"member9/x": np.zeros(2)}), r"'member9/x' belongs to no member"),
        (lambda arrays, manifest: manifest.update(n_members=3), r"'n_members' \(3\) must equal"),
        (lambda arrays, manifest: manifest.update(format="tinyprop-model"), "not a version-1 tinyprop-ensemble"),
        (lambda arrays, manifest: manifest.pop("metadata"), "manifest fields must be exactly"),
        (lambda arrays, manifest: manifest["members"][0]["layers"].pop(), r"member 0: .*arrays"),
    ],
    ids=["changed weight", "swapped members", "stray array", "unknown member", "count", "format", "field",
         "layer removed"],
)
def test_tampered_files_are_refused(tmp_path, change, message):
    path = tmp_path / "ensemble.npz"
    Ensemble(MEMBERS).save(path)
    rewrite(path, change)
    with pytest.raises(ModelFileError, match=message):
        Ensemble.load(path)


def test_damaged_bytes_and_failed_saves(tmp_path):
    path = tmp_path / "ensemble.npz"
    Ensemble(MEMBERS).save(path)
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0xFF
    damaged = tmp_path / "damaged.npz"
    damaged.write_bytes(bytes(data))
    with pytest.raises(ModelFileError, match="damaged.npz"):
        Ensemble.load(damaged)

    class Unregistered(tp.Tanh):
        pass

    odd = tp.Network([tp.Affine(3, 2), Unregistered()], seed=0)
    before = path.read_bytes()
    with pytest.raises(ModelFileError, match="not registered"):
        Ensemble([MEMBERS[0], odd]).save(path)
    assert path.read_bytes() == before  # the earlier file is untouched


# ----------------------------------------------------------------------------- exported mean
def test_python_export_is_the_mean_of_the_member_exports(tmp_path):
    ensemble = Ensemble(MEMBERS)
    package = ensemble.export_python(tmp_path, name="averaged")
    assert sorted(p.name for p in package.iterdir()) == ["__init__.py"] + [f"member{k}.py" for k in range(4)]
    script = (
        "import json, sys\n"
        f"sys.path.insert(0, {str(tmp_path)!r})\n"
        "import averaged\n"
        "from averaged import member0, member1, member2, member3\n"
        f"rows = {INPUTS.tolist()!r}\n"
        "mean = [averaged.predict(x) for x in rows]\n"
        "members = [[m.predict(x) for x in rows] for m in (member0, member1, member2, member3)]\n"
        "print(json.dumps([mean, members, averaged.FINGERPRINT, list(averaged.MEMBER_FINGERPRINTS)]))\n"
    )
    run = subprocess.run([sys.executable, "-I", "-S", "-c", script], capture_output=True, text=True, check=True)
    mean, members, digest, member_digests = json.loads(run.stdout)
    assert digest == ensemble.fingerprint()
    assert member_digests == [tp.fingerprint(net) for net in MEMBERS]
    # the wrapper's arithmetic, spelled out: (0.0 + y_0 + y_1 + y_2 + y_3) / 4 in Python floats
    expected = [[(0.0 + a + b + c + d) / 4 for a, b, c, d in zip(*(m[i] for m in members))] for i in range(len(INPUTS))]
    assert mean == expected
    difference = np.abs(np.array(mean) - ensemble.predict(INPUTS))
    assert np.all(difference <= ensemble.agreement_bound(INPUTS))


def compile_and_run(directory: Path, name: str, ctype: str, X: np.ndarray, n_out: int,
                    sources: list[str]) -> np.ndarray:
    """Compile the exported files with the export tests' driver, run ``<name>_predict`` normally and in place."""
    y, y_in_place = run_predict_driver(directory, name, ctype, X, n_out, sources)
    assert np.array_equal(y, y_in_place)  # x and y may be the same array
    return y


@needs_cc
@pytest.mark.parametrize("dtype, ctype", [("float64", "double"), ("float32", "float")])
def test_c_export_computes_the_mean(tmp_path, dtype, ctype):
    ensemble = Ensemble(MEMBERS)
    paths = ensemble.export_c(tmp_path, name="averaged", dtype=dtype)
    assert [p.name for p in paths[:2]] == ["averaged.h", "averaged.c"] and len(paths) == 2 + 2 * 4
    header = (tmp_path / "averaged.h").read_text()
    assert f'#define AVERAGED_FINGERPRINT "{ensemble.fingerprint()}"' in header
    assert "#define AVERAGED_N_MEMBERS 4" in header and "not certified for safety functions" in header
    X = INPUTS.astype(dtype)
    y = compile_and_run(tmp_path, "averaged", ctype, X, 2, [p.name for p in paths if p.suffix == ".c"])
    reference = Ensemble([net.copy(dtype=dtype) for net in MEMBERS]).predict(X).astype(np.float64)
    assert np.all(np.abs(y - reference) <= ensemble.agreement_bound(X, dtype=dtype))


# ----------------------------------------------------------------------------- bad input
@pytest.mark.parametrize(
    "networks, metadata, error, message",
    [
        ([], None, ValueError, "at least one network"),
        (MEMBERS[0], None, TypeError, "networks must be a list"),
        ([MEMBERS[0], "net"], None, TypeError, r"networks\[1\] must be a tinyprop Network, got str"),
        ([MEMBERS[0], random_members(1, [2, 5, 2], 0)[0]], None, ValueError, r"networks\[1\] has 2 -> 2, float64"),
        ([MEMBERS[0], MEMBERS[1].copy(dtype=np.float32)], None, ValueError, r"networks\[1\] has 3 -> 2, float32"),
        (MEMBERS, {"seeds": (1, 2)}, ValueError, "type tuple"),
        (MEMBERS, [("a", 1)], TypeError, "metadata must be a dict"),
    ],
)
def test_bad_ensembles(networks, metadata, error, message):
    with pytest.raises(error, match=message):
        Ensemble(networks, metadata=metadata)


def test_bad_export_arguments(tmp_path):
    ensemble = Ensemble(MEMBERS)
    with pytest.raises(ValueError, match="standard-library module name"):
        ensemble.export_python(tmp_path, name="json")
    with pytest.raises(ValueError, match="must match"):
        ensemble.export_c(tmp_path, name="a" * 60)  # a_..._member3 would be longer than 64 characters
    with pytest.raises(ValueError, match="underscore"):
        ensemble.export_c(tmp_path, name="_hidden")
    with pytest.raises(TypeError, match="dtype must be 'float32' or 'float64'"):
        ensemble.export_c(tmp_path, dtype="float16")
    with pytest.raises(ValueError, match="existing directory"):
        ensemble.export_c(tmp_path / "missing")


# ----------------------------------------------------------------------------- UCI concrete
def concrete_ensemble_vs_members(split: int) -> tuple[float, list[float]]:
    """Five members of the default recipe (seeds 0-4) on one concrete split: (ensemble RMSE, member RMSEs)."""
    X_train, y_train, X_test, y_test = load_uci("concrete").split(split)
    result = sweep(TabularRegression(), [{"seed": seed} for seed in range(5)], X_train, y_train,
                   test=(X_test, y_test), executor=functools.partial(ProcessPoolExecutor, max_workers=2))
    assert all(record.ok for record in result.records)
    ensemble = Ensemble(list(result.networks))
    mean, spread = ensemble.predict_with_spread(X_test)
    residual = mean[:, 0] - y_test
    members = [record.test_rmse for record in result.records]
    # Jensen: the ensemble's MSE = the members' average MSE - the average squared spread
    np.testing.assert_allclose(np.mean(residual**2), np.mean(np.square(members)) - np.mean(spread**2), rtol=1e-9)
    return float(np.sqrt(np.mean(residual**2))), members


def test_concrete_ensemble_beats_the_median_member():
    """Split 0 of UCI concrete (Yeh 1998; UCI repository), 5 members of the default recipe, seeds 0-4.

    Measured: member test RMSEs 5.657, 5.744, 5.858, 5.342, 5.671 MPa (median
    5.671); the ensemble's mean prediction 5.433 MPa.
    """
    ensemble_rmse, members = concrete_ensemble_vs_members(0)
    assert ensemble_rmse <= np.median(members)


@pytest.mark.slow
def test_concrete_ensemble_beats_the_median_member_on_every_split():
    """All 20 splits of UCI concrete (Yeh 1998; UCI repository; Hernandez-Lobato & Adams 2015 splits).

    Measured over the 20 splits: ensemble test RMSE 5.14 MPa on average against
    5.49 MPa for the median member; the ensemble was ahead on every split
    (smallest margin 0.21 MPa, split 2: 4.981 against 5.187).
    """
    for split in range(20):
        ensemble_rmse, members = concrete_ensemble_vs_members(split)
        assert ensemble_rmse <= np.median(members), (split, ensemble_rmse, members)
