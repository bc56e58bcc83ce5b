"""What a new user meets in the first hour (issue 15, items 3-10): each run as a user would run it.

Subprocess runs of ``python -m tinyprop`` (and of the installed ``tinyprop`` script
where sys.path matters), checked by exit status and the exact line; library
checks in-process where the behaviour is the library's. All data here are
synthetic: small formulas of our own, a pump test rig scenario with made-up
numbers.
"""

from __future__ import annotations

import importlib
import json
import re
import subprocess
import sys
from concurrent.futures import ThreadPoolExecutor
from dataclasses import replace
from functools import partial
from pathlib import Path

import numpy as np
import pytest

import tinyprop as tp
from tinyprop._progress import ProgressLine
from tinyprop.cli import build_parser
from tinyprop.cli._common import OPTION_WORDS, option_words
from tinyprop.export import export_c, export_c_fixed_point, export_python
from tinyprop.modelfile import load_model_file
from tinyprop.recipes import Dataset, FitSettings, check_data, solver_stop, split_rows
from tinyprop.solve import solve

solve_module = importlib.import_module("tinyprop.solve")  # the module; tinyprop.solve is the function

ROOT = Path(__file__).resolve().parents[1]
SCRIPT = Path(sys.executable).with_name("tinyprop")


def rows_csv(n: int, target=lambda x: np.sin(3 * x)) -> str:
    """``x,y`` with ``n`` synthetic rows on [-1, 1]."""
    x = np.linspace(-1.0, 1.0, n)
    return "x,y\n" + "".join(f"{a!r},{b!r}\n" for a, b in zip(x.tolist(), target(x).tolist()))


def pump_csv(n: int = 40) -> str:
    """A synthetic pump test rig: head and shaft power from speed and flow, units in the header, a text column."""
    rng = np.random.default_rng(7)
    speed, flow = rng.uniform(1000, 3000, n), rng.uniform(5, 50, n)
    head, power = 1e-5 * speed**2 - 2e-3 * flow**2, 1e-4 * speed * flow
    lines = ["# synthetic pump test rig", "timestamp,speed [rpm],flow [m3/h],head [m],power [kW]"]
    lines += [f"t{i}," + ",".join(repr(float(v[i])) for v in (speed, flow, head, power)) for i in range(n)]
    return "\n".join(lines) + "\n"


FILES = {
    "one.csv": "x,y\n1,2\n",
    "const.csv": rows_csv(20, lambda x: np.ones_like(x)),
    "three.csv": rows_csv(3),
    "six.csv": rows_csv(6),
    "small.csv": rows_csv(30),
    "tanh.csv": rows_csv(30, lambda x: 2 * np.tanh(1.5 * x - 0.2) + 1),  # the network of --hidden 1 holds it exactly
    "pump.csv": pump_csv(),
    "twice.csv": "a [m],a,y\n1,2,3\n4,5,6\n",
}
TRAIN = ["train", "--quiet"]
MINI_BATCH = TRAIN + ["--method", "mini-batch"]
# name: (arguments, status); every case runs once, in parallel, as `python -m tinyprop`
RUNS = {
    "one-row": (TRAIN + ["one.csv", "--targets", "y", "--out", "one.npz"], 1),
    "constant-target": (TRAIN + ["const.csv", "--targets", "y", "--out", "const.npz"], 1),
    "three-rows": (MINI_BATCH + ["three.csv", "--targets", "y", "--hidden", "2", "--epochs", "2",
                                 "--out", "three.npz"], 0),
    "six-rows": (MINI_BATCH + ["six.csv", "--targets", "y", "--hidden", "1", "--epochs", "2", "--out", "six.npz"],
                 0),
    "lm": (TRAIN + ["tanh.csv", "--targets", "y", "--hidden", "1", "--method", "levenberg-marquardt",
                    "--out", "lm.npz"], 0),
    "lm-too-few-rows": (TRAIN + ["small.csv", "--targets", "y", "--method", "levenberg-marquardt",
                                 "--out", "few.npz"], 1),
    "diverging": (MINI_BATCH + ["small.csv", "--targets", "y", "--optimizer", "sgd", "--learning-rate", "1e200",
                           "--schedule", "constant", "--out", "diverged.npz"], 1),
    "clip-norm-with-lm": (TRAIN + ["small.csv", "--targets", "y", "--method", "lbfgs", "--clip-norm", "1",
                                   "--out", "x.npz"], 2),
    "lm-log": (["train", "small.csv", "--targets", "y", "--hidden", "4", "--method", "lbfgs",  # stops at the limit
                "--max-evaluations", "100", "--out", "log.npz"], 0),
    "pump": (MINI_BATCH + ["pump.csv", "--targets", "head,power", "--inputs", "speed,flow", "--hidden", "3",
                      "--epochs", "3", "--out", "pump.npz"], 0),
    "twice": (TRAIN + ["twice.csv", "--targets", "y"], 1),
    "docs-list": (["docs"], 0),
    "docs-cli": (["docs", "cli"], 0),
    "docs-unknown": (["docs", "nope"], 2),
    "overview": ([], 0),
}


@pytest.fixture(scope="module")
def folder(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("first_use")
    for name, text in FILES.items():
        (folder / name).write_text(text, encoding="utf-8")
    return folder


@pytest.fixture(scope="module")
def runs(folder) -> dict[str, subprocess.CompletedProcess]:
    def run(arguments: list[str]) -> subprocess.CompletedProcess:
        return subprocess.run([sys.executable, "-m", "tinyprop", *arguments], cwd=folder, capture_output=True,
                              text=True, timeout=300)

    with ThreadPoolExecutor(max_workers=3) as pool:
        done = dict(zip(RUNS, pool.map(run, [arguments for arguments, _ in RUNS.values()])))
    for name, (_, status) in RUNS.items():
        assert "Traceback" not in done[name].stderr, done[name].stderr
        assert done[name].returncode == status, (name, done[name].stderr)
    return done


def lines(text: str) -> list[str]:
    return text.splitlines()


def report(folder: Path, model: str) -> dict:
    return json.loads((folder / model.replace(".npz", ".report.json")).read_text(encoding="utf-8"))


# ---------------------------------------------------------------- 3: tiny or degenerate data
def test_data_that_cannot_be_fitted_is_refused_in_one_line(runs):
    assert lines(runs["one-row"].stderr) == [
        "tinyprop train: error: one.csv: 1 row left for training (of 1 data row); "
        "fitting needs at least 2 training rows"]
    assert lines(runs["constant-target"].stderr) == [
        "tinyprop train: error: const.csv: target column 'y' is 1 on all 14 training rows; "
        "a constant cannot be fitted or evaluated"]


def test_weak_data_are_trained_with_a_warning_per_weakness(runs):
    assert lines(runs["three-rows"].stderr) == [
        "tinyprop train: warning: three.csv: 3 training rows give 3 target values for 7 parameters: the network can "
        "fit them exactly, so its training error says little; use a smaller --hidden or more rows",
        "tinyprop train: warning: three.csv: the validation part is empty (--validation-fraction 0.15 of 3 rows "
        "rounds to 0 rows): no validation loss is tracked",
        "tinyprop train: warning: three.csv: the test part is empty (--test-fraction 0.15 of 3 rows rounds to 0 "
        "rows): there is no error measured on unseen rows",
    ]


def test_check_data_in_the_library():
    X = np.linspace(0, 1, 40).reshape(-1, 1)
    data = Dataset(X, np.sin(X), ("x",), ("y",), {})
    settings = FitSettings()
    assert check_data(data, split_rows(40, settings), settings, n_params=20) == []
    assert len(check_data(data, split_rows(40, settings), settings, n_params=29)) == 1  # 28 training values
    empty = FitSettings(validation_fraction=0.0, test_fraction=0.0)
    assert check_data(data, split_rows(40, empty), empty, n_params=20) == []  # parts emptied on purpose
    flat_input = replace(data, X=np.column_stack([X, np.zeros_like(X)]), input_names=("x", "off"))
    assert check_data(flat_input, split_rows(40, settings), settings, n_params=20) == [
        "input column 'off' is 0 on all 28 training rows: it cannot inform the fit"]
    constant = replace(data, y=np.full_like(X, 2.5))
    with pytest.raises(ValueError, match="target column 'y' is 2.5 on all 28 training rows"):
        check_data(constant, split_rows(40, settings), settings, n_params=20)


# ---------------------------------------------------------------- 4: only the settings that applied
def test_least_squares_records_no_mini_batch_settings(runs, folder):
    expected = {"hidden", "activation", "method", "seed", "validation_fraction", "test_fraction", "dtype",
                "max_evaluations", "loss"}
    assert set(report(folder, "lm.npz")["settings"]) == expected
    metadata = load_model_file(folder / "lm.npz").metadata
    assert set(metadata["training"]["settings"]) == expected


def test_mini_batch_records_no_least_squares_or_sgd_settings(runs, folder):
    settings = report(folder, "six.npz")["settings"]
    assert {"optimizer", "lr", "epochs", "batch_size", "schedule", "clip_norm", "patience"} <= set(settings)
    assert "max_evaluations" not in settings and "momentum" not in settings  # momentum applies to sgd only
    assert set(load_model_file(folder / "six.npz").metadata["training"]["settings"]) == set(settings)


# ---------------------------------------------------------------- 5: messages in options
def test_library_advice_is_given_as_options(runs):
    assert lines(runs["lm-too-few-rows"].stderr)[-1] == (
        "tinyprop train: error: fitting failed: Levenberg-Marquardt needs at least as many residuals as parameters: "
        "22 residuals (samples x outputs) for 321 parameters; use --method lbfgs")
    assert lines(runs["diverging"].stderr)[-1].endswith(
        "the network holds the last finite weights. "
        "Lower the learning rate (--learning-rate 1e+200) or set --clip-norm")
    assert lines(runs["clip-norm-with-lm"].stderr) == [
        "tinyprop train: error: --clip-norm applies to --method mini-batch, not lbfgs"]


def test_every_translated_phrase_occurs_in_the_library():
    """The table must not rot: each pattern still matches a message written in the library's source."""
    source = "\n".join(path.read_text(encoding="utf-8") for path in (ROOT / "src" / "tinyprop").rglob("*.py")
                       if "cli" not in path.parts)
    for pattern, _ in OPTION_WORDS:
        assert re.search(pattern, source), pattern
    assert option_words("x; use method='lbfgs'") == "x; use --method lbfgs"
    assert option_words("not finite; choose other starting weights") == "not finite; try another --seed"
    assert option_words("(see docs/export.md, 'Custom activations')") == (
        "(see 'tinyprop docs export', 'Custom activations')")


# ---------------------------------------------------------------- 6: why the solver stopped, in our words
def test_solver_stop_is_said_in_our_words_with_scipys_text_kept(runs, folder):
    converged = [line for line in lines(runs["lm"].stdout) if line.startswith("fit: ")]
    assert len(converged) == 1 and re.fullmatch(
        r"fit: converged on (the gradient|the relative reduction|the step size|the relative reduction and the step "
        r"size)[:a-z' ]*[^;]*; \d+ evaluations, \d+ iterations \(\d+\.\d s\)", converged[0]), converged
    fit = report(folder, "lm.npz")["fit"]
    assert fit["stop_reason"] == "converged" and fit["scipy_message"] and fit["scipy_message"] not in fit["message"]
    stdout = lines(runs["lm-log"].stdout)
    index = next(i for i, line in enumerate(stdout) if line.startswith("fit: "))
    assert re.fullmatch(r"fit: stopped at the evaluation limit before converging; \d+ evaluations, \d+ iterations "
                        r"\(\d+\.\d s\)", stdout[index])
    assert stdout[index + 1] == "     raise --max-evaluations, or check the data and the network size"
    assert report(folder, "log.npz")["fit"]["scipy_message"] == "STOP: TOTAL NO. OF F,G EVALUATIONS EXCEEDS LIMIT"


@pytest.mark.parametrize("method, status, message, reason, words", [
    ("levenberg-marquardt", 0, "", "evaluation limit", "stopped at the evaluation limit"),
    ("levenberg-marquardt", 1, "", "converged", "converged on the gradient"),
    ("levenberg-marquardt", 2, "", "converged", "converged on the relative reduction"),
    ("levenberg-marquardt", 3, "", "converged", "converged on the step size"),
    ("levenberg-marquardt", 4, "", "converged", "converged on the relative reduction and the step size"),
    ("lbfgs", 0, "CONVERGENCE: NORM OF PROJECTED GRADIENT <= PGTOL", "converged", "converged on the gradient"),
    ("lbfgs", 0, "CONVERGENCE: RELATIVE REDUCTION OF F <= FACTR*EPSMCH", "converged",
     "converged on the relative reduction"),
    ("lbfgs", 1, "STOP: TOTAL NO. OF F,G EVALUATIONS EXCEEDS LIMIT", "evaluation limit", "stopped at the evaluation"),
    ("lbfgs", 2, "ABNORMAL: ", "no progress", "stopped: the line search found no lower loss"),
    ("lbfgs", 9, "SOMETHING NEW", "no progress", "ended with solver status 9 (SOMETHING NEW)"),
])
def test_solver_stop_for_each_scipy_status(method, status, message, reason, words):
    """Statuses as documented by scipy.optimize.least_squares (method='lm') and minimize (L-BFGS-B)."""
    x = np.linspace(-1, 1, 8).reshape(-1, 1)
    net = tp.Network([tp.Affine(1, 1)], seed=0)
    result = replace(solve(net, x, 2 * x[:, 0] + 1, method=method), status=status, message=message)
    got_reason, sentence = solver_stop(result)
    assert got_reason == reason and sentence.startswith(words) and (message == "" or "9" in words
                                                                     or message not in sentence)


# ---------------------------------------------------------------- 7: units
def test_units_in_the_header_reach_the_model_report_and_code(runs, folder):
    stdout = lines(runs["pump"].stdout)
    assert stdout[0] == "data: pump.csv: 40 rows; inputs speed [rpm], flow [m3/h]; targets head [m], power [kW]"
    assert re.fullmatch(r"test RMSE \(6 rows\): head \S+ m, power \S+ kW", stdout[-3]), stdout
    metadata = load_model_file(folder / "pump.npz").metadata
    assert metadata["inputs"] == [{"name": "speed", "unit": "rpm"}, {"name": "flow", "unit": "m3/h"}]
    assert metadata["outputs"] == [{"name": "head", "unit": "m"}, {"name": "power", "unit": "kW"}]
    assert report(folder, "pump.npz")["data"]["units"] == {"speed": "rpm", "flow": "m3/h", "head": "m", "power": "kW"}
    done = subprocess.run([sys.executable, "-m", "tinyprop", "export", "pump.npz", "--out", "code", "--name", "pump",
                           "--language", "c", "--language", "c-fixed", "--calibration", "pump.csv"],
                          cwd=folder, capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    header = (folder / "code" / "pump.h").read_text()
    assert " *   x[1]  flow [m3/h]" in header and " *   y[0]  head [m]" in header
    table = lines(done.stdout)
    assert any(re.fullmatch(r"  head \[m\]   Q-?\d+ .*", line) for line in table), table
    assert any(re.fullmatch(r"  power \[kW\] Q-?\d+ .*", line) for line in table), table
    assert not any(line.startswith("  y[") for line in table)
    assert " *   y[0] (head [m]): largest |error|" in (folder / "code" / "pump_q.h").read_text()


def test_a_name_given_twice_with_and_without_unit_is_refused(runs):
    assert lines(runs["twice"].stderr) == [
        "tinyprop train: error: twice.csv: the header names the column 'a' twice (with its unit or without)"]


def test_the_parity_plot_is_labelled_with_units(runs, folder, tmp_path):
    pytest.importorskip("matplotlib")
    done = subprocess.run([sys.executable, "-m", "tinyprop", *TRAIN, "pump.csv", "--targets", "head", "--inputs",
                           "speed,flow", "--hidden", "2", "--epochs", "2", "--out", str(tmp_path / "p.npz"),
                           "--plots", str(tmp_path)], cwd=folder, capture_output=True, text=True, timeout=120)
    assert done.returncode == 0 and (tmp_path / "parity.png").exists(), done.stderr


# ---------------------------------------------------------------- 8: progress in logs
def test_least_squares_progress_in_a_log_has_the_epoch_lines_cadence(runs):
    progress = [line for line in lines(runs["lm-log"].stderr) if line.startswith("lbfgs: ")]
    assert 2 <= len(progress) <= 12, progress
    assert progress[0].startswith("lbfgs: 1 of at most 100 evaluations, 1 gradient, lowest rss ")
    assert not any("\r" in line or "\033" in line for line in progress)


def test_least_squares_progress_in_a_log_does_not_follow_the_clock(monkeypatch, capsys):
    """A slow fit (here: a clock that moves 1 s per reading) still logs once per tenth of the evaluation limit."""
    ticks = iter(range(10**6))
    monkeypatch.setattr(solve_module, "ProgressLine", partial(ProgressLine, clock=lambda: float(next(ticks))))
    x = np.linspace(-1, 1, 20).reshape(-1, 1)
    net = tp.Network([tp.Affine(1, 4), tp.Tanh(), tp.Affine(4, 1)], seed=0)
    result = solve(net, x, np.sin(3 * x[:, 0]), method="lbfgs", max_evaluations=200, progress=True)
    logged = capsys.readouterr().err.splitlines()
    assert result.function_evaluations > 100
    assert 2 <= len(logged) <= 12, len(logged)


# ---------------------------------------------------------------- 9: consistency
def test_one_row_is_a_row(runs):
    stdout = lines(runs["six-rows"].stdout)
    assert "split (seed 0): 4 training, 1 validation, 1 test rows" in stdout
    assert any(line.startswith("validation RMSE (1 row): y ") for line in stdout), stdout
    assert any(line.startswith("test RMSE (1 row): y ") for line in stdout), stdout


def test_exports_create_a_missing_folder_like_the_command(tmp_path):
    net = tp.Network([tp.Affine(2, 3), tp.Tanh(), tp.Affine(3, 1)], seed=0)
    report = export_c_fixed_point(net, tmp_path / "mcu" / "q", np.random.default_rng(0).normal(size=(8, 2)))
    assert report.header == tmp_path / "mcu" / "q" / "model.h" and report.header.exists()
    assert export_python(net, tmp_path / "py" / "gen").exists()
    assert all(path.exists() for path in export_c(net, tmp_path / "c" / "gen"))
    (tmp_path / "file").write_text("")
    with pytest.raises(ValueError, match="'.*file' is a file"):
        export_c(net, tmp_path / "file")


@pytest.mark.skipif(not SCRIPT.exists(), reason="the tinyprop script is not installed next to this Python")
def test_module_and_script_search_the_same_places(folder):
    """A module in the current folder is found by neither `python -m tinyprop` nor the `tinyprop` script."""
    (folder / "here_activation.py").write_text("import tinyprop\n", encoding="utf-8")
    tp.save(tp.Network([tp.Affine(1, 1)], seed=0), folder / "plain.npz")
    arguments = ["check", "--import", "here_activation", "plain.npz"]
    module = subprocess.run([sys.executable, "-m", "tinyprop", *arguments], cwd=folder, capture_output=True,
                            text=True, timeout=120)
    script = subprocess.run([str(SCRIPT), *arguments], cwd=folder, capture_output=True, text=True, timeout=120)
    expected = ["tinyprop check: error: --import here_activation: no module named 'here_activation' on the module "
                "search path (sys.path); add its folder to PYTHONPATH or give the path of its .py file"]
    assert (module.returncode, lines(module.stderr)) == (2, expected)
    assert (script.returncode, lines(script.stderr)) == (2, expected)


# ---------------------------------------------------------------- 10: docs
def test_docs_ship_with_the_package_and_the_help_points_to_them(runs):
    assert runs["docs-cli"].stdout == (ROOT / "docs" / "cli.md").read_text(encoding="utf-8")
    listing = lines(runs["docs-list"].stdout)
    assert any(re.fullmatch(r"  cli +The `tinyprop` command", line) for line in listing), listing
    assert lines(runs["docs-unknown"].stderr)[0].startswith(
        "tinyprop docs: error: no page named 'nope'; the pages are ")
    overview = runs["overview"].stdout
    assert "in the tinyprop source" not in overview and "'tinyprop docs cli' prints the full guide" in overview


def test_every_option_of_every_command_is_in_docs_cli():
    text = (ROOT / "docs" / "cli.md").read_text(encoding="utf-8")
    _, subparsers = build_parser()
    for name, parser in subparsers.items():
        for action in parser._actions:
            for option in action.option_strings:
                if option not in ("-h", "--help"):
                    assert f"`{option}" in text, f"tinyprop {name} {option} is not in docs/cli.md"


def test_the_export_language_row_lists_every_language():
    row = next(line for line in (ROOT / "docs" / "cli.md").read_text(encoding="utf-8").splitlines()
               if line.startswith("| `--language` |"))
    for language in ("`c`", "`python`", "`c-fixed`"):
        assert language in row


def test_git_ignores_the_demos_output_folder():
    assert "/tinyprop-demo/" in (ROOT / ".gitignore").read_text(encoding="utf-8").splitlines()
