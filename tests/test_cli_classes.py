"""`tinyprop train` on class columns and `tinyprop predict`, run as a user would (subprocesses).

The central checks: `train` on a class column gives bit-identical weights to the library
calls docs/cli.md names (a stratified split, then fit_tabular_classification on the
training rows); `predict` on the training CSV writes exactly the library's values, for a
classifier, a regression model and an ensemble. Data are synthetic (the pump scenario of
tinyprop.datasets.machine_states, or a formula of our own).
"""

from __future__ import annotations

import csv
import importlib.util
import json
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
import pytest

import tinyprop as tp
from tinyprop.classify import encode_labels, stratified_split
from tinyprop.cli import main
from tinyprop.datasets import load_iris, machine_states, write_machine_csv
from tinyprop.export.classes import fixed_point_class_agreement

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
    assert model.metadata["classes"] == {"target": "state", "labels": ["blocked", "cavitation", "normal", "off"],
                                         "decision": "softmax"}
    report = json.loads((folder / "pump.report.json").read_text())
    assert report["data"]["split"] == {"training": int(training.size), "validation": 0, "test": int(test.size)}
    test_metrics = tp.classification_metrics(indices[test], fitted.classifier.probabilities(X[test]),
                                             fitted.classifier.labels)
    assert report["metrics"]["test"] == json.loads(json.dumps(test_metrics.to_dict()))
    assert report["fit"]["penalty"] == fitted.penalty
    assert "test: accuracy" in result.stdout and "recall precision" in result.stdout
    assert "not certified for safety functions" in report["safety"]
    # the integer-code check at training time is of the code 'tinyprop export --language c-fixed' writes:
    # formats proven over the stored envelope, not calibrated on the training rows
    integer = report["integer_code"]
    assert integer["formats"] == "training envelope" and integer["saturation_free"] is True
    envelope = tp.Envelope.from_metadata(model.metadata)
    with tempfile.TemporaryDirectory() as code:
        exported = tp.export_c_fixed_point(model.network, code, name="model_q", envelope=envelope)
    agreement = fixed_point_class_agreement(exported, model.network, X[test])
    assert {key: integer[key] for key in agreement.to_dict()} == agreement.to_dict()


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


# ------------------------------------------------------------------ yes/no columns: one sigmoid output
def cavitation_csv(path: Path, n: int, seed: int) -> tuple[Path, np.ndarray, np.ndarray]:
    """Synthetic pump test rig of our own: suction pressure (bar) and flow (m3/h); the pump cavitates ("yes") when
    the suction pressure falls below what the flow needs (0.4 + 0.004 flow^2 bar, plus noise)."""
    rng = np.random.default_rng(seed)
    pressure = rng.uniform(0.2, 2.5, n)
    flow = rng.uniform(2.0, 20.0, n)
    cavitating = np.where(pressure + rng.normal(0, 0.08, n) < 0.4 + 0.004 * flow**2, "yes", "no")
    path.write_text("# synthetic pump rig: is the pump cavitating?\nsuction_pressure [bar],flow [m3/h],cavitating\n"
                    + "".join(f"{p!r},{q!r},{c}\n" for p, q, c in zip(pressure.tolist(), flow.tolist(), cavitating)))
    return path, np.column_stack([pressure, flow]), cavitating


def _key_shape(value, labels):
    """The nesting of dict keys (the report's form, without its values; a dict keyed by the labels as one mark)."""
    if not isinstance(value, dict):
        return None
    if set(value) == set(labels):
        return "one entry per label"
    return {k: _key_shape(v, labels) for k, v in value.items()}


def test_yes_no_round_trip_train_then_predict_uses_one_sigmoid_output(classifier_run, tmp_path, capsys):
    """Train on a yes/no column, then predict on the same CSV: one logit, labels and both probabilities equal to
    the library's, the report and the printed lines of the same form as for a four-class target."""
    data, X, answers = cavitation_csv(tmp_path / "rig.csv", 160, seed=5)
    code, out, err = run_main(capsys, "train", str(data), "--targets", "cavitating", "--out", str(tmp_path / "c.npz"),
                              "--quiet", *FAST)
    assert code == 0, err
    _, indices = encode_labels(answers)
    training, _ = stratified_split(indices, 0.15, 0)  # the default --test-fraction
    fitted = tp.fit_tabular_classification(X[training], answers[training], hidden=6, epochs=15, seed=0,
                                           target="cavitating")
    model = tp.load_model_file(tmp_path / "c.npz")
    assert model.network.n_out == 1 and np.array_equal(model.network.get_vector(), fitted.classifier.net.get_vector())
    assert model.metadata["classes"] == {"target": "cavitating", "labels": ["no", "yes"], "decision": "sigmoid"}
    assert model.metadata["outputs"] == [{"name": "log-odds of yes"}]
    report = json.loads((tmp_path / "c.report.json").read_text())
    four = json.loads((classifier_run[0] / "pump.report.json").read_text())
    assert _key_shape(report, report["data"]["classes"]) == _key_shape(four, four["data"]["classes"])
    assert report["settings"]["loss"] == "CrossEntropyOnSigmoid"
    assert [line.split(":")[0] for line in out.splitlines()][:6] == \
        [line.split(":")[0] for line in classifier_run[2].stdout.splitlines()][:6]
    code, out, err = run_main(capsys, "predict", str(tmp_path / "c.npz"), str(data))
    assert code == 0, err
    rows = read_rows_text(out)
    assert rows[0] == ["cavitating", "probability_no", "probability_yes"]
    classifier = tp.Classifier.from_metadata(model.network, model.metadata)
    assert [r[0] for r in rows[1:]] == classifier.predict_labels(X).tolist()
    p = np.array([[float(v) for v in r[1:]] for r in rows[1:]])
    assert np.array_equal(p, classifier.probabilities(X))
    z = model.network.predict(X)[:, 0]
    np.testing.assert_allclose(p[:, 1], 1 / (1 + np.exp(-z)), rtol=1e-14)  # handbook logistic
    assert np.mean(classifier.predict_labels(X) == answers) > 0.8


def test_an_old_two_logit_yes_no_model_file_still_predicts_and_exports_the_same(tmp_path, capsys):
    """A yes/no model file as tinyprop train wrote it before one sigmoid output (two logits; "classes" without
    "decision"; outputs "logit of ..."): predict gives the softmax of its two logits and their argmax."""
    data, X, answers = cavitation_csv(tmp_path / "rig.csv", 80, seed=6)
    fitted = tp.fit_tabular_classification(X, answers, hidden=4, epochs=5, penalty=1e-3, two_class_output="softmax",
                                           target="cavitating")
    net = fitted.classifier.net
    metadata = {"description": "classifier of cavitating (synthetic rig)",
                "inputs": [{"name": "suction_pressure"}, {"name": "flow"}],
                "outputs": [{"name": "logit of no"}, {"name": "logit of yes"}],
                "classes": {"target": "cavitating", "labels": ["no", "yes"]}}
    tp.save(net, tmp_path / "old.npz", metadata=metadata)
    code, out, err = run_main(capsys, "predict", str(tmp_path / "old.npz"), str(data))
    assert code == 0, err
    rows = read_rows_text(out)
    z = net.predict(X)
    assert rows[0] == ["cavitating", "probability_no", "probability_yes"]
    assert [r[0] for r in rows[1:]] == [("no", "yes")[k] for k in np.argmax(z, axis=1)]
    expected = np.exp(z - z.max(axis=1, keepdims=True))
    np.testing.assert_allclose(np.array([[float(v) for v in r[1:]] for r in rows[1:]]),
                               expected / expected.sum(axis=1, keepdims=True), rtol=1e-15)
    code, _, err = run_main(capsys, "export", str(tmp_path / "old.npz"), "--language", "python", "--out",
                            str(tmp_path / "code"), "--name", "rig")
    assert code == 0, err
    spec = importlib.util.spec_from_file_location("rig_generated", tmp_path / "code" / "rig.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    assert [module.classify(list(map(float, row)))[0] for row in X] == np.argmax(z, axis=1).tolist()


def test_train_reads_the_shipped_iris_file_whose_first_column_is_unnamed_row_labels(tmp_path, capsys):
    """The shipped iris.csv (Anderson 1935, public domain; R's row-name column with an empty header cell): default
    options train on the four measurements, never on the row numbers, with one note line; the weights are the
    library recipe's on the same training rows (the 10-fold figure of test_classification_bars is that recipe's)."""
    path = Path(tp.datasets.__file__).parent / "classification" / "iris.csv"
    assert path.read_text().startswith('"",')
    code, out, err = run_main(capsys, "train", str(path), "--targets", "Species", "--out", str(tmp_path / "i.npz"),
                              "--quiet")
    assert code == 0, err
    assert err.count("\n") == 1 and "first column has no name" in err and "row labels" in err
    data = load_iris()
    model = tp.load_model_file(tmp_path / "i.npz")
    assert [e["name"] for e in model.metadata["inputs"]] == list(data.input_names)
    _, indices = encode_labels(data.labels)
    training, _ = stratified_split(indices, 0.15, 0)  # the default --test-fraction
    fitted = tp.fit_tabular_classification(data.X[training], data.labels[training], seed=0, target="Species")
    assert np.array_equal(model.network.get_vector(), fitted.classifier.net.get_vector())
    report = json.loads((tmp_path / "i.report.json").read_text())
    assert report["metrics"]["test"]["errors"] <= 1  # seed 0: 1 of 24 test rows, as measured
    code, out, err = run_main(capsys, "predict", str(tmp_path / "i.npz"), str(path))
    assert code == 0 and [r[0] for r in read_rows_text(out)[1:]] == fitted.classifier.predict_labels(data.X).tolist()


def test_an_empty_header_cell_other_than_the_first_is_refused_in_one_line(tmp_path, capsys):
    for header, fields in (("a,,b", "field 2 is"), (",a,,b", "fields 1 and 3 are")):
        data = tmp_path / "gap.csv"
        data.write_text(header + "\n" + ",".join(["1"] * len(header.split(","))) + "\n")
        code, _, err = run_main(capsys, "train", str(data), "--targets", "b", "--quiet")
        assert code == 1 and err.count("\n") == 1 and f"header {fields} empty" in err, err
        assert "the first may be unnamed" in err
