"""User mistakes at the `tinyprop` command: one clear line on stderr, the right exit status, no traceback.

Exit status 2: the command line is wrong; 1: a file, the data or the computation
failed (see docs/cli.md). Each case also checks that the message names the
problem (the file, line, column, option or value). The cases in
``SUBPROCESS_CASES`` run as a user would run them (``python -m tinyprop``, a few
processes at a time, all started once for the module); the others call
``tinyprop.cli.main`` in this process, which saves the interpreter start-up.
"""

from __future__ import annotations

import io
import subprocess
import sys
import zipfile
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import pytest

import tinyprop as tp
from tinyprop.cli import main

GOOD = "x1,x2,y\n0.5,1.0,2.0\n1.5,-1.0,0.3\n2.5,0.0,1.1\n-0.5,2.0,0.7\n"

FILES = {
    "good.csv": GOOD,
    "bad_cell.csv": "x1,x2,y\n1,2,3\n4,5,6\n7,abc,9\n",
    "short_row.csv": "# comment\nx1,x2,y\n1,2,3\n\n4,5\n",
    "empty_cell.csv": "x1,x2,y\n1,2,3\n4,,6\n",
    "infinite.csv": "x1,x2,y\n1,2,3\n4,inf,6\n",
    "semicolon.csv": "x1;x2;y\n1;2;3\n",
    "empty.csv": "",
    "header_only.csv": "# synthetic\nx1,x2,y\n",
    "duplicate.csv": "x1,x1,y\n1,2,3\n",
}

# (id, arguments, exit status, fragments the one-line message must contain)
CASES = [
    ("missing-data-file", ["train", "nope.csv", "--targets", "y"], 1, ["cannot open", "nope.csv", "No such file"]),
    ("unknown-target", ["train", "good.csv", "--targets", "speed"], 2, ["no column named 'speed'", "'x1', 'x2', 'y'"]),
    ("unknown-input", ["train", "good.csv", "--targets", "y", "--inputs", "x1,x9"], 2, ["no column named 'x9'"]),
    ("non-numeric-cell", ["train", "bad_cell.csv", "--targets", "y"], 1,
     ["bad_cell.csv, line 4, column 'x2'", "'abc' is not a number"]),
    ("short-row", ["train", "short_row.csv", "--targets", "y"], 1, ["short_row.csv, line 5", "2 fields", "has 3"]),
    ("empty-cell", ["train", "empty_cell.csv", "--targets", "y"], 1, ["line 3, column 'x2'", "empty"]),
    ("infinite-cell", ["train", "infinite.csv", "--targets", "y"], 1, ["line 3, column 'x2'", "not a finite number"]),
    ("semicolon-file", ["train", "semicolon.csv", "--targets", "y"], 1, ["';'", "delimiter"]),
    ("not-utf8", ["train", "latin1.csv", "--targets", "y"], 1, ["latin1.csv", "not UTF-8"]),
    ("empty-file", ["train", "empty.csv", "--targets", "y"], 1, ["empty.csv", "no header row"]),
    ("header-only", ["train", "header_only.csv", "--targets", "y"], 1, ["no data rows"]),
    ("duplicate-header", ["train", "duplicate.csv", "--targets", "y"], 1, ["'x1' more than once"]),
    ("bad-delimiter", ["train", "good.csv", "--targets", "y", "--delimiter", "::"], 2, ["--delimiter", "'::'"]),
    ("missing-targets-option", ["train", "good.csv"], 2, ["--targets"]),
    ("zero-epochs", ["train", "good.csv", "--targets", "y", "--epochs", "0"], 2, ["--epochs", "got 0"]),
    ("bad-hidden", ["train", "good.csv", "--targets", "y", "--hidden", "16,x"], 2, ["--hidden", "'16,x'"]),
    ("fractions-too-large", ["train", "good.csv", "--targets", "y", "--validation-fraction", "0.6",
                             "--test-fraction", "0.5"], 2, ["--validation-fraction", "no rows for training"]),
    ("unknown-option", ["train", "good.csv", "--targets", "y", "--colour", "red"], 2,
     ["tinyprop train", "unrecognized arguments: --colour red"]),
    ("target-is-input", ["train", "good.csv", "--targets", "y", "--inputs", "x1,y"], 2,
     ["'y' cannot be both an input and a target"]),
    ("output-is-folder", ["train", "good.csv", "--targets", "y", "--out", "."], 2, ["'.' is a folder"]),
    ("too-few-rows-for-lm", ["train", "good.csv", "--targets", "y", "--method", "levenberg-marquardt",
                             "--test-fraction", "0", "--validation-fraction", "0"], 1,
     ["fitting failed", "Levenberg-Marquardt needs at least as many residuals as parameters"]),
    ("diverging-learning-rate", ["train", "good.csv", "--targets", "y", "--method", "mini-batch",
                                 "--optimizer", "sgd", "--learning-rate",
                                 "1e200", "--schedule", "constant", "--test-fraction", "0",
                                 "--validation-fraction", "0"], 1, ["fitting failed", "diverged"]),
    ("missing-model", ["inspect", "none.npz"], 1, ["model file 'none.npz' does not exist"]),
    ("csv-as-model", ["inspect", "good.csv"], 1, ["good.csv", "not a tinyprop archive"]),
    ("tampered-model", ["inspect", "tampered.npz"], 1, ["tampered.npz", "layer0.weight", "SHA-256", "changed"]),
    ("check-columns-not-in-file", ["check", "model.npz", "--data", "bad_cell.csv"], 2,
     ["no column named 'u1', 'u2'", "the model's input names"]),
    ("check-sample-too-small", ["check", "model.npz", "--parameters", "3"], 2,
     ["--parameters must be at least 4 for this model", "got 3"]),
    ("export-keyword-name", ["export", "model.npz", "--name", "int"], 2, ["--name", "keyword", "'int'"]),
    ("fixed-point-without-calibration", ["export", "model.npz", "--language", "c-fixed"], 2,
     ["--language c-fixed needs --calibration DATA.csv"]),
    ("calibration-without-fixed-point", ["export", "model.npz", "--calibration", "good.csv"], 2,
     ["--calibration applies to --language c-fixed"]),
    ("fixed-point-headroom-below-one", ["export", "model.npz", "--language", "c-fixed", "--calibration", "good.csv",
                                        "--headroom", "0.5"], 2, ["--headroom must be at least 1, got 0.5"]),
    ("calibration-columns-missing", ["export", "model.npz", "--language", "c-fixed", "--calibration", "good.csv"], 2,
     ["no column named 'u1', 'u2'", "the model's input names"]),
    ("demo-out-is-a-file", ["demo", "--out", "good.csv"], 2, ["'good.csv' is an existing file"]),
    ("unknown-command", ["frobnicate"], 2, ["invalid choice: 'frobnicate'", "demo"]),
]
SUBPROCESS_CASES = {
    "missing-data-file", "unknown-target", "non-numeric-cell", "short-row", "not-utf8", "missing-targets-option",
    "zero-epochs", "unknown-option", "too-few-rows-for-lm", "missing-model", "tampered-model",
    "export-keyword-name", "demo-out-is-a-file", "unknown-command",
}


def _tampered(source: Path, target: Path) -> None:
    """Copy a model file with one bit of one stored weight flipped (the archive itself stays valid)."""
    buffer = io.BytesIO()
    with zipfile.ZipFile(source) as original, zipfile.ZipFile(buffer, "w", zipfile.ZIP_STORED) as copy:
        for info in original.infolist():
            data = original.read(info.filename)
            if info.filename == "layer0.weight.npy":
                data = data[:-1] + bytes([data[-1] ^ 1])
            copy.writestr(info, data)
    target.write_bytes(buffer.getvalue())


@pytest.fixture(scope="module")
def folder(tmp_path_factory) -> Path:
    """The files the mistakes are made with."""
    folder = tmp_path_factory.mktemp("mistakes")
    for name, text in FILES.items():
        (folder / name).write_text(text, encoding="utf-8")
    (folder / "latin1.csv").write_bytes("x1,x2,y\n1,2,3\n4,5,6 \xb0C\n".encode("latin-1"))
    net = tp.Network([tp.Affine(2, 3), tp.Tanh(), tp.Affine(3, 1)], seed=0)
    tp.save(net, folder / "model.npz", metadata={"inputs": [{"name": "u1"}, {"name": "u2"}],
                                                 "outputs": [{"name": "v"}]})
    _tampered(folder / "model.npz", folder / "tampered.npz")
    return folder


@pytest.fixture(scope="module")
def subprocess_results(folder) -> dict[str, tuple[int, str]]:
    def run(arguments: list[str]) -> tuple[int, str]:
        done = subprocess.run([sys.executable, "-m", "tinyprop", *arguments], cwd=folder,
                              capture_output=True, text=True, timeout=120)
        return done.returncode, done.stderr

    chosen = [case for case in CASES if case[0] in SUBPROCESS_CASES]
    with ThreadPoolExecutor(max_workers=4) as pool:
        return dict(zip([case[0] for case in chosen], pool.map(run, [case[1] for case in chosen])))


@pytest.mark.parametrize("name, arguments, status, fragments", CASES, ids=[case[0] for case in CASES])
def test_user_mistake_gives_one_clear_line(name, arguments, status, fragments, folder, request, monkeypatch, capsys):
    if name in SUBPROCESS_CASES:
        returncode, message = request.getfixturevalue("subprocess_results")[name]
    else:
        monkeypatch.chdir(folder)
        try:
            returncode = main(arguments)
        except SystemExit as stop:  # argparse's own exit
            returncode = stop.code
        message = capsys.readouterr().err
    assert "Traceback" not in message
    assert message.count("\n") == 1 and message.endswith("\n"), f"expected one line, got {message!r}"
    command = "tinyprop" if name == "unknown-command" else f"tinyprop {arguments[0]}"
    assert message.startswith(f"{command}: error: "), message
    for fragment in fragments:
        assert fragment in message, f"{fragment!r} not in {message!r}"
    assert returncode == status, message


def test_at_least_ten_mistakes_run_as_a_user_would():
    assert len(SUBPROCESS_CASES) >= 10 and SUBPROCESS_CASES <= {case[0] for case in CASES}
