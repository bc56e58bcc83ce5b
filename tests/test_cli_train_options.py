"""`tinyprop train` refuses an option that does not apply to the chosen method or optimizer.

The mini-batch options are refused with the least-squares methods,
``--max-evaluations`` with mini-batch, ``--momentum`` with an optimizer other
than sgd: exit status 2 and one line naming the option, what it applies to and
what was chosen. Run in-process (``tinyprop.cli.main``); the data are synthetic.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from tinyprop.cli import main
from tinyprop.recipes import FitSettings

LEAST_SQUARES = ("levenberg-marquardt", "lbfgs")
MINI_BATCH_OPTIONS = [
    ("--optimizer", "sgd"),
    ("--learning-rate", "0.01"),
    ("--schedule", "constant"),
    ("--momentum", "0.5"),
    ("--epochs", "10"),
    ("--batch-size", "8"),
    ("--patience", "3"),
]

# (id, extra arguments, the expected message after "tinyprop train: error: ")
REFUSED = [
    *((f"{option[2:]}-with-{method}", ["--method", method, option, value],
       f"{option} applies to --method mini-batch, not {method}")
      for method in LEAST_SQUARES for option, value in MINI_BATCH_OPTIONS),
    ("default-value-given-with-lbfgs", ["--method", "lbfgs", "--epochs", str(FitSettings().epochs)],
     "--epochs applies to --method mini-batch, not lbfgs"),
    ("max-evaluations-with-default-method", ["--max-evaluations", "50"],
     "--max-evaluations applies to --method levenberg-marquardt or lbfgs, not auto"),
    ("epochs-with-default-method", ["--epochs", "10"], "--epochs applies to --method mini-batch, not auto"),
    ("restarts-with-mini-batch", ["--method", "mini-batch", "--restarts", "2"],
     "--restarts applies to --method auto or evidence-lm, not mini-batch"),
    ("restarts-with-adam-branch", ["--method", "adam-early-stopping", "--restarts", "2"],
     "--restarts applies to --method auto or evidence-lm, not adam-early-stopping"),
    ("activation-with-the-recipe", ["--activation", "relu"],
     "--method auto (the default recipe) uses tanh hidden units; --activation relu needs --method mini-batch, "
     "levenberg-marquardt or lbfgs"),
    ("max-evaluations-with-mini-batch", ["--method", "mini-batch", "--max-evaluations", "50"],
     "--max-evaluations applies to --method levenberg-marquardt or lbfgs, not mini-batch"),
    ("momentum-with-default-optimizer", ["--method", "mini-batch", "--momentum", "0.5"],
     "--momentum applies to --optimizer sgd, not adam"),
    ("zero-momentum-with-rmsprop", ["--method", "mini-batch", "--optimizer", "rmsprop", "--momentum", "0"],
     "--momentum applies to --optimizer sgd, not rmsprop"),
]


@pytest.fixture
def data_folder(tmp_path, monkeypatch):
    """A synthetic CSV file (y = x1 * x2 + x1 at uniform random inputs) in the working folder."""
    X = np.random.default_rng(11).uniform(-1.0, 1.0, size=(40, 2))
    y = X[:, 0] * X[:, 1] + X[:, 0]
    lines = ["x1,x2,y"] + [",".join(repr(v) for v in row) for row in np.column_stack([X, y]).tolist()]
    (tmp_path / "data.csv").write_text("\n".join(lines) + "\n", encoding="utf-8")
    monkeypatch.chdir(tmp_path)
    return tmp_path


@pytest.mark.parametrize("name, extra, expected", REFUSED, ids=[case[0] for case in REFUSED])
def test_option_that_does_not_apply_is_refused(name, extra, expected, data_folder, capsys):
    status = main(["train", "data.csv", "--targets", "y", "--hidden", "2", "--quiet", *extra])
    out, err = capsys.readouterr()
    assert status == 2
    assert err == f"tinyprop train: error: {expected}\n"
    assert out == "" and not (data_folder / "model.npz").exists()


@pytest.mark.parametrize("method", LEAST_SQUARES)
def test_least_squares_methods_run_without_the_mini_batch_options(method, data_folder, capsys):
    status = main(["train", "data.csv", "--targets", "y", "--hidden", "2", "--method", method, "--quiet"])
    assert status == 0, capsys.readouterr().err
    report = json.loads((data_folder / "model.report.json").read_text(encoding="utf-8"))
    assert report["fit"]["method"] == method and report["history"] is None
    assert report["settings"]["max_evaluations"] == FitSettings().max_evaluations
    assert report["metrics"]["training"]["targets"]["y"]["rmse"] < 0.2  # the target's own spread is about 0.7


def test_max_evaluations_given_reaches_the_solver(data_folder, capsys):
    status = main(["train", "data.csv", "--targets", "y", "--hidden", "2", "--method", "lbfgs",
                   "--max-evaluations", "3", "--quiet"])
    assert status == 0, capsys.readouterr().err
    report = json.loads((data_folder / "model.report.json").read_text(encoding="utf-8"))
    assert report["settings"]["max_evaluations"] == 3
    # scipy's L-BFGS-B tests its limit after an evaluation, so it may make one more
    assert report["fit"]["function_evaluations"] <= 4 and report["fit"]["success"] is False


def test_help_states_the_defaults_and_the_rule(capsys):
    with pytest.raises(SystemExit):
        main(["train", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    defaults = FitSettings()
    for fragment in (f"mini-batch optimizer (default {defaults.optimizer})", f"(default {defaults.schedule})",
                     "momentum of sgd (default 0)", f"passes over the training rows (default {defaults.epochs})",
                     f"rows per update (default {defaults.batch_size})",
                     f"(default {defaults.max_evaluations})", "adam 0.001, rmsprop 0.001, sgd 0.01",
                     "--max-evaluations only with --method levenberg-marquardt or lbfgs",
                     "--momentum only with --optimizer sgd (refused otherwise)"):
        assert fragment in text, fragment
