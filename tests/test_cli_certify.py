"""`tinyprop certify`: the library's certificate, written out (subprocess runs, synthetic model)."""

from __future__ import annotations

import json
import re
import subprocess
import sys
from pathlib import Path

import pytest

import tinyprop as tp

BOX = (["20", "0.5"], ["90", "3"])


def run_cli(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "tinyprop", *args], capture_output=True, text=True, timeout=300)


@pytest.fixture(scope="module")
def valve_model(tmp_path_factory) -> tuple[Path, tp.Network]:
    """Synthetic scenario: a valve command from a temperature and a flow; names stored in the metadata."""
    net = tp.Network([tp.Standardize([60.0, 2.0], [15.0, 0.5]), tp.Affine(2, 5), tp.Tanh(), tp.Affine(5, 1)], seed=4)
    path = tmp_path_factory.mktemp("certify") / "valve.npz"
    metadata = {"inputs": [{"name": "temperature"}, {"name": "flow"}], "outputs": [{"name": "valve"}]}
    tp.save(net, path, metadata=metadata)
    return path, net


def test_certify_prints_and_writes_what_the_library_proves(valve_model, tmp_path):
    path, net = valve_model
    out = tmp_path / "cert.json"
    result = run_cli("certify", str(path), "--low", ",".join(BOX[0]), "--high", ",".join(BOX[1]),
                     "--json", str(out), "--max-seconds", "20")
    assert result.returncode == 0, result.stderr
    record = json.loads(out.read_text(encoding="utf-8"))
    library = tp.certificate(net, [20.0, 0.5], [90.0, 3.0], max_seconds=20.0,
                             input_names=["temperature", "flow"], output_names=["valve"])
    (valve,) = record["outputs"]
    assert valve["stopped_by"] == ["tolerance", "tolerance"]  # so neither run depended on the clock
    assert (valve["lower"], valve["upper"]) == (library.outputs.lower[0], library.outputs.upper[0])
    assert valve["lowest_input"] == library.outputs.lowest_input[0].tolist()
    for cli_slope, lib_slope in zip(valve["slopes"], library.as_dict()["outputs"][0]["slopes"]):
        if cli_slope["stopped_by"] == lib_slope["stopped_by"] == ["tolerance", "tolerance"]:
            assert (cli_slope["lower"], cli_slope["upper"]) == (lib_slope["lower"], lib_slope["upper"])
    assert record["network_fingerprint"] == tp.fingerprint(net)
    assert "valve:" in result.stdout and "d valve / d flow" in result.stdout
    assert "not certified for safety functions" in result.stdout


def test_certify_takes_negative_box_ends_after_an_equals_sign_and_a_split_budget(valve_model, tmp_path):
    out = tmp_path / "cert.json"
    result = run_cli("certify", str(valve_model[0]), "--low=-1,-2", "--high", "1,2", "--max-splits", "3",
                     "--slope-tolerance", "1e-9", "--max-seconds", "4", "--json", str(out))  # (unreachable tolerance)
    assert result.returncode == 0, result.stderr
    record = json.loads(out.read_text(encoding="utf-8"))
    assert record["splits"]["outputs"] <= 2 * 3 and record["splits"]["slopes"] <= 2 * 2 * 3  # per bound
    assert "box: temperature in [-1.0, 1.0], flow in [-2.0, 2.0]" in result.stdout


@pytest.mark.parametrize(
    "low, high, message",
    [
        ("20", "90,3", r"--low must give one number per model input \(2\), got 1"),
        ("20,x", "90,3", "argument --low: expected a number, got 'x'"),
        ("100,1", "90,3", r"low must not exceed high, got low\[0\] = 100.0 > high\[0\] = 90.0"),
        ("20,nan", "90,3", "expected a finite number"),
    ],
)
def test_certify_mistakes_exit_2_with_one_line(valve_model, low, high, message):
    result = run_cli("certify", str(valve_model[0]), "--low", low, "--high", high)
    assert result.returncode == 2
    assert len(result.stderr.strip().splitlines()) == 1
    assert re.search(message, result.stderr), result.stderr
