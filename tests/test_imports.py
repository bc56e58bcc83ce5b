"""Imports: the core stays numpy-only at import time (DESIGN: scipy only inside solve and check), and the
modules form layers without cycles: a module imports only modules of earlier layers."""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path


def test_import_tinyprop_does_not_import_scipy_or_matplotlib():
    code = (
        "import sys, tinyprop\n"
        "heavy = sorted({m.split('.')[0] for m in sys.modules} & {'scipy', 'matplotlib'})\n"
        "print(','.join(heavy))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == ""


# ---------------------------------------------------------------- layering
# The order of the layers, written down once here and in DEVELOPERS.md ("Architecture"):
# a module may import only modules listed before it (imports under `if TYPE_CHECKING:`
# are for type checkers and not counted). A package comes after its modules.
LAYERS = (
    "tinyprop._version",
    "tinyprop._json",
    "tinyprop._validate",
    "tinyprop._views",
    "tinyprop._words",
    "tinyprop._progress",
    "tinyprop._settings_equality",
    "tinyprop.envelope",
    "tinyprop.activations",
    "tinyprop.registry",
    "tinyprop.layers",
    "tinyprop.init",
    "tinyprop.workspace",
    "tinyprop.network",
    "tinyprop.mlp",
    "tinyprop.losses",
    "tinyprop.classify",
    "tinyprop.classmetrics",
    "tinyprop.schedules",
    "tinyprop.optim",
    "tinyprop.archive",
    "tinyprop.modelfile",
    "tinyprop.checkpoint",
    "tinyprop.train",
    "tinyprop.stacked",
    "tinyprop.normal_equations",
    "tinyprop.evidence",
    "tinyprop.blocked_lm",
    "tinyprop.solve",
    "tinyprop.check",
    "tinyprop.sensitivity",
    "tinyprop.intervals",
    "tinyprop.posterior",
    "tinyprop.uncertainty",
    "tinyprop.bounds._arith",
    "tinyprop.bounds._rules",
    "tinyprop.bounds._program",
    "tinyprop.bounds._relax",
    "tinyprop.bounds._slopes",
    "tinyprop.bounds._search",
    "tinyprop.bounds._box",
    "tinyprop.bounds.output",
    "tinyprop.bounds.gradient",
    "tinyprop.bounds.certificate",
    "tinyprop.bounds",
    "tinyprop.export._identifiers",
    "tinyprop.export._metadata",
    "tinyprop.export._source",
    "tinyprop.export._plan",
    "tinyprop.export._activations",
    "tinyprop.export._header",
    "tinyprop.export._envelope",
    "tinyprop.export.classes",
    "tinyprop.export.bound",
    "tinyprop.export._envelope_error",
    "tinyprop.export.envelope_bound",
    "tinyprop.export.c99",
    "tinyprop.export.python",
    "tinyprop.export._fixed_tables",
    "tinyprop.export._fixed_program",
    "tinyprop.export._fixed_c",
    "tinyprop.export._fixed_envelope",
    "tinyprop.export.fixed_point",
    "tinyprop.export.ensemble",
    "tinyprop.export",
    "tinyprop.ensemble",
    "tinyprop.sweep",
    "tinyprop.recipes",
    "tinyprop.csvdata",
    "tinyprop.csvlabels",
    "tinyprop.plots",
    "tinyprop.datasets.battery",
    "tinyprop.datasets.classification",
    "tinyprop.datasets.machine",
    "tinyprop.datasets.nist",
    "tinyprop.datasets.uci",
    "tinyprop.datasets",
    "tinyprop.benchmarks",
    "tinyprop.cli._args",
    "tinyprop.cli._common",
    "tinyprop.cli._imports",
    "tinyprop.cli._fit_report",
    "tinyprop.cli._classes",
    "tinyprop.cli.bench_cmd",
    "tinyprop.cli.certify_cmd",
    "tinyprop.cli.check_cmd",
    "tinyprop.cli.demo_cmd",
    "tinyprop.cli.docs_cmd",
    "tinyprop.cli.envelope_cmd",
    "tinyprop.cli.export_cmd",
    "tinyprop.cli.inspect_cmd",
    "tinyprop.cli.predict_cmd",
    "tinyprop.cli.train_cmd",
    "tinyprop.cli",
    "tinyprop",
    "tinyprop.__main__",
)
_SOURCE = Path(__file__).resolve().parents[1] / "src"


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(_SOURCE).with_suffix("").parts)
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def _is_module(name: str) -> bool:
    base = _SOURCE / name.replace(".", "/")
    return base.with_suffix(".py").is_file() or (base / "__init__.py").is_file() or name == "tinyprop.benchmarks"


def _imported_modules(path: Path) -> set[str]:
    """The tinyprop modules ``path`` imports, at the top or inside functions, outside ``if TYPE_CHECKING:``."""
    name = _module_name(path)
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    tree = ast.parse(path.read_text(encoding="utf-8"))
    type_only = {
        id(sub)
        for node in ast.walk(tree)
        if isinstance(node, ast.If) and "TYPE_CHECKING" in ast.unparse(node.test)
        for sub in ast.walk(node)
    }
    found: set[str] = set()
    for node in ast.walk(tree):
        if id(node) in type_only:
            continue
        if isinstance(node, ast.Import):
            found.update(alias.name for alias in node.names if alias.name.split(".")[0] == "tinyprop")
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                parts = package.split(".")
                module = ".".join(parts[: len(parts) - node.level + 1] + ([node.module] if node.module else []))
            else:
                module = node.module or ""
            if module.split(".")[0] != "tinyprop":
                continue
            for alias in node.names:  # "from . import bench_cmd" imports a module, "from .x import f" module x
                found.add(f"{module}.{alias.name}" if _is_module(f"{module}.{alias.name}") else module)
    found.discard(name)
    return found


def _import_graph() -> dict[str, set[str]]:
    return {_module_name(path): _imported_modules(path) for path in sorted((_SOURCE / "tinyprop").rglob("*.py"))}


def test_every_module_has_a_place_in_the_layering():
    modules = set(_import_graph())
    assert sorted(modules - set(LAYERS)) == [], "add new modules to LAYERS (and DEVELOPERS.md)"
    assert sorted(set(LAYERS) - modules - {"tinyprop.benchmarks"}) == [], "LAYERS names modules that do not exist"
    assert len(set(LAYERS)) == len(LAYERS)


def test_no_module_imports_a_later_layer():
    position = {name: index for index, name in enumerate(LAYERS)}
    backward = [
        f"{module} imports {imported}"
        for module, imports in _import_graph().items()
        for imported in sorted(imports)
        if position[imported] >= position[module]
    ]
    assert backward == []


def test_the_import_graph_has_no_cycle():
    graph = _import_graph()
    state: dict[str, int] = {}  # 1: on the current path, 2: done

    def visit(module: str, path: list[str]) -> None:
        state[module] = 1
        for imported in sorted(graph.get(module, ())):
            if state.get(imported) == 1:
                raise AssertionError("import cycle: " + " -> ".join(path[path.index(imported):] + [imported]))
            if imported not in state:
                visit(imported, path + [imported])
        state[module] = 2

    for module in sorted(graph):
        if module not in state:
            visit(module, [module])


def test_the_graph_reader_sees_lazy_and_relative_imports():
    graph = _import_graph()
    assert "tinyprop.checkpoint" in graph["tinyprop.train"]  # from .checkpoint import ...
    assert "tinyprop.benchmarks" in graph["tinyprop.cli.bench_cmd"]  # imported inside a function
    assert "tinyprop.cli.train_cmd" in graph["tinyprop.cli"]  # from . import train_cmd


def test_each_module_imports_alone_in_a_fresh_interpreter():
    """One interpreter per module, started in the order of the layers, two at a time (CI has two cores)."""
    modules = [module for module in LAYERS if module != "tinyprop.benchmarks"]
    failures = []
    for start in range(0, len(modules), 2):
        running = [
            (module, subprocess.Popen([sys.executable, "-c", f"import {module}"], stdout=subprocess.PIPE,
                                      stderr=subprocess.PIPE, text=True))
            for module in modules[start:start + 2]
        ]
        for module, process in running:
            _, stderr = process.communicate()
            if process.returncode != 0:
                failures.append(f"import {module} alone failed:\n{stderr}")
    assert failures == []
