"""The package's import graph: data flows one way, inputs -> fit -> analyses -> present -> jobs -> cli.

Every import of a disagg module is read from the source (module level and inside functions);
imports under ``if TYPE_CHECKING:`` are annotations only and are not counted.
"""

from __future__ import annotations

import ast
import importlib
import importlib.util
import os
import subprocess
import sys
from pathlib import Path

import disagg

PACKAGE = Path(disagg.__file__).parent
# Rank of each folder along the data's path; leaf modules import nothing of disagg's own.
RANK = {"errors": 0, "progress": 0, "demo": 0, "inputs": 1, "fit": 2, "analyses": 3,
        "present": 4, "jobs": 5, "cli": 6}


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(PACKAGE.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _type_checking_lines(tree: ast.Module) -> set[int]:
    lines = set()
    for node in ast.walk(tree):
        if (isinstance(node, ast.If) and isinstance(node.test, ast.Name)
                and node.test.id == "TYPE_CHECKING"):
            for sub in ast.walk(node):
                if hasattr(sub, "lineno"):
                    lines.add(sub.lineno)
    return lines


def import_graph() -> dict[str, set[str]]:
    """Module -> the disagg modules it imports at run time."""
    modules = {_module_name(p): p for p in PACKAGE.rglob("*.py")}
    graph: dict[str, set[str]] = {m: set() for m in modules}
    for mod, path in modules.items():
        tree = ast.parse(path.read_text(encoding="utf-8"))
        skip = _type_checking_lines(tree)
        for node in ast.walk(tree):
            if getattr(node, "lineno", None) in skip:
                continue
            if isinstance(node, ast.ImportFrom):
                base = node.module or ""
                if node.level:  # a relative import, resolved against this module's package
                    package = mod if path.name == "__init__.py" else mod.rpartition(".")[0]
                    base = importlib.util.resolve_name("." * node.level + base, package)
                targets = [base] + [f"{base}.{a.name}" for a in node.names]
            elif isinstance(node, ast.Import):
                targets = [a.name for a in node.names]
            else:
                continue
            for t in targets:
                if t in modules and t != mod and t != "disagg":
                    graph[mod].add(t)
    return graph


def _rank(module: str) -> int | None:
    parts = module.split(".")
    return RANK.get(parts[1]) if len(parts) > 1 else None


def test_every_module_has_a_rank():
    unranked = [m for m in import_graph() if m != "disagg" and _rank(m) is None]
    assert unranked == []


def test_nothing_imports_upward():
    upward = sorted(f"{m} -> {t}" for m, targets in import_graph().items() for t in targets
                    if _rank(m) is not None and _rank(t) is not None and _rank(t) > _rank(m))
    assert upward == []


def test_no_import_cycles():
    graph = import_graph()
    # Depth-first search for a back edge; report the first cycle found.
    state: dict[str, int] = {}
    stack: list[str] = []

    def visit(m: str) -> list[str] | None:
        state[m] = 1
        stack.append(m)
        for t in sorted(graph[m]):
            if state.get(t) == 1:
                return stack[stack.index(t):] + [t]
            if t not in state and (found := visit(t)):
                return found
        stack.pop()
        state[m] = 2
        return None

    for m in sorted(graph):
        if m not in state:
            cycle = visit(m)
            assert cycle is None, " -> ".join(cycle)


def test_the_graph_reader_sees_a_known_edge():
    # Guards the checks above against a reader that finds no imports at all.
    graph = import_graph()
    assert "disagg.inputs.config" in graph["disagg.fit.align"]
    assert "disagg.jobs.site" in graph["disagg.jobs.batch"]


def test_a_relative_upward_import_is_seen(tmp_path, monkeypatch):
    # The reader resolves relative imports too: a copy of the package with one added
    # relative upward import must show that edge.
    import shutil

    copy = tmp_path / "disagg"
    shutil.copytree(PACKAGE, copy)
    align = copy / "fit" / "align.py"
    align.write_text(align.read_text() + "\n\ndef _f():\n    from ..present import terminal\n")
    monkeypatch.setattr(sys.modules[__name__], "PACKAGE", copy)
    assert "disagg.present.terminal" in import_graph()["disagg.fit.align"]


def test_every_module_imports():
    for m in import_graph():
        importlib.import_module(m)


def test_importing_disagg_leaves_blas_threads_alone():
    env = {k: v for k, v in os.environ.items()
           if k not in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")}
    code = ("import os, disagg.analyses.pipeline, disagg.present.outputs; "
            "print(os.environ.get('OPENBLAS_NUM_THREADS'))")
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True,
                         check=True).stdout.strip()
    assert out == "None"
    code = "import os, disagg.cli; print(os.environ.get('OPENBLAS_NUM_THREADS'))"
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True,
                         check=True).stdout.strip()
    assert out == "1"
