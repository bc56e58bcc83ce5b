"""The lint rules of pyproject.toml ([tool.ruff]: pycodestyle, pyflakes, import order, bugbear; lines up to
120 characters) hold for the source, the tests and the benchmark. ruff comes with the ``test`` extra."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def test_ruff_finds_nothing():
    pytest.importorskip("ruff", reason="ruff is part of the test extra: pip install -e '.[test]'")
    result = subprocess.run([sys.executable, "-m", "ruff", "check", "--no-cache", "src", "tests", "benchmarks"],
                            cwd=ROOT, capture_output=True, text=True)
    assert result.returncode == 0, result.stdout + result.stderr
