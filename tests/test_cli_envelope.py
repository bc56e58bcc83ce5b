"""The operating envelope on the command line: train stores it, check --data and predict warn, certify uses it,
export --check-envelope writes code that checks it, and `tinyprop envelope` shows, sets and widens it.

Data are synthetic (a heat exchanger scenario made up here, and the machine-state scenario of
tinyprop.datasets); the reference is the library (`Envelope.of_rows` on the training rows of the
split docs/cli.md documents).
"""

from __future__ import annotations

import importlib.util
import json
from pathlib import Path

import numpy as np
import pytest

import tinyprop as tp
from tinyprop.classify import encode_labels, stratified_split
from tinyprop.cli import main
from tinyprop.datasets import machine_states, write_machine_csv
from tinyprop.datasets.machine import MACHINE_INPUTS
from tinyprop.recipes import FitSettings, split_rows

INPUTS = ("inlet", "flow")
UNITS = ("degC", "l/s")


def run_main(capsys, *args: str) -> tuple[int, str, str]:
    """The command in this process: ``(status, stdout, stderr)``."""
    capsys.readouterr()
    status = main(list(args))
    captured = capsys.readouterr()
    return status, captured.out, captured.err


def exchanger_rows(n: int = 80, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Synthetic: a heat exchanger's outlet temperature from inlet temperature (10-30 degC) and flow (0-1 l/s)."""
    rng = np.random.default_rng(seed)
    X = rng.uniform([10.0, 0.0], [30.0, 1.0], size=(n, 2))
    return X, 5.0 + 0.6 * X[:, 0] + 4.0 * np.sqrt(X[:, 1])


def write_csv(path: Path, X: np.ndarray, y: np.ndarray, header: str) -> Path:
    rows = [",".join(repr(float(v)) for v in (a, b, c)) for (a, b), c in zip(X, y)]
    lines = ["# synthetic heat exchanger", header] + rows
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def exchanger(tmp_path_factory):
    folder = tmp_path_factory.mktemp("exchanger")
    X, y = exchanger_rows()
    data = write_csv(folder / "exchanger.csv", X, y, "inlet [degC],flow [l/s],outlet [degC]")
    # the same numbers under swapped headers: each column now holds the other input's values
    swapped = write_csv(folder / "swapped.csv", X, y, "flow [l/s],inlet [degC],outlet [degC]")
    model = folder / "exchanger.npz"
    status = main(["train", str(data), "--targets", "outlet", "--hidden", "3", "--envelope-margin", "0.1",
                   "--out", str(model), "--quiet"])
    assert status == 0
    return folder, X, data, swapped, model


def test_train_stores_the_envelope_of_the_training_rows_widened_by_the_margin(exchanger):
    _, X, _, _, model = exchanger
    split = split_rows(X.shape[0], FitSettings())  # the split docs/cli.md documents
    expected = tp.Envelope.of_rows(X[split.training], names=list(INPUTS)).widened(0.1)
    stored = tp.Envelope.from_metadata(tp.load_model_file(model).metadata)
    assert stored == expected
    report = json.loads(model.with_name("exchanger.report.json").read_text(encoding="utf-8"))
    assert tp.Envelope.from_metadata(report) == expected
    assert stored.source == "training data, widened by 0.1 of each width on both sides"


def test_train_stores_the_test_error_that_export_compares_its_bounds_with(exchanger):
    _, _, _, _, model = exchanger
    stored = tp.load_model_file(model).metadata["training"]["test"]
    report = json.loads(model.with_name("exchanger.report.json").read_text(encoding="utf-8"))
    test = report["metrics"]["test"]
    assert stored["rows"] == test["rows"]
    assert stored["rmse"] == [test["targets"][name]["rmse"] for name in report["data"]["targets"]]
    assert stored["max_abs_error"] == [test["targets"][name]["max_abs_error"] for name in report["data"]["targets"]]


def test_train_on_a_class_column_stores_the_envelope_of_its_training_rows(tmp_path, capsys):
    data = write_machine_csv(tmp_path / "machine.csv", 60, seed=5)
    status, _, err = run_main(capsys, "train", str(data), "--targets", "state", "--epochs", "2", "--hidden", "3",
                              "--out", str(tmp_path / "machine.npz"), "--quiet", "--test-fraction", "0.2")
    assert status == 0, err
    X, states = machine_states(60, seed=5)
    training, _ = stratified_split(encode_labels(states)[1], 0.2, 0)
    stored = tp.Envelope.from_metadata(tp.load_model_file(tmp_path / "machine.npz").metadata)
    assert stored == tp.Envelope.of_rows(X[training], names=list(MACHINE_INPUTS))
    report = json.loads((tmp_path / "machine.report.json").read_text(encoding="utf-8"))
    assert tp.Envelope.from_metadata(report) == stored


def test_check_data_with_swapped_columns_warns_that_the_rows_lie_outside_the_envelope(exchanger, capsys):
    # issue 18, "Seen in a trial run": check --data on a file whose input columns were swapped reported a
    # gradient failure at standardized inputs up to 140 with no word about the training range
    _, _, _, swapped, model = exchanger
    _, _, err = run_main(capsys, "check", str(model), "--data", str(swapped), "--rows", "8")
    lines = err.splitlines()
    assert lines[0].startswith("tinyprop check: warning: 8 of the 8 rows of ") and \
        "lie outside the model's operating envelope (training data, widened by 0.1" in lines[0]
    assert lines[1].startswith("tinyprop check: warning:   input 'inlet': 8 of 8 rows outside the envelope [")
    assert "] degC, up to " in lines[1] and "of its width" in lines[1]
    assert lines[2].startswith("tinyprop check: warning:   input 'flow': 8 of 8 rows outside the envelope [")
    assert "] l/s, up to " in lines[2]


def test_check_data_inside_the_envelope_prints_no_warning(exchanger, capsys):
    _, X, data, _, model = exchanger
    split = split_rows(X.shape[0], FitSettings())
    inside = write_csv(exchanger[0] / "inside.csv", X[split.training], np.zeros(split.training.size),
                       "inlet [degC],flow [l/s],outlet [degC]")
    status, _, err = run_main(capsys, "check", str(model), "--data", str(inside))
    assert status == 0 and "envelope" not in err


def test_predict_warns_per_input_in_its_units_and_predicts_all_rows(exchanger, capsys, tmp_path):
    folder, X, _, swapped, model = exchanger
    status, _, err = run_main(capsys, "predict", str(model), str(swapped), "--out", str(tmp_path / "p.csv"))
    assert status == 0
    library = tp.Envelope.from_metadata(tp.load_model_file(model).metadata).check(X[:, ::-1])
    expected = [f"tinyprop predict: warning:   {line}" for line in library.lines(list(UNITS))]
    assert [line for line in err.splitlines() if "warning:   input" in line] == expected
    assert len((tmp_path / "p.csv").read_text().splitlines()) == X.shape[0] + 1


def test_one_row_outside_is_counted_in_the_singular(exchanger, capsys, tmp_path):
    folder, X, _, swapped, model = exchanger
    rows = tmp_path / "one_outside.csv"
    lines = swapped.read_text().splitlines()
    header_at = next(i for i, line in enumerate(lines) if not line.startswith("#"))
    rows.write_text("\n".join(lines[: header_at + 2]) + "\n")  # the header and the first (swapped) row
    status, _, err = run_main(capsys, "predict", str(model), str(rows), "--out", str(tmp_path / "one.csv"))
    assert status == 0
    assert err.splitlines()[0].startswith("tinyprop predict: warning: 1 of the 1 row of ")
    assert "one_outside.csv lies outside the model's operating envelope" in err.splitlines()[0]


def test_a_model_without_an_envelope_gets_no_warning_and_a_malformed_one_a_single_line(exchanger, capsys, tmp_path):
    _, _, _, swapped, model = exchanger
    loaded = tp.load_model_file(model)
    plain = {key: value for key, value in loaded.metadata.items() if key != "envelope"}
    tp.save(loaded.network, tmp_path / "plain.npz", metadata=plain)
    status, _, err = run_main(capsys, "predict", str(tmp_path / "plain.npz"), str(swapped))
    assert status == 0 and "warning" not in err
    tp.save(loaded.network, tmp_path / "bad.npz", metadata={**plain, "envelope": {"low": [0.0, 1.0]}})
    status, _, err = run_main(capsys, "predict", str(tmp_path / "bad.npz"), str(swapped))
    assert status == 0
    assert err.splitlines() == ["tinyprop predict: warning: the model's stored envelope cannot be used, rows were "
                                "not compared with it: metadata['envelope'] must be an object {\"low\": [numbers], "
                                "\"high\": [numbers], \"source\": text, optionally \"names\": [texts]}; found keys "
                                "['low'] (missing ['high', 'source'])"]


def test_certify_without_a_box_uses_the_stored_envelope(exchanger, capsys, tmp_path):
    _, _, _, _, model = exchanger
    env = tp.Envelope.from_metadata(tp.load_model_file(model).metadata)
    budget = ["--max-splits", "2", "--max-seconds", "5"]
    status, out, err = run_main(capsys, "certify", str(model), "--json", str(tmp_path / "a.json"), *budget)
    assert status == 0, err
    assert out.startswith("box: the model's operating envelope (training data, widened by 0.1")
    low, high = (",".join(repr(v) for v in side.tolist()) for side in (env.low, env.high))
    status, _, err = run_main(capsys, "certify", str(model), f"--low={low}", f"--high={high}",
                              "--json", str(tmp_path / "b.json"), *budget)
    assert status == 0, err
    first, second = (json.loads((tmp_path / name).read_text()) for name in ("a.json", "b.json"))
    assert first["box"] == second["box"] == {"inlet": [env.low[0], env.high[0]], "flow": [env.low[1], env.high[1]]}


def test_certify_refuses_half_a_box_and_a_model_without_an_envelope(exchanger, capsys, tmp_path):
    _, _, _, _, model = exchanger
    status, _, err = run_main(capsys, "certify", str(model), "--low", "1,2")
    assert status == 2 and "give both --low and --high, or neither" in err
    loaded = tp.load_model_file(model)
    tp.save(loaded.network, tmp_path / "plain.npz", metadata={})
    status, _, err = run_main(capsys, "certify", str(tmp_path / "plain.npz"))
    assert status == 2 and "the model stores no operating envelope; give the box with --low and --high" in err


def test_the_envelope_command_shows_sets_and_widens_keeping_the_fingerprint(exchanger, capsys, tmp_path):
    _, _, _, _, model = exchanger
    loaded = tp.load_model_file(model)
    stored = tp.Envelope.from_metadata(loaded.metadata)
    status, out, _ = run_main(capsys, "envelope", str(model))
    assert status == 0 and out == f"{model}: {stored}\n"
    new = tmp_path / "new.npz"
    status, out, err = run_main(capsys, "envelope", str(model), "--limits", "flow=-0.5,2", "--margin", "0.25",
                                "--out", str(new))
    assert status == 0, err
    changed = tp.load_model_file(new)
    assert changed.fingerprint == loaded.fingerprint
    assert tp.Envelope.from_metadata(changed.metadata) == stored.with_limits("flow", -0.5, 2.0).widened(0.25)
    assert {k: v for k, v in changed.metadata.items() if k != "envelope"} == \
        {k: v for k, v in loaded.metadata.items() if k != "envelope"}
    status, _, err = run_main(capsys, "envelope", str(new), "--low=-1,0", "--high", "40,3", "--out", str(new))
    assert status == 0, err
    assert tp.Envelope.from_metadata(tp.load_model_file(new).metadata) == \
        tp.Envelope([-1.0, 0.0], [40.0, 3.0], INPUTS, "set by user")


@pytest.mark.parametrize("args, message", [
    (["--margin", "0.1"], "give --out NEW.npz"),
    (["--out", "x.npz"], "--out needs a change"),
    (["--low", "1,2", "--out", "x.npz"], "give both --low and --high, or neither"),
    (["--low", "1", "--high", "2", "--out", "x.npz"], "--low must give one number per model input (2), got 1"),
    (["--low", "3,0", "--high", "2,1", "--out", "x.npz"], "low must not exceed high; input 0 has low 3.0 > high 2.0"),
    (["--limits", "flow:1,2", "--out", "x.npz"], "--limits: expected NAME=LOW,HIGH"),
    (["--limits", "pressure=1,2", "--out", "x.npz"], "no input named 'pressure'; names are ['inlet', 'flow']"),
    (["--margin", "-1", "--out", "x.npz"], "expected a number >= 0"),
])
def test_the_envelope_command_refuses_mistakes_with_exit_status_2(exchanger, capsys, tmp_path, args, message):
    _, _, _, _, model = exchanger
    try:
        status, _, err = run_main(capsys, "envelope", str(model), *args)
    except SystemExit as exc:  # argparse's own refusals
        status, err = exc.code, capsys.readouterr().err
    assert status == 2 and message in err
    assert not (tmp_path / "x.npz").exists()


def test_export_check_envelope_writes_code_that_reports_inputs_outside(exchanger, capsys, tmp_path):
    _, _, _, _, model = exchanger
    status, _, err = run_main(capsys, "export", str(model), "--check-envelope", "--out", str(tmp_path))
    assert status == 0, err
    assert "int model_predict(const float *x, float *y);" in (tmp_path / "model.h").read_text()
    spec = importlib.util.spec_from_file_location("cli_envelope_model", tmp_path / "model.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    net = tp.load(model)
    y, outside = module.predict([20.0, 0.5])
    assert outside == [] and np.allclose(y, net.predict([[20.0, 0.5]])[0], rtol=1e-12)
    assert module.predict([0.5, 20.0])[1] == [0, 1]
    tp.save(net, tmp_path / "plain.npz")
    status, _, err = run_main(capsys, "export", str(tmp_path / "plain.npz"), "--check-envelope", "--out",
                              str(tmp_path / "none"))
    assert status == 2 and "--check-envelope: the model stores no operating envelope" in err
