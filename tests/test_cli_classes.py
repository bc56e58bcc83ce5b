"""`tinyprop train` on class columns and `tinyprop predict`, run as a user would (subprocesses).

The central checks: `train` on a class column gives bit-identical weights to the library
calls docs/cli.md names (a stratified split, then fit_tabular_classification on the
training rows); `predict` on the training CSV writes exactly the library's values, for a
classifier, a regression model and an ensemble. Data are synthetic (the pump scenario of
tinyprop.datasets.machine_states, or a formula of our own).
"""

from __future__ import annotations

import csv
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import tinyprop as tp
from tinyprop.classify import encode_labels, stratified_split
from tinyprop.cli import main
from tinyprop.datasets import machine_states, write_machine_csv

FAST = ["--epochs", "15", "--hidden", "6"]


def run_cli(*args: str, cwd: Path | None = None) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "tinyprop", *args], cwd=cwd, capture_output=True, text=True,
                          timeout=300)


def run_main(capsys, *args: str) -> tuple[int, str, str]:
    """The command in this process (faster than a subprocess): ``(status, stdout, stderr)``."""
    capsys.readouterr()
    status = main(list(args))
    captured = capsys.readouterr()
    return status, captured.out, captured.err


def read_rows(path: Path) -> list[list[str]]:
    return list(csv.reader(path.read_text(encoding="utf-8").splitlines()))


@pytest.fixture(scope="module")
def classifier_run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("pump")
    data = write_machine_csv(folder / "pump.csv", 150, seed=3)
    result = run_cli("train", str(data), "--targets", "state", "--out", str(folder / "pump.npz"), *FAST,
                     "--quiet", "--test-fraction", "0.2")
    assert result.returncode == 0, result.stderr
    return folder, data, result


def test_train_on_a_text_column_fits_the_library_recipe_bit_for_bit(classifier_run):
    folder, _, result = classifier_run
    X, states = machine_states(150, seed=3)
    _, indices = encode_labels(states)
    training, test = stratified_split(indices, 0.2, 0)
    fitted = tp.fit_tabular_classification(X[training], states[training], hidden=6, epochs=15, seed=0,
                                           target="state")
    model = tp.load_model_file(folder / "pump.npz")
    assert np.array_equal(model.network.get_vector(), fitted.classifier.net.get_vector())
    assert model.metadata["classes"] == {"target": "state", "labels": ["blocked", "cavitation", "normal", "off"]}
    report = json.loads((folder / "pump.report.json").read_text())
    assert report["data"]["split"] == {"training": int(training.size), "validation": 0, "test": int(test.size)}
    test_metrics = tp.classification_metrics(indices[test], fitted.classifier.probabilities(X[test]),
                                             fitted.classifier.labels)
    assert report["metrics"]["test"] == json.loads(json.dumps(test_metrics.to_dict()))
    assert report["fit"]["penalty"] == fitted.penalty
    assert "test: accuracy" in result.stdout and "recall precision" in result.stdout
    assert "not certified for safety functions" in report["safety"]


def test_predict_round_trip_on_the_training_csv_equals_the_library(classifier_run, tmp_path):
    folder, data, _ = classifier_run
    out = tmp_path / "pred.csv"
    result = run_cli("predict", str(folder / "pump.npz"), str(data), "--out", str(out))
    assert result.returncode == 0, result.stderr
    rows = read_rows(out)
    labels = ("blocked", "cavitation", "normal", "off")
    assert rows[0] == ["state"] + [f"probability_{label}" for label in labels]
    X, _ = machine_states(150, seed=3)
    model = tp.load_model_file(folder / "pump.npz")
    classifier = tp.Classifier.from_metadata(model.network, model.metadata)
    assert [r[0] for r in rows[1:]] == classifier.predict_labels(X).tolist()
    assert np.array_equal(np.array([[float(v) for v in r[1:]] for r in rows[1:]]), classifier.probabilities(X))


def test_predict_reads_columns_by_name_ignores_extra_ones_and_refuses_a_missing_one(classifier_run, tmp_path, capsys):
    folder, data, _ = classifier_run
    table = [row for row in read_rows(data) if not row[0].startswith("#")]
    order = [3, 0, 2, 1]  # reordered inputs, the label column left out, an extra text column in front
    shuffled = tmp_path / "shuffled.csv"
    shuffled.write_text("\n".join(",".join(["note" if i == 0 else "free text"] + [row[j] for j in order])
                                  for i, row in enumerate(table)) + "\n")
    first = run_main(capsys, "predict", str(folder / "pump.npz"), str(data))
    second = run_main(capsys, "predict", str(folder / "pump.npz"), str(shuffled))
    assert first[0] == 0 and second[0] == 0, second[2]
    assert first[1] == second[1]
    lacking = tmp_path / "lacking.csv"
    lacking.write_text("current_A,pressure_bar,temperature_C\n1,2,3\n")
    code, out, err = run_main(capsys, "predict", str(folder / "pump.npz"), str(lacking))
    assert code == 1 and out == ""
    assert err.count("\n") == 1 and "no column named 'vibration_mm_s'" in err
    bad = tmp_path / "bad.csv"
    bad.write_text("current_A,vibration_mm_s,pressure_bar,temperature_C\n1,2,3,4\n1,x,3,4\n")
    code, _, err = run_main(capsys, "predict", str(folder / "pump.npz"), str(bad))
    assert code == 1 and "line 3, column 'vibration_mm_s'" in err


def test_predict_writes_regression_values_and_ensemble_values_exactly(tmp_path):
    """Synthetic regression data: the written values are the library's floats, bit for bit."""
    rng = np.random.default_rng(1)
    X = rng.uniform(-1, 1, size=(40, 2))
    y = np.sin(X[:, 0]) + X[:, 1] ** 2
    data = tmp_path / "plant.csv"
    data.write_text("a,b,y\n" + "".join(f"{float(v[0])!r},{float(v[1])!r},{float(t)!r}\n" for v, t in zip(X, y)))
    assert run_cli("train", str(data), "--targets", "y", "--method", "mini-batch", "--epochs", "3", "--out",
                   str(tmp_path / "r.npz"),
                   "--quiet").returncode == 0
    result = run_cli("predict", str(tmp_path / "r.npz"), str(data))
    assert result.returncode == 0, result.stderr
    rows = read_rows_text(result.stdout)
    net = tp.load(tmp_path / "r.npz")
    assert rows[0] == ["y"] and np.array_equal([float(r[0]) for r in rows[1:]], net.predict(X)[:, 0])
    members = [tp.build_mlp([2, 3, 1], seed=s) for s in range(3)]
    ensemble = tp.Ensemble(members, metadata={"inputs": [{"name": "b"}, {"name": "a"}], "outputs": [{"name": "q"}]})
    ensemble.save(tmp_path / "e.npz")
    result = run_cli("predict", str(tmp_path / "e.npz"), str(data))
    assert result.returncode == 0, result.stderr
    rows = read_rows_text(result.stdout)
    assert rows[0] == ["q"] and np.array_equal([float(r[0]) for r in rows[1:]], ensemble.predict(X[:, ::-1])[:, 0])


def read_rows_text(text: str) -> list[list[str]]:
    return list(csv.reader(text.splitlines()))


def test_class_target_mistakes_are_one_line_each(tmp_path, capsys):
    data = write_machine_csv(tmp_path / "pump.csv", 60, seed=1)
    cases = [
        (["--targets", "state", "--method", "lbfgs", "--hidden", "6"], 2, "--method applies to regression targets"),
        (["--targets", "state", "--batch-size", "8"], 2, "--batch-size applies to regression targets"),
        (["--targets", "state", "--learning-rate", "0.1"], 2, "--learning-rate applies to regression targets"),
        (["--targets", "state,current_A"], 2, "must be the only target"),
        (["--targets", "current_A", "--class-weights", "balanced"], 2, "--class-weights applies to a class target"),
        (["--targets", "state", "--class-weights", "stalled=2"], 2, "'stalled' is not a label"),
        (["--targets", "current_A", "--classes", "state"], 2, "not among --targets"),
    ]
    for options, status, message in cases:
        fast = FAST if options[1] == "state" and "--method" not in options else []  # --epochs: class targets
        code, _, err = run_main(capsys, "train", str(data), *options, "--out", str(tmp_path / "m.npz"), "--quiet",
                                *fast)
        assert code == status, (options, err)
        assert message in err and err.count("\n") == 1, (options, err)
    holes = tmp_path / "holes.csv"
    text = data.read_text().splitlines()
    text[3] = text[3].rsplit(",", 1)[0] + ","
    text[7] = text[7].rsplit(",", 1)[0] + ", "
    holes.write_text("\n".join(text) + "\n")
    code, _, err = run_main(capsys, "train", str(holes), "--targets", "state", "--quiet", *FAST)
    assert code == 1 and "2 empty cells on lines 4, 8" in err


def test_numeric_class_codes_are_classes_with_the_classes_option(tmp_path, capsys):
    X, states = machine_states(80, seed=4)
    codes = {"off": 0, "normal": 1, "cavitation": 2, "blocked": 3}
    data = tmp_path / "codes.csv"
    data.write_text("c,v,p,t,mode\n" + "".join(",".join(map(repr, row.tolist())) + f",{codes[s]}\n"
                                                 for row, s in zip(X, states)))
    code, _, err = run_main(capsys, "train", str(data), "--targets", "mode", "--classes", "mode", "--out",
                            str(tmp_path / "m.npz"), "--quiet", *FAST)
    assert code == 0, err
    assert tp.load_model_file(tmp_path / "m.npz").metadata["classes"]["labels"] == ["0", "1", "2", "3"]


def test_predict_needs_inputs_for_a_model_without_names_and_uses_them_in_order(tmp_path, capsys):
    net = tp.build_mlp([2, 3, 2], seed=1)  # synthetic: no metadata at all
    tp.save(net, tmp_path / "bare.npz")
    data = tmp_path / "rows.csv"
    data.write_text("p,q\n0.5,-1.0\n2.0,0.25\n")
    code, _, err = run_main(capsys, "predict", str(tmp_path / "bare.npz"), str(data))
    assert code == 2 and "give --inputs" in err
    code, out, err = run_main(capsys, "predict", str(tmp_path / "bare.npz"), str(data), "--inputs", "q,p")
    assert code == 0, err
    rows = read_rows_text(out)
    assert rows[0] == ["output_0", "output_1"]
    expected = net.predict(np.array([[-1.0, 0.5], [0.25, 2.0]]))
    assert np.array_equal(np.array([[float(v) for v in r] for r in rows[1:]]), expected)
