"""The command line under adversarial use (issue 14, issue 15 items 1-2): exit status, one message, files.

``CASES`` are listed, with their messages, in the command-line table of
docs/reliability.md (a test checks that the table lists exactly these). The
data are synthetic: the bundled battery scenario and small hand-written files.
"""

from __future__ import annotations

import hashlib
import json
import re
import subprocess
import sys
import threading
from pathlib import Path

import numpy as np
import pytest

import tinyprop as tp
import tinyprop.archive as archive
from tinyprop.cli import main
from tinyprop.datasets import write_battery_csv

DOC = Path(__file__).resolve().parents[1] / "docs" / "reliability.md"
MB = "--method=mini-batch"  # --epochs and --learning-rate apply to mini-batch training only


def _dirty_with_text_column(path: Path) -> None:
    rows = ["when,speed,flow,head"] + [f"2024-01-01T00:{i:02d},{1000 + i},{0.1 * i:.2f},{3 + 0.01 * i:.3f}"
                                       for i in range(30)]
    rows[5] = "2024-01-01T00:04,1004,,3.04"
    rows[9] = "2024-01-01T00:08,1008,n/a,3.08"
    path.write_text("\n".join(rows) + "\n", encoding="utf-8")


@pytest.fixture(scope="module")
def folder(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("hardening")
    write_battery_csv(folder / "battery.csv", n=120, seed=1)
    assert main(["train", str(folder / "battery.csv"), "--targets", "soc", "--hidden", "4", MB, "--epochs", "3",
                 "--quiet", "--out", str(folder / "model.npz")]) == 0
    stored = tp.load_model_file(folder / "model.npz")  # the same model without its operating envelope
    tp.save(stored.network, folder / "bare.npz",
            metadata={key: value for key, value in stored.metadata.items() if key != "envelope"})
    lines = (folder / "battery.csv").read_text().splitlines()
    header_at = next(i for i, line in enumerate(lines) if not line.startswith("#"))
    blank = lines[: header_at + 1] + lines[header_at + 1:]
    blank[-1] = ",".join(blank[-1].split(",")[:-1] + [""])  # the last row's target cell is blank
    (folder / "blank_last_cell.csv").write_text("\n".join(blank) + "\n")
    header = lines[header_at]
    extreme = "1e308,-1e308,1e308,1e308\n-1e308,1e308,-1e308,-1e308\n"
    (folder / "extreme.csv").write_text(header + "\n" + extreme + lines[-1] + "\n")
    _dirty_with_text_column(folder / "dirty.csv")
    return folder


def _run(folder: Path, arguments: list[str], capsys) -> tuple[int, str, str]:
    capsys.readouterr()
    status = main([a.replace("{f}", str(folder)) for a in arguments])
    out, err = capsys.readouterr()
    return status, out, err.replace(str(folder) + "/", "")


# (id, arguments, exit status, regex the whole stderr must match)
CASES = [
    ("train-every-bad-cell-and-text-hint", ["train", "{f}/dirty.csv", "--targets", "head", "--quiet"], 1,
     r"tinyprop train: error: dirty\.csv: 32 cells are not usable numbers .*\n"
     r"  column 'when': 30 cells, the first on line 2: '2024-01-01T00:00' is not a number\n"
     r"  line 6, column 'flow': the cell is empty; every used cell must hold a number\n"
     r"  line 10, column 'flow': 'n/a' is not a number\n"
     r"  'when' holds text; without --inputs every column that is not a target is an input: name the input "
     r"columns with --inputs to leave it out\n"),
    ("train-learning-rate-far-too-high", ["train", "{f}/battery.csv", "--targets", "soc", "--learning-rate", "1e6",
                                         MB, "--hidden", "4", "--epochs", "20", "--quiet", "--out", "{f}/lr.npz"], 1,
     r"tinyprop train: error: fitting failed: the validation RMSE of 'soc' is .*, .* times the RMSE of predicting "
     r"the training mean .*lower --learning-rate \(nothing was written\)\n"),
    ("train-hidden-too-large", ["train", "{f}/battery.csv", "--targets", "soc", "--hidden", "3000000000",
                                "--out", "{f}/huge.npz"], 2,
     r"tinyprop train: error: --hidden 3000000000: the network would have 15000000001 parameters, 112 GiB for the "
     r"weights alone, more than this machine's memory .*; use narrower layers\n"),
    ("check-data-blank-cell-outside-the-sample", ["check", "{f}/model.npz", "--data", "{f}/blank_last_cell.csv",
                                                  "--rows", "4"], 1,
     r"tinyprop check: error: blank_last_cell\.csv, line \d+, column 'soc': the cell is empty; every used cell must "
     r"hold a number\n"),
    ("check-data-overflowing-rows", ["check", "{f}/model.npz", "--data", "{f}/extreme.csv"], 1,
     r"tinyprop check: warning: 2 of the 3 rows of extreme\.csv lie outside the model's operating envelope .*\n"
     r"(tinyprop check: warning:   input '[a-z_A-Z]+': 2 of 3 rows outside the envelope .*\n){3}"
     r"tinyprop check: error: cannot check on these rows: the squared error overflows on 2 of the 3 rows of "
     r"extreme\.csv .*\n"),
    ("export-name-refused-by-one-language", ["export", "{f}/model.npz", "--name", "math", "--out", "{f}/code"], 2,
     r"tinyprop export: error: --name: name must not be a standard-library module name \(it would shadow it\), "
     r"got 'math' \(for --language python\)\n"),
    ("export-fixed-point-calibration-outside-envelope", ["export", "{f}/model.npz", "--language", "c-fixed",
                                                        "--calibration", "{f}/extreme.csv", "--out", "{f}/q3"], 0,
     r"tinyprop export: warning: 2 of the calibration rows of extreme\.csv lie outside the model's operating "
     r"envelope \(training data\); no error measured or bound proven for the model holds there:\n"
     r"(tinyprop export: warning: .*\n)*"
     r"tinyprop export: warning: the integer code's largest error on the calibration rows is .*% of output 0's "
     r"range; calibration rows lie outside the envelope its formats were proven over .*\n"),
    ("export-fixed-point-overflowing-calibration", ["export", "{f}/bare.npz", "--language", "c-fixed",
                                                    "--calibration", "{f}/extreme.csv", "--out", "{f}/q"], 1,
     r"tinyprop export: error: cannot export: a calibrated magnitude of 1e\+308 times headroom 2 overflows "
     r"float64.*\n"),
    ("export-fixed-point-headroom-far-too-large", ["export", "{f}/bare.npz", "--language", "c-fixed",
                                                   "--calibration", "{f}/battery.csv", "--headroom", "1e300",
                                                   "--out", "{f}/q2"], 1,
     r"tinyprop export: error: the integer code's largest error on the calibration rows is .*% of output 0's range; "
     r".*lower --headroom \(now 1e\+300\); the files were written for inspection but are not usable\n"),
]


@pytest.mark.parametrize("name, arguments, status, pattern", CASES, ids=[case[0] for case in CASES])
def test_command_line_case(name, arguments, status, pattern, folder, capsys):
    with np.errstate(over="raise", invalid="raise", divide="raise"):  # numpy must not even get to warn
        returncode, _, err = _run(folder, arguments, capsys)
    assert "Traceback" not in err and "Warning" not in err
    assert re.fullmatch(pattern, err), err
    assert returncode == status, err


def test_export_writes_nothing_when_one_language_refuses_the_name(folder, capsys):
    _run(folder, ["export", "{f}/model.npz", "--name", "math", "--out", "{f}/code_math"], capsys)
    assert not (folder / "code_math").exists() or not list((folder / "code_math").iterdir())


def test_a_failed_fit_writes_no_model(folder, capsys):
    _run(folder, CASES[1][1], capsys)
    assert not (folder / "lr.npz").exists()


def test_docs_list_exactly_these_command_line_cases():
    text = DOC.read_text(encoding="utf-8")
    section = text[text.index("## Command-line cases"):]
    documented = re.findall(r"^\| `([a-z0-9-]+)` \|", section, flags=re.M)
    assert sorted(documented) == sorted(case[0] for case in CASES)


# ------------------------------------------------------------------ out of memory: one line
def test_running_out_of_memory_is_one_line(folder, capsys, monkeypatch):
    import tinyprop.cli._common as common

    def exhausted(*args, **kwargs):
        raise MemoryError("Unable to allocate 1.2 GiB for an array")

    monkeypatch.setattr(common, "read_csv", exhausted)
    status, _, err = _run(folder, ["train", "{f}/battery.csv", "--targets", "soc"], capsys)
    assert status == 1
    assert err == ("tinyprop train: error: not enough memory (Unable to allocate 1.2 GiB for an array); use a smaller "
                   "network or a smaller data file\n")


def test_a_numerical_warning_inside_a_command_is_one_line_not_a_warning(folder, capsys, monkeypatch):
    import tinyprop.cli.inspect_cmd as inspect_cmd

    def overflowing(args):
        np.float64(1e308) * np.float64(10.0)  # numpy warns: overflow encountered in scalar multiply
        return 0

    monkeypatch.setattr(inspect_cmd, "run", overflowing)
    with np.errstate(over="warn"):
        status, _, err = _run(folder, ["inspect", "{f}/model.npz"], capsys)
    assert status == 1
    assert re.fullmatch(r"tinyprop inspect: error: numerical problem: overflow encountered in .*; the data or the "
                        r"model hold values outside the range they can be computed in\n", err), err


# ------------------------------------------------------------------ item 2: the report, atomic and matching
def test_a_failing_report_write_keeps_the_previous_report(folder, capsys, monkeypatch):
    out, report = folder / "pair.npz", folder / "pair.report.json"
    arguments = ["train", "{f}/battery.csv", "--targets", "soc", "--hidden", "3", MB, "--epochs", "2", "--quiet",
                 "--out", str(out)]
    assert _run(folder, arguments, capsys)[0] == 0
    before = report.read_bytes()
    real_replace = archive.os.replace

    def replace(source, target):
        if str(target).endswith(".report.json"):
            raise OSError(28, "No space left on device (simulated)")
        return real_replace(source, target)

    monkeypatch.setattr(archive.os, "replace", replace)
    assert _run(folder, arguments + ["--seed", "3"], capsys)[0] == 1
    assert report.read_bytes() == before
    assert not [p for p in folder.iterdir() if p.name.endswith(".tmp")]


def test_a_run_cannot_slip_between_another_runs_model_and_report(folder, monkeypatch, capsys):
    # run A saves its model and pauses; run B (same --out) runs meanwhile; the report must describe the model
    import tinyprop.cli.train_cmd as train_cmd

    real_save = train_cmd.save
    a_saved, b_done = threading.Event(), threading.Event()

    def pausing_save(net, path, **options):
        digest = real_save(net, path, **options)
        if threading.current_thread().name == "A":
            a_saved.set()
            b_done.wait(timeout=2)  # B finishes in this gap unless the folder lock holds it back
        return digest

    monkeypatch.setattr(train_cmd, "save", pausing_save)
    out = folder / "interleaved.npz"

    def run(seed):
        return main(["train", str(folder / "battery.csv"), "--targets", "soc", "--hidden", "3", MB, "--epochs", "2",
                     "--quiet", "--seed", str(seed), "--out", str(out)])

    first = threading.Thread(target=run, args=(1,), name="A")
    first.start()
    assert a_saved.wait(timeout=60)
    second = threading.Thread(target=lambda: (run(2), b_done.set()), name="B")
    second.start()
    first.join(timeout=120)
    second.join(timeout=120)
    document = json.loads((folder / "interleaved.report.json").read_text())
    assert document["network"]["fingerprint"] == tp.load_model_file(out).fingerprint


@pytest.mark.slow
def test_concurrent_runs_leave_a_report_that_matches_the_model(folder):
    out = folder / "shared.npz"
    for round_ in range(4):
        runs = [subprocess.Popen([sys.executable, "-m", "tinyprop", "train", str(folder / "battery.csv"), "--targets",
                                  "soc", "--hidden", "3", MB, "--epochs", "2", "--quiet", "--seed", str(seed),
                                  "--out", str(out)], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
                for seed in range(6)]
        assert [run.wait(timeout=300) for run in runs] == [0] * 6
        document = json.loads((folder / "shared.report.json").read_text())
        assert document["network"]["fingerprint"] == tp.load_model_file(out).fingerprint, f"round {round_}"


# ------------------------------------------------------------------ item 3: a pipe is hashed as parsed
def test_data_from_a_pipe_is_hashed_as_parsed(folder):
    data = (folder / "battery.csv").read_bytes()
    done = subprocess.run([sys.executable, "-m", "tinyprop", "train", "/dev/stdin", "--targets", "soc", "--hidden",
                           "3", MB, "--epochs", "2", "--quiet", "--out", str(folder / "piped.npz")],
                          input=data, capture_output=True, timeout=120)
    assert done.returncode == 0, done.stderr
    expected = hashlib.sha256(data).hexdigest()
    report = json.loads((folder / "piped.report.json").read_text())
    assert report["data"]["sha256"] == expected
    assert tp.load_model_file(folder / "piped.npz").metadata["training"]["data"]["sha256"] == expected


# ------------------------------------------------------------------ item 20: a closed pipe
@pytest.mark.skipif(sys.platform == "win32", reason="POSIX pipes")
def test_a_closed_output_pipe_ends_quietly(folder):
    # `true` exits without reading, long before the interpreter has started: the first write finds the pipe closed
    command = f"{sys.executable} -m tinyprop check {folder / 'model.npz'} | true; exit ${{PIPESTATUS[0]}}"
    done = subprocess.run(["bash", "-c", command], capture_output=True, text=True, timeout=120)
    assert done.stderr == ""
    assert done.returncode == 141


# ------------------------------------------------------------------ item 10: huge but finite columns train
def test_a_column_of_plus_minus_1e308_trains(tmp_path, capsys):
    rng = np.random.default_rng(0)  # synthetic
    x = rng.uniform(-1, 1, (60, 2))
    rows = ["a,b,y"] + [f"{float(a) * 1e308!r},{float(b)!r},{float(a + b)!r}" for a, b in x]
    (tmp_path / "huge.csv").write_text("\n".join(rows) + "\n")
    with np.errstate(over="raise", invalid="raise", divide="raise"):
        arguments = ["train", "{f}/huge.csv", "--targets", "y", MB, "--hidden", "4", "--epochs", "5", "--quiet",
                     "--out", "{f}/huge.npz"]
        status, _, err = _run(tmp_path, arguments, capsys)
    assert status == 0 and err == ""
    assert np.isfinite(tp.load(tmp_path / "huge.npz").predict(x * [1e308, 1])).all()
