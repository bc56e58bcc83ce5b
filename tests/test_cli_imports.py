"""`--import MODULE` of `tinyprop check`, `inspect` and `export`: models with a custom activation.

The activation is a scaled softsign ``f(z) = s z / (1 + |z|)`` with
``f'(z) = s / (1 + |z|)^2`` (s = 1.5), written into a module file of its own
and registered under its own name; every command runs as a user would run it
(``python -m tinyprop``, a subprocess that has never seen the class). The
gradient check's verdict is the external check here: ``check`` compares the
backpropagated gradient with scipy's numerical differentiation, and a variant
with a deliberately wrong derivative must fail it. Data are synthetic.
"""

from __future__ import annotations

import importlib.util
import os
import shutil
import subprocess
import sys
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from types import ModuleType

import numpy as np
import pytest

import tinyprop as tp
from tinyprop.cli import main

MODULE_NAME = "tinyprop_cli_test_softsign"  # the file stem; no other module has this name
ACTIVATION = "cli_test.ScaledSoftsign"
WRONG_ACTIVATION = "cli_test.WrongScaledSoftsign"

MODULE_SOURCE = '''"""Synthetic test activations: the scaled softsign f(z) = s z / (1 + |z|)."""
import numpy as np
import tinyprop as tp
from tinyprop.registry import register_activation


class ScaledSoftsign(tp.Activation):
    """f(z) = s z / (1 + |z|),  f'(z) = s / (1 + |z|)^2."""

    kinks = (0.0,)  # f' has a corner at 0

    def __init__(self, scale=1.0):
        self.scale = float(scale)

    def settings(self):
        return {"scale": self.scale}

    def value(self, z):
        return self.scale * z / (1.0 + np.abs(z))

    def derivative(self, z, a):
        return self.scale / (1.0 + np.abs(z)) ** 2

    def c_expression(self, ctype):
        suffix, fabs = ("f", "fabsf") if ctype == "float" else ("", "fabs")
        return f"{self.scale!r}{suffix} * z / (1.0{suffix} + {fabs}(z))"

    def python_expression(self):
        return f"{self.scale!r} * z / (1.0 + abs(z))"


class WrongScaledSoftsign(ScaledSoftsign):
    """The same f, with the square of f' forgotten: a deliberately wrong derivative."""

    def derivative(self, z, a):
        return self.scale / (1.0 + np.abs(z))


register_activation(ScaledSoftsign, name="cli_test.ScaledSoftsign")
register_activation(WrongScaledSoftsign, name="cli_test.WrongScaledSoftsign")
'''


def run_cli(*args: str, cwd: Path, env: dict[str, str] | None = None) -> subprocess.CompletedProcess:
    """``python -m tinyprop <args>`` with pipes."""
    return subprocess.run([sys.executable, "-m", "tinyprop", *args], cwd=cwd, env=env,
                          capture_output=True, text=True, timeout=120)


def assert_one_line_error(result: subprocess.CompletedProcess, command: str, status: int, *fragments: str) -> None:
    message = result.stderr
    assert "Traceback" not in message, message
    assert message.count("\n") == 1 and message.startswith(f"tinyprop {command}: error: "), message
    for fragment in fragments:
        assert fragment in message, f"{fragment!r} not in {message!r}"
    assert result.returncode == status, message


@pytest.fixture(scope="module")
def files(tmp_path_factory) -> dict[str, Path]:
    """The activation module, two models using it (right and wrong derivative) and an empty working folder."""
    folder = tmp_path_factory.mktemp("activations")
    module_path = folder / f"{MODULE_NAME}.py"
    module_path.write_text(MODULE_SOURCE, encoding="utf-8")
    module = load_in_this_process(module_path)
    models = tmp_path_factory.mktemp("models")
    for name, cls in (("softsign.npz", module.ScaledSoftsign), ("wrong.npz", module.WrongScaledSoftsign)):
        net = tp.Network([tp.Affine(2, 5), cls(1.5), tp.Affine(5, 1)], seed=4)
        tp.save(net, models / name)
    return {"module": module_path, "model": models / "softsign.npz", "wrong": models / "wrong.npz",
            "cwd": tmp_path_factory.mktemp("work")}


def load_in_this_process(path: Path) -> ModuleType:
    """Import the activation module once in the test process (to build and load the models here)."""
    if MODULE_NAME in sys.modules:
        return sys.modules[MODULE_NAME]
    spec = importlib.util.spec_from_file_location(MODULE_NAME, path)
    module = importlib.util.module_from_spec(spec)
    sys.modules[MODULE_NAME] = module
    spec.loader.exec_module(module)
    return module


def test_check_with_import_of_a_file_passes(files):
    result = run_cli("check", "--import", str(files["module"]), str(files["model"]), cwd=files["cwd"])
    assert result.returncode == 0, result.stderr
    assert "PASSED" in result.stdout
    assert result.stdout.count("  ok   layer") == 4  # one line per parameter array


def test_check_with_import_catches_a_wrong_derivative(files):
    result = run_cli("check", "--import", str(files["module"]), str(files["wrong"]), cwd=files["cwd"])
    assert result.returncode == 1
    assert "FAILED" in result.stdout and "FAIL layer 0 weight" in result.stdout
    assert result.stderr.startswith("tinyprop check: gradient check FAILED for layer 0 weight")


def test_import_by_module_name_works_when_its_folder_is_on_pythonpath(files):
    folder = str(files["module"].parent)
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(p for p in (folder, os.environ.get("PYTHONPATH")) if p)}
    result = run_cli("check", "--import", MODULE_NAME, str(files["model"]), cwd=files["cwd"], env=env)
    assert result.returncode == 0, result.stderr
    assert "PASSED" in result.stdout

    without = run_cli("check", "--import", MODULE_NAME, str(files["model"]), cwd=files["cwd"])
    assert_one_line_error(without, "check", 2, f"--import {MODULE_NAME}", f"no module named '{MODULE_NAME}'",
                          "PYTHONPATH")


def test_inspect_shows_the_custom_activation(files):
    # the same file twice is imported once (a second registration would be refused)
    result = run_cli("inspect", "--import", str(files["module"]), "--import", str(files["module"]),
                     str(files["model"]), cwd=files["cwd"])
    assert result.returncode == 0, result.stderr
    assert f"activation      {ACTIVATION}(scale=1.5)" in result.stdout
    assert tp.fingerprint(tp.load(files["model"])) in result.stdout


@pytest.fixture(scope="module")
def exported(files) -> Path:
    out = files["cwd"] / "code"
    result = run_cli("export", "--import", str(files["module"]), str(files["model"]), "--out", str(out),
                     "--name", "soft", "--c-type", "double", cwd=files["cwd"])
    assert result.returncode == 0, result.stderr
    assert sorted(p.name for p in out.iterdir()) == ["soft.c", "soft.h", "soft.py"]
    return out


INPUTS = np.random.default_rng(7).uniform(-3.0, 3.0, size=(6, 2))  # synthetic inputs


def test_export_with_import_writes_python_that_agrees_with_the_model(files, exported):
    namespace: dict = {}
    exec(compile((exported / "soft.py").read_text(encoding="utf-8"), "soft.py", "exec"), namespace)
    code = np.array([namespace["predict"](list(x)) for x in INPUTS])
    np.testing.assert_allclose(code, tp.load(files["model"]).predict(INPUTS), rtol=1e-13, atol=1e-13)


CC = shutil.which("gcc") or shutil.which("cc")


@pytest.mark.skipif(CC is None, reason="no C compiler: neither gcc nor cc is on PATH")
def test_export_with_import_writes_c_that_compiles_and_agrees_with_the_model(files, exported):
    rows = ", ".join("{" + ", ".join(f"{v:.17g}" for v in x) + "}" for x in INPUTS)
    (exported / "main.c").write_text(f"""#include <stdio.h>
#include "soft.h"

int main(void)
{{
    const double x[{len(INPUTS)}][SOFT_N_INPUTS] = {{{rows}}};
    double y[SOFT_N_OUTPUTS];
    int i;
    for (i = 0; i < {len(INPUTS)}; ++i) {{
        soft_predict(x[i], y);
        printf("%.17g\\n", y[0]);
    }}
    return 0;
}}
""", encoding="utf-8")
    flags = ["-std=c99", "-Wall", "-Wextra", "-Werror", "-pedantic", "-O2", "-ffp-contract=off"]
    subprocess.run([CC, *flags, "main.c", "soft.c", "-o", "soft", "-lm"], cwd=exported, check=True, timeout=120)
    printed = subprocess.run([str(exported / "soft")], capture_output=True, text=True, check=True, timeout=60).stdout
    code = np.array([float(line) for line in printed.split()])
    np.testing.assert_allclose(code, tp.load(files["model"]).predict(INPUTS)[:, 0], rtol=1e-13, atol=1e-13)


@pytest.mark.parametrize("command", ["check", "inspect", "export"])
def test_without_import_the_model_is_refused_with_a_pointer_to_the_option(files, command):
    result = run_cli(command, str(files["model"]), cwd=files["cwd"])
    assert_one_line_error(result, command, 1, f"'{ACTIVATION}'", "not registered", "--import")


# (id, file name -> source written into the working folder, --import value, status, message fragments)
MISTAKES = [
    ("missing-module", {}, "no_such_module_for_tinyprop_tests", 2,
     ["--import no_such_module_for_tinyprop_tests", "no module named 'no_such_module_for_tinyprop_tests'"]),
    ("missing-file", {}, "missing_activations.py", 2, ["--import missing_activations.py", "does not exist"]),
    ("not-a-module-name", {}, "my-activations", 2, ["--import 'my-activations'", "expected a module name"]),
    ("file-named-like-a-loaded-module", {"lib/json.py": "X = 1\n"}, "lib/json.py", 2,
     ["--import lib/json.py", "'json'", "rename the file"]),
    ("module-raises", {"raiser.py": "raise RuntimeError('deliberate failure\\nsecond line')\n"}, "raiser.py", 1,
     ["importing raiser.py failed: RuntimeError: deliberate failure second line"]),
    ("syntax-error", {"broken.py": "def f(:\n    pass\n"}, "broken.py", 1,
     ["importing broken.py failed: SyntaxError:", "broken.py, line 1"]),
    ("module-imports-something-missing", {"needy.py": "import no_such_dependency_for_tinyprop_tests\n"},
     "needy.py", 1, ["importing needy.py failed: ModuleNotFoundError:", "no_such_dependency_for_tinyprop_tests"]),
]


@pytest.fixture(scope="module")
def mistake_results(files, tmp_path_factory) -> dict[str, subprocess.CompletedProcess]:
    folder = tmp_path_factory.mktemp("mistakes")
    for _, sources, _, _, _ in MISTAKES:
        for name, text in sources.items():
            (folder / name).parent.mkdir(parents=True, exist_ok=True)
            (folder / name).write_text(text, encoding="utf-8")

    def run(value: str) -> subprocess.CompletedProcess:
        return run_cli("check", "--import", value, str(files["model"]), cwd=folder)

    with ThreadPoolExecutor(max_workers=4) as pool:
        return dict(zip([case[0] for case in MISTAKES], pool.map(run, [case[2] for case in MISTAKES])))


@pytest.mark.parametrize("name, sources, value, status, fragments", MISTAKES, ids=[case[0] for case in MISTAKES])
def test_import_mistake_gives_one_clear_line(name, sources, value, status, fragments, mistake_results):
    assert_one_line_error(mistake_results[name], "check", status, *fragments)


@pytest.mark.parametrize("command", ["check", "inspect", "export"])
def test_help_offers_the_option_and_says_it_runs_code(command, capsys):
    with pytest.raises(SystemExit):
        main([command, "--help"])
    text = " ".join(capsys.readouterr().out.split())
    assert "--import MODULE" in text and "RUNS the module's code" in text
