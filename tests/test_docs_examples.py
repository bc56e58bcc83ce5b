"""Every ```python block in README.md, DEVELOPERS.md and docs/*.md runs, so the docs cannot rot.

Blocks of one file run in order in one namespace (later blocks may use earlier
names), in a temporary working directory.
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
DOCS = [ROOT / "README.md", ROOT / "DEVELOPERS.md", *sorted((ROOT / "docs").glob("*.md"))]
BLOCK = re.compile(r"^```python\n(.*?)^```", re.S | re.M)


@pytest.mark.parametrize("path", DOCS, ids=[p.name for p in DOCS])
def test_python_blocks_run(path, tmp_path, monkeypatch):
    blocks = BLOCK.findall(path.read_text(encoding="utf-8"))
    monkeypatch.chdir(tmp_path)
    namespace: dict = {"__name__": "__docs__"}
    for number, code in enumerate(blocks, 1):
        try:
            exec(compile(code, f"{path.name}[block {number}]", "exec"), namespace)
        except Exception as exc:  # pragma: no cover - the message is the point
            pytest.fail(f"{path.name}, python block {number} failed: {type(exc).__name__}: {exc}")
