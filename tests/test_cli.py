"""The `tinyprop` command: each subcommand's success path, run as a user would (a subprocess).

The central check: `tinyprop train` on a CSV file gives bit-identical weights to the
library calls that docs/cli.md says it makes (split, network, train/solve), so the
command adds nothing hidden. Data here are synthetic (a smooth formula of our own).
"""

from __future__ import annotations

import json
import math
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import tinyprop as tp
from tinyprop.cli import main
from tinyprop.layers import ColumnScaling
from tinyprop.registry import register_activation

INPUTS = ["x0", "x1", "x2"]
TARGETS = ["y1", "y2"]


def run_cli(*args: str, cwd: Path | None = None) -> subprocess.CompletedProcess:
    """``python -m tinyprop <args>`` with pipes (so stderr is not a terminal)."""
    return subprocess.run(
        [sys.executable, "-m", "tinyprop", *args], cwd=cwd, capture_output=True, text=True, timeout=300
    )


def write_synthetic_csv(path: Path, n: int = 120, seed: int = 5) -> tuple[np.ndarray, np.ndarray]:
    """Synthetic regression data with a text column that is not used; values written with repr (exact)."""
    rng = np.random.default_rng(seed)
    X = rng.uniform(-2.0, 2.0, size=(n, 3))
    Y = np.column_stack([np.sin(X[:, 0]) + 0.5 * X[:, 1] * X[:, 2], X[:, 0] ** 2 - X[:, 2]])
    lines = ["# synthetic test data", "stamp," + ",".join(INPUTS + TARGETS)]
    lines += [f"t{i}," + ",".join(repr(v) for v in (*X[i].tolist(), *Y[i].tolist())) for i in range(n)]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return X, Y


@pytest.fixture(scope="module")
def csv_file(tmp_path_factory) -> tuple[Path, np.ndarray, np.ndarray]:
    path = tmp_path_factory.mktemp("data") / "synthetic.csv"
    X, Y = write_synthetic_csv(path)
    return path, X, Y


@pytest.fixture(scope="module")
def demo_model(tmp_path_factory) -> Path:
    """A small trained model file with stored input/output names (written by `train`)."""
    folder = tmp_path_factory.mktemp("model")
    path = folder / "synthetic.csv"
    write_synthetic_csv(path)
    result = run_cli("train", str(path), "--inputs", "x0,x1,x2", "--targets", "y1,y2", "--hidden", "6",
                     "--method", "mini-batch", "--epochs", "5", "--out", str(folder / "m.npz"), "--quiet")
    assert result.returncode == 0, result.stderr
    return folder / "m.npz"


def library_split(n: int, seed: int, validation: float, test: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The split documented in docs/cli.md, written out independently of the command's code."""
    order = np.random.default_rng(seed).permutation(n)
    n_test, n_val = round(test * n), round(validation * n)
    return order[n_test + n_val:], order[n_test:n_test + n_val], order[:n_test]


def library_network(X: np.ndarray, Y: np.ndarray, hidden: list[int], activation: tp.Activation,
                    seed: int) -> tp.Network:
    mlp = tp.build_mlp([X.shape[1], *hidden, Y.shape[1]], activation=activation, seed=seed)
    return tp.Network([tp.Standardize.from_data(X), *mlp.layers, tp.Unstandardize.from_data(Y)], init=None)


def assert_same_network(a: tp.Network, b: tp.Network) -> None:
    assert len(a.params) == len(b.params)
    for p, q in zip(a.params, b.params):
        assert p.dtype == q.dtype and np.array_equal(p, q)
    for la, lb in zip(a.layers, b.layers):
        if isinstance(la, ColumnScaling):
            assert np.array_equal(la.mean, lb.mean) and np.array_equal(la.scale, lb.scale)


@pytest.mark.parametrize(
    "options, optimizer",
    [
        ([], lambda n_train: tp.Adam(0.01, schedule=tp.CosineSchedule(30 * math.ceil(n_train / 16)))),
        (["--optimizer", "sgd", "--momentum", "0.9", "--schedule", "constant", "--patience", "4",
          "--activation", "sigmoid"],
         lambda n_train: tp.SGD(0.01, momentum=0.9)),
        (["--clip-norm", "0.5"],
         lambda n_train: tp.Adam(0.01, schedule=tp.CosineSchedule(30 * math.ceil(n_train / 16)), clip_norm=0.5)),
    ],
    ids=["adam-cosine", "sgd-momentum-early-stopping", "adam-clip-norm"],
)
def test_train_reproduces_the_library_calls(csv_file, tmp_path, options, optimizer):
    path, X, Y = csv_file
    seed = 3
    model = tmp_path / "cli.npz"
    result = run_cli(
        "train", str(path), "--inputs", "x0,x1,x2", "--targets", "y1,y2", "--hidden", "7,5",
        "--method", "mini-batch", "--epochs", "30", "--batch-size", "16", "--learning-rate", "0.01",
        "--seed", str(seed),
        "--validation-fraction", "0.2", "--test-fraction", "0.1", "--out", str(model), "--quiet", *options,
    )
    assert result.returncode == 0, result.stderr
    assert result.stderr == ""  # --quiet: no progress

    tr, va, te = library_split(len(X), seed, 0.2, 0.1)
    activation = tp.Sigmoid() if "sigmoid" in options else tp.Tanh()
    net = library_network(X[tr], Y[tr], [7, 5], activation, seed)
    patience = 4 if "--patience" in options else None
    history = tp.train(net, X[tr], Y[tr], loss=tp.MeanSquaredError(), optimizer=optimizer(tr.size), epochs=30,
                       batch_size=16, validation=(X[va], Y[va]), patience=patience, seed=seed).history

    assert_same_network(tp.load(model), net)
    report = json.loads((tmp_path / "cli.report.json").read_text(encoding="utf-8"))
    assert report["history"]["training_loss"] == list(history.training)
    assert report["history"]["validation_loss"] == list(history.validation)
    assert report["network"]["fingerprint"] == tp.fingerprint(net)
    assert report["data"]["split"] == {"training": tr.size, "validation": va.size, "test": te.size}
    rmse = np.sqrt(np.mean((net.predict(X[te]) - Y[te]) ** 2, axis=0))
    for k, name in enumerate(TARGETS):
        assert report["metrics"]["test"]["targets"][name]["rmse"] == pytest.approx(rmse[k], rel=1e-12)
    for key in ("settings", "timings_s", "fit", "safety"):
        assert key in report


def test_train_defaults_are_the_library_recipe_bit_for_bit(csv_file, tmp_path):
    # `tinyprop train` with every default = fit_tabular_regression on the training rows of the documented split
    path, X, Y = csv_file
    model = tmp_path / "auto.npz"
    result = run_cli("train", str(path), "--inputs", "x0,x1,x2", "--targets", "y1,y2", "--out", str(model), "--quiet")
    assert result.returncode == 0, result.stderr
    tr, _, _ = library_split(len(X), 0, 0.15, 0.15)
    net, recipe = tp.fit_tabular_regression(X[tr], Y[tr], seed=0)
    assert recipe.method == "evidence-lm" and len(recipe.seeds) == 1
    assert_same_network(tp.load(model), net)
    report = json.loads((tmp_path / "auto.report.json").read_text(encoding="utf-8"))
    assert report["fit"]["method"] == "auto" and report["fit"]["recipe_method"] == "evidence-lm"
    assert report["fit"]["reason"] == recipe.reason and "affordable" in recipe.reason
    assert report["uncertainty"]["parameters"]["posterior"] is True
    assert len(report["uncertainty"]["parameters"]["noise_sd"]) == 2
    stored = tp.load_model_file(model).metadata["training"]["fit"]
    assert stored == {"recipe_method": "evidence-lm", "reason": recipe.reason}
    assert "method chosen: evidence-lm" in result.stdout and "regularised fit: noise sd per target" in result.stdout


def test_train_by_levenberg_marquardt_reproduces_solve_and_reports_uncertainty(csv_file, tmp_path):
    path, X, Y = csv_file
    model = tmp_path / "lm.npz"
    result = run_cli("train", str(path), "--inputs", "x0,x1,x2", "--targets", "y1", "--hidden", "4",
                     "--method", "levenberg-marquardt", "--max-evaluations", "300", "--seed", "1",
                     "--out", str(model), "--report", str(tmp_path / "lm.json"))
    assert result.returncode == 0, result.stderr
    tr, _, _ = library_split(len(X), 1, 0.15, 0.15)
    net = library_network(X[tr], Y[tr, :1], [4], tp.Tanh(), 1)
    tp.solve(net, X[tr], Y[tr, 0], method="levenberg-marquardt", max_evaluations=300)
    assert_same_network(tp.load(model), net)
    report = json.loads((tmp_path / "lm.json").read_text(encoding="utf-8"))
    assert report["history"] is None and report["fit"]["method"] == "levenberg-marquardt"
    assert "parameters" in report["uncertainty"] and "input_sensitivity" in report["uncertainty"]
    assert "parameter uncertainty" in result.stdout


def test_train_progress_has_no_terminal_codes_when_stderr_is_a_pipe(csv_file, tmp_path):
    path, _, _ = csv_file
    result = run_cli("train", str(path), "--targets", "y1", "--inputs", "x0,x1", "--method", "mini-batch",
                     "--epochs", "20",
                     "--hidden", "3", "--out", str(tmp_path / "m.npz"))
    assert result.returncode == 0, result.stderr
    assert "epoch 1/20" in result.stderr and "epoch 20/20" in result.stderr
    assert "remaining" in result.stderr and "elapsed" in result.stderr
    assert "\r" not in result.stderr and "\x1b" not in result.stderr
    assert "test RMSE" in result.stdout and "wrote" in result.stdout


def test_inspect_shows_the_summary(demo_model):
    result = run_cli("inspect", str(demo_model))
    assert result.returncode == 0, result.stderr
    net = tp.load(demo_model)
    assert tp.fingerprint(net) in result.stdout
    assert f"{net.n_params} parameters" in result.stdout and "float64" in result.stdout
    assert '"x0"' in result.stdout  # the stored input names


def test_check_passes_on_generated_rows_and_on_csv_rows(demo_model, csv_file):
    generated = run_cli("check", str(demo_model))
    assert generated.returncode == 0, generated.stderr
    assert "PASSED" in generated.stdout and "generated rows" in generated.stdout
    n_arrays = len(tp.load(demo_model).params)
    assert generated.stdout.count("  ok   layer") == n_arrays  # one line per parameter array

    from_csv = run_cli("check", str(demo_model), "--data", str(csv_file[0]), "--rows", "5")
    assert from_csv.returncode == 0, from_csv.stderr
    assert "5 rows of" in from_csv.stdout and "PASSED" in from_csv.stdout

    sampled = run_cli("check", str(demo_model), "--parameters", str(n_arrays + 3), "--seed", "2")
    assert sampled.returncode == 0, sampled.stderr
    n_params = tp.load(demo_model).n_params
    assert f"checked a random sample of {n_arrays + 3} of {n_params} parameters" in sampled.stdout
    assert sampled.stdout.count("  ok   layer") == n_arrays  # every array is still represented


class WrongSlopeTanh(tp.Tanh):
    """tanh with a derivative 10% too large: a deliberately wrong closed form."""

    def derivative(self, z, a):
        return 1.1 * super().derivative(z, a)


register_activation(WrongSlopeTanh, name="test_cli.WrongSlopeTanh")


def test_check_fails_with_per_array_errors_and_exit_status_1(tmp_path, capsys):
    # run in-process: the faulty activation is registered in this process only
    net = tp.Network([tp.Affine(2, 3), WrongSlopeTanh(), tp.Affine(3, 1)], seed=0)
    tp.save(net, tmp_path / "wrong.npz")
    status = main(["check", str(tmp_path / "wrong.npz")])
    out, err = capsys.readouterr()
    assert status == 1
    assert "FAILED" in out and "FAIL layer 0 weight" in out and "ok   layer 2 weight" in out
    assert err.startswith("tinyprop check: gradient check FAILED for layer 0 weight, layer 0 bias")


def test_export_writes_c_and_python_that_agree_with_the_model(demo_model, tmp_path):
    out = tmp_path / "code"
    result = run_cli("export", str(demo_model), "--out", str(out), "--name", "plant")
    assert result.returncode == 0, result.stderr
    assert sorted(p.name for p in out.iterdir()) == ["plant.c", "plant.h", "plant.py"]
    assert "x0" in (out / "plant.h").read_text()  # the model's input names reach the code
    net = tp.load(demo_model)
    X = np.random.default_rng(0).uniform(-2, 2, (5, 3))  # synthetic inputs
    namespace: dict = {}
    exec(compile((out / "plant.py").read_text(), "plant.py", "exec"), namespace)
    exported = np.array([namespace["predict"](list(x)) for x in X])
    assert np.all(np.abs(exported - net.predict(X)) <= tp.agreement_bound(net, X))

    only_c = run_cli("export", str(demo_model), "--out", str(tmp_path / "c"), "--language", "c", "--c-type", "double")
    assert only_c.returncode == 0, only_c.stderr
    assert sorted(p.name for p in (tmp_path / "c").iterdir()) == ["model.c", "model.h"]
    assert "double" in (tmp_path / "c" / "model.h").read_text()


def test_export_c_fixed_point_calibrates_on_the_model_input_columns(demo_model, csv_file, tmp_path):
    out = tmp_path / "q"
    result = run_cli("export", str(demo_model), "--out", str(out), "--name", "plant", "--language", "c-fixed",
                     "--calibration", str(csv_file[0]), "--no-metadata")
    assert result.returncode == 0, result.stderr
    assert sorted(p.name for p in out.iterdir()) == ["plant_q.c", "plant_q.h"]
    assert "Fixed-point export plant_q.h / plant_q.c: 3 inputs, 2 outputs, 120 calibration rows" in result.stdout
    assert "no saturation on the calibration rows" in result.stdout
    # the file also holds the validation and test rows, a few of them beyond the training rows' envelope
    assert all("outside" in line for line in result.stderr.splitlines()), result.stderr
    # the same code as the library's on the same rows: the command read the stored input names x0, x1, x2;
    # the demo model stores its training envelope, so the formats come from it (docs/cli.md) and the rows
    # give the measured error
    (tmp_path / "lib").mkdir()
    model = tp.load_model_file(demo_model)
    library = tp.export_c_fixed_point(model.network, tmp_path / "lib", csv_file[1], name="plant_q",
                                      envelope=tp.Envelope.from_metadata(model.metadata),
                                      tolerance=model.metadata["training"]["test"]["rmse"])
    assert f"inputs: {', '.join(f'Q{b}' for b in library.input_bits)}" in result.stdout
    assert (out / "plant_q.c").read_text() == (tmp_path / "lib" / "plant_q.c").read_text()
    if shutil.which("gcc"):
        compiled = subprocess.run(["gcc", "-std=c99", "-Wall", "-Wextra", "-Werror", "-pedantic", "-c",
                                   str(out / "plant_q.c"), "-o", str(tmp_path / "plant_q.o")],
                                  capture_output=True, text=True)
        assert compiled.returncode == 0, compiled.stderr


def test_bench_runs_the_bundled_benchmark_in_quick_mode(tmp_path):
    result = run_cli("bench", "--quick", "--json", str(tmp_path / "bench.json"))
    assert result.returncode == 0, result.stderr
    assert "floor ratio" in result.stdout
    assert "floor" in json.loads((tmp_path / "bench.json").read_text())


def test_no_arguments_prints_a_short_help_pointing_to_the_demo():
    result = run_cli()
    assert result.returncode == 0
    assert "tinyprop demo" in result.stdout
    for command in ("demo", "train", "check", "inspect", "export", "bench"):
        assert f"\n  {command} " in result.stdout


def test_console_script_is_installed():
    script = shutil.which("tinyprop")
    if script is None:
        pytest.skip("the tinyprop console script is not on PATH (package not installed)")
    result = subprocess.run([script, "--version"], capture_output=True, text=True, timeout=60)
    assert result.returncode == 0 and result.stdout.strip() == f"tinyprop {tp.__version__}"


def test_main_reports_help_for_each_subcommand(capsys):
    for command in ("demo", "train", "check", "inspect", "export", "bench"):
        with pytest.raises(SystemExit) as stop:
            main([command, "--help"])
        assert stop.value.code == 0
        assert f"usage: tinyprop {command}" in capsys.readouterr().out


def test_every_public_name_is_in_the_api_reference():
    text = (Path(__file__).resolve().parents[1] / "docs" / "api.md").read_text(encoding="utf-8")
    missing = [name for name in tp.__all__ if f"`{name}`" not in text]
    assert not missing, f"docs/api.md does not describe {missing}"
