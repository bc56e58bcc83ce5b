"""Tests of the bundled reference data and the dataset loaders.

Independent of tinyprop's network code: only ``tinyprop.datasets`` is imported.
"""

from __future__ import annotations

import csv
import hashlib
import json
import math
from importlib import resources

import numpy as np
import pytest

from tinyprop.datasets import (
    NistProblem,
    UciDataset,
    battery_pack,
    load_nist,
    load_uci,
    nist_names,
    uci_names,
    write_battery_csv,
)
from tinyprop.datasets.battery import (
    BATTERY_COLUMNS,
    BATTERY_TARGET,
    VOLTAGE_NOISE_SD_V,
    ocv_pack,
    pack_resistance,
)
from tinyprop.datasets.nist import parse_nist

DATA = resources.files("tinyprop.datasets")


def _sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _original_digests() -> dict[str, str]:
    """path (relative to the shared data folder) -> SHA-256 recorded at copy time."""
    out = {}
    for line in DATA.joinpath("ORIGINAL_SHA256SUMS.txt").read_text().splitlines():
        digest, path = line.split(maxsplit=1)
        out[path.strip()] = digest
    return out


# --------------------------------------------------------------------------- #
# integrity of the copied files


def test_unchanged_files_match_original_digests():
    digests = _original_digests()
    checked = 0
    for path, digest in digests.items():
        if path.startswith("nist-strd/"):
            local = DATA.joinpath("nist", path.split("/", 1)[1])
        elif "/index_train_" in path or "/index_test_" in path:
            continue  # repacked into splits.json, checked below
        else:
            local = DATA.joinpath(*path.split("/"))
        assert _sha256(local.read_bytes()) == digest, path
        checked += 1
    assert checked == 8 + 3 * 6 + 2  # NIST, UCI (6 unchanged files each), penguins and iris


def test_repacked_split_indices_regenerate_original_files_byte_for_byte():
    digests = _original_digests()
    n_files = 0
    for name in ("concrete", "energy", "power-plant"):
        splits = json.loads(DATA.joinpath("uci", name, "splits.json").read_text())
        for kind in ("train", "test"):
            for k, indices in enumerate(splits[kind]):
                text = "".join(f"{i}\n" for i in indices)
                assert _sha256(text.encode("ascii")) == digests[f"uci/{name}/index_{kind}_{k}.txt"]
                n_files += 1
    assert n_files == 3 * 2 * 20


# --------------------------------------------------------------------------- #
# NIST StRD


def test_nist_names():
    assert set(nist_names()) == {
        "Rat42", "Rat43", "Misra1a", "Misra1b", "Misra1d", "Lanczos3", "Thurber", "Chwirut2",
    }


def test_rat42_values_as_in_file():
    # values copied from the NIST StRD file Rat42.dat
    p = load_nist("Rat42")
    assert isinstance(p, NistProblem)
    assert p.name == "Rat42"
    assert p.model == "y = b1 / (1+exp[b2-b3*x])  +  e"
    assert p.x.shape == (9, 1) and p.y.shape == (9,)
    assert p.x.dtype == np.float64 and p.y.dtype == np.float64
    assert (p.x[0, 0], p.y[0]) == (9.000, 8.930)
    assert (p.x[-1, 0], p.y[-1]) == (79.000, 67.080)
    np.testing.assert_array_equal(p.start1, [100.0, 1.0, 0.1])
    np.testing.assert_array_equal(p.start2, [75.0, 2.5, 0.07])
    np.testing.assert_array_equal(
        p.certified, [7.2462237576e01, 2.6180768402e00, 6.7359200066e-02]
    )
    np.testing.assert_array_equal(
        p.certified_sd, [1.7340283401e00, 8.8295217536e-02, 3.4465663377e-03]
    )
    assert p.certified[0] == 7.2462237576e01
    assert p.certified_rss == 8.0565229338e00
    assert p.certified_residual_sd == 1.1587725499e00
    assert p.degrees_of_freedom == 6


def test_lanczos3_values_as_in_file():
    # values copied from the NIST StRD file Lanczos3.dat
    p = load_nist("Lanczos3")
    assert p.model == "y = b1*exp(-b2*x) + b3*exp(-b4*x) + b5*exp(-b6*x)  +  e"
    assert p.x.shape == (24, 1) and p.y.shape == (24,)
    assert (p.x[0, 0], p.y[0]) == (0.0, 2.5134)
    assert (p.x[-1, 0], p.y[-1]) == (1.15, 0.0624)
    np.testing.assert_array_equal(p.start1, [1.2, 0.3, 5.6, 5.5, 6.5, 7.6])
    np.testing.assert_array_equal(p.start2, [0.5, 0.7, 3.6, 4.2, 4.0, 6.3])
    assert p.certified[0] == 8.6816414977e-02
    assert p.certified[5] == 4.9863565084e00
    assert p.certified_sd[5] == 3.4436403035e-02
    assert p.certified_rss == 1.6117193594e-08
    assert p.certified_residual_sd == 2.9923229172e-05
    assert p.degrees_of_freedom == 18


def test_thurber_two_line_model_and_negative_x():
    # values copied from the NIST StRD file Thurber.dat
    p = load_nist("Thurber")
    assert p.model == (
        "y = (b1 + b2*x + b3*x**2 + b4*x**3) / (1 + b5*x + b6*x**2 + b7*x**3)  +  e"
    )
    assert p.n_parameters == 7 and p.n_observations == 37
    assert (p.x[0, 0], p.y[0]) == (-3.067, 80.574)


def test_chwirut2_leading_dot_numbers():
    # values copied from the NIST StRD file Chwirut2.dat (x written as ".500E0")
    p = load_nist("Chwirut2")
    assert p.n_observations == 54
    assert (p.x[17, 0], p.y[17]) == (0.5, 81.5)


# Model formulas written out from the NIST files, evaluated with numpy only.
_MODELS = {
    "Rat42": lambda b, x: b[0] / (1 + np.exp(b[1] - b[2] * x)),
    "Rat43": lambda b, x: b[0] / (1 + np.exp(b[1] - b[2] * x)) ** (1 / b[3]),
    "Misra1a": lambda b, x: b[0] * (1 - np.exp(-b[1] * x)),
    "Misra1b": lambda b, x: b[0] * (1 - (1 + b[1] * x / 2) ** -2),
    "Misra1d": lambda b, x: b[0] * b[1] * x / (1 + b[1] * x),
    "Lanczos3": lambda b, x: (
        b[0] * np.exp(-b[1] * x) + b[2] * np.exp(-b[3] * x) + b[4] * np.exp(-b[5] * x)
    ),
    "Thurber": lambda b, x: (b[0] + b[1] * x + b[2] * x**2 + b[3] * x**3)
    / (1 + b[4] * x + b[5] * x**2 + b[6] * x**3),
    "Chwirut2": lambda b, x: np.exp(-b[0] * x) / (b[1] + b[2] * x),
}


@pytest.mark.parametrize("name", sorted(_MODELS))
def test_certified_parameters_give_certified_rss(name):
    # Source of the certified values: NIST StRD certified values in the .dat file.
    # Required for Rat42 and Misra1a; the others are checked the same way.
    p = load_nist(name)
    r = p.y - _MODELS[name](p.certified, p.x[:, 0])
    rss = float(r @ r)
    assert rss == pytest.approx(p.certified_rss, rel=1e-8)
    # residual sd = sqrt(RSS / (n - k)) for every file (see the Rat43 note)
    dof = p.n_observations - p.n_parameters
    assert math.sqrt(p.certified_rss / dof) == pytest.approx(p.certified_residual_sd, rel=1e-9)


def test_rat43_printed_degrees_of_freedom_kept_as_published():
    p = load_nist("Rat43")
    assert p.n_observations == 15 and p.n_parameters == 4
    assert p.degrees_of_freedom == 9  # as printed in the file; n - k is 11


def test_nist_name_lookup():
    assert load_nist("rat42").name == "Rat42"
    with pytest.raises(ValueError, match="available: .*Rat42"):
        load_nist("Rat99")


def test_nist_arrays_read_only():
    p = load_nist("Misra1a")
    for arr in (p.x, p.y, p.start1, p.start2, p.certified, p.certified_sd):
        with pytest.raises(ValueError):
            arr[0] = 0.0


def test_parser_follows_data_heading_column_order():
    text = DATA.joinpath("nist", "Misra1a.dat").read_text()
    lines = text.splitlines()
    assert lines[59].split() == ["Data:", "y", "x"]
    lines[59] = "Data:   x               y"
    lines[60:74] = ["  ".join(reversed(line.split())) for line in lines[60:74]]
    swapped = parse_nist("\n".join(lines) + "\n")
    original = load_nist("Misra1a")
    assert swapped.name == "Misra1a"
    np.testing.assert_array_equal(swapped.x, original.x)
    np.testing.assert_array_equal(swapped.y, original.y)


def test_parser_rejects_inconsistent_observation_count():
    text = DATA.joinpath("nist", "Rat42.dat").read_text()
    bad = text.replace("Data              (lines 61 to 69)", "Data              (lines 61 to 68)")
    assert bad != text
    with pytest.raises(ValueError, match="Number of Observations"):
        parse_nist(bad)


# --------------------------------------------------------------------------- #
# UCI


_UCI_EXPECTED = {
    # name: (rows, features, train size, test size)
    "concrete": (1030, 8, 927, 103),
    "energy": (768, 8, 691, 77),
    "power-plant": (9568, 4, 8611, 957),
}


def test_uci_names():
    assert uci_names() == ("concrete", "energy", "power-plant")


@pytest.mark.parametrize("name", sorted(_UCI_EXPECTED))
def test_uci_shapes_and_protocol(name):
    rows, d, n_train, n_test = _UCI_EXPECTED[name]
    ds = load_uci(name)
    assert isinstance(ds, UciDataset)
    assert ds.X.shape == (rows, d) and ds.y.shape == (rows,)
    assert ds.X.dtype == np.float64 and ds.y.dtype == np.float64
    assert np.all(np.isfinite(ds.X)) and np.all(np.isfinite(ds.y))
    assert ds.feature_columns == tuple(range(d)) and ds.target_column == d
    assert len(ds.feature_names) == d
    assert (ds.n_hidden, ds.n_epochs, ds.n_splits) == (50, 40, 20)
    assert "CC BY 4.0" in ds.citation and "Hernández-Lobato" in ds.citation
    assert n_train == math.floor(0.9 * rows) and n_train + n_test == rows


@pytest.mark.parametrize("name", sorted(_UCI_EXPECTED))
def test_uci_splits_are_disjoint_and_cover_all_rows(name):
    rows, d, n_train, n_test = _UCI_EXPECTED[name]
    ds = load_uci(name)
    all_rows = set(range(rows))
    test_sets = set()
    for k in range(ds.n_splits):
        tr, te = ds.train_indices[k], ds.test_indices[k]
        assert (tr.size, te.size) == (n_train, n_test)
        s_tr, s_te = set(tr.tolist()), set(te.tolist())
        assert len(s_tr) == n_train and len(s_te) == n_test  # no repeats
        assert not (s_tr & s_te)
        assert s_tr | s_te == all_rows
        test_sets.add(frozenset(s_te))
        X_tr, y_tr, X_te, y_te = ds.split(k)
        assert X_tr.shape == (n_train, d) and X_te.shape == (n_test, d)
        np.testing.assert_array_equal(X_tr, ds.X[tr])
        np.testing.assert_array_equal(y_te, ds.y[te])
    assert len(test_sets) == ds.n_splits


def test_uci_first_split_starts_as_in_original_files():
    # first entries of index_train_0.txt / index_test_0.txt, and row 0 of data.txt
    ds = load_uci("concrete")
    assert ds.train_indices[0][:3].tolist() == [339, 244, 882]
    np.testing.assert_array_equal(ds.X[0], [540.0, 0.0, 0.0, 162.0, 2.5, 1040.0, 676.0, 28.0])
    assert ds.y[0] == 79.99
    assert load_uci("power_plant").name == "power-plant"


def test_uci_errors():
    ds = load_uci("energy")
    with pytest.raises(IndexError):
        ds.split(20)
    with pytest.raises(IndexError):
        ds.split(-1)
    with pytest.raises(ValueError, match="available: concrete, energy, power-plant"):
        load_uci("boston")


# --------------------------------------------------------------------------- #
# synthetic battery scenario


def test_battery_shape_and_ranges():
    X, y, columns = battery_pack(500, seed=3)
    assert X.shape == (500, 3) and y.shape == (500,)
    assert X.dtype == np.float64 and y.dtype == np.float64
    assert columns == BATTERY_COLUMNS == ("voltage_V", "current_A", "temperature_C")
    assert np.all((y >= 0.0) & (y <= 1.0))
    assert np.all((X[:, 1] >= -5.0) & (X[:, 1] <= 15.0))
    assert np.all((X[:, 2] >= -10.0) & (X[:, 2] <= 45.0))
    assert np.all((X[:, 0] > 9.0) & (X[:, 0] < 18.0))


def test_battery_deterministic_per_seed():
    X1, y1, _ = battery_pack(200, seed=7)
    X2, y2, _ = battery_pack(200, seed=7)
    X3, y3, _ = battery_pack(200, seed=8)
    np.testing.assert_array_equal(X1, X2)
    np.testing.assert_array_equal(y1, y2)
    assert not np.array_equal(y1, y3)


def test_battery_follows_documented_formula():
    X, y, _ = battery_pack(5000, seed=1)
    residual = X[:, 0] - (ocv_pack(y) - X[:, 1] * pack_resistance(X[:, 2]))
    assert abs(residual.mean()) < 4 * VOLTAGE_NOISE_SD_V / math.sqrt(5000)
    assert residual.std() == pytest.approx(VOLTAGE_NOISE_SD_V, rel=0.05)
    s = np.linspace(0.0, 1.0, 1001)
    assert np.all(np.diff(ocv_pack(s)) > 0)  # invertible in soc
    assert ocv_pack(0.0) == pytest.approx(12.0) and ocv_pack(1.0) == pytest.approx(16.8, abs=1e-4)
    assert pack_resistance(-10.0) > pack_resistance(25.0) > pack_resistance(45.0)


def test_battery_rejects_bad_n():
    with pytest.raises(ValueError):
        battery_pack(0)
    with pytest.raises(TypeError):
        battery_pack(10.5)  # type: ignore[arg-type]


def test_battery_csv_round_trip(tmp_path):
    path = write_battery_csv(tmp_path / "battery.csv", n=50, seed=2)
    X, y, columns = battery_pack(50, seed=2)
    with open(path, newline="", encoding="utf-8") as fh:
        first = fh.readline()
        assert first.startswith("# synthetic")
        rows = list(csv.reader(fh))
    assert rows[0] == [*columns, BATTERY_TARGET]
    table = np.array(rows[1:], dtype=np.float64)
    assert table.shape == (50, 4)
    np.testing.assert_array_equal(table[:, :3], X)
    np.testing.assert_array_equal(table[:, 3], y)
    loaded = np.loadtxt(path, delimiter=",", skiprows=2)
    np.testing.assert_array_equal(loaded, np.column_stack([X, y]))


# --------------------------------------------------------------------------- #
# classification data (penguins, iris)


def test_penguins_and_iris_loaders_match_the_published_row_counts():
    """Counts from the shared data README (344 penguins, 333 complete; 150 iris) and, from memory,
    the published species counts (penguins: 152 Adelie, 68 Chinstrap, 124 Gentoo; iris: 50 each)."""
    from collections import Counter

    from tinyprop.datasets import load_iris, load_penguins

    penguins = load_penguins()
    assert penguins.X.shape == (342, 4) and penguins.dropped_lines == (5, 273)
    # 152 Adelie and 124 Gentoo, less the one unmeasured penguin of each
    assert Counter(penguins.labels.tolist()) == {"Adelie": 151, "Chinstrap": 68, "Gentoo": 123}
    text = DATA.joinpath("classification", "penguins.csv").read_text().splitlines()
    assert len(text) - 1 == 344 and sum("NA" not in line for line in text[1:]) == 333
    assert np.all(np.isfinite(penguins.X)) and penguins.X[:, 3].min() > 2000  # body mass in grams
    sexes = load_penguins(target="sex")  # from memory: 168 male, 165 female, 11 NA in the published data
    assert Counter(sexes.labels.tolist()) == {"female": 165, "male": 168} and len(sexes.dropped_lines) == 11
    with pytest.raises(ValueError, match="'species' or 'sex'"):
        load_penguins(target="island")
    iris = load_iris()
    assert iris.X.shape == (150, 4) and iris.dropped_lines == ()
    assert Counter(iris.labels.tolist()) == {"setosa": 50, "versicolor": 50, "virginica": 50}
    assert iris.X[0].tolist() == [5.1, 3.5, 1.4, 0.2]  # Fisher (1936), Table I, first flower
