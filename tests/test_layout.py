"""The package layout: stages import only the stages below them, and no module imports in a circle.

The data flow (DEVELOPERS.md): spins -> exact | circuits -> emulation -> costing / learning ->
survey -> report -> cli. A stage may import its own modules and any stage of lower rank, never a higher
one. The check parses every module's imports with Python's own `ast` (nested, function-level
imports included for the direction rule; module-level ones for circles). common practice.
"""

import ast
from pathlib import Path

import pytest

# rank of each stage: an import may go to the same rank or lower, never higher
STAGE_RANK = {
    "base": 0,        # errors, memory estimates, BLAS threads, lazy names
    "spins": 1,       # isotopes, dipolar constant, clusters, cluster files, the model
    "exact": 2,       # sectors, exact engine, likelihood, powder, signals, provider protocol
    "circuits": 3,    # product formulas, bounds, Trotterised reference, circuit families
    "emulation": 4,   # qiskit-aer runs
    "costing": 5,     # budgets
    "learning": 6,    # fits, Fisher reports, measured data
    "survey": 7,      # structure cutting, diagnostics, scans
    "report": 8,      # self-contained HTML reports of command runs
    "cli": 9,         # the command line
    "": 10,           # qhl/__init__.py, qhl/__main__.py
}

PACKAGE = Path(__file__).resolve().parents[1] / "qhl"


def _module_name(path: Path, root: Path) -> tuple[str, bool]:
    parts = list(path.relative_to(root.parent).with_suffix("").parts)
    is_pkg = parts[-1] == "__init__"
    if is_pkg:
        parts = parts[:-1]
    return ".".join(parts), is_pkg


def _stage(module: str) -> str:
    parts = module.split(".")
    return parts[1] if len(parts) > 1 and parts[1] in STAGE_RANK else ""


def _imports(path: Path, root: Path):
    """(target module, line, at module level) for every import of the package in `path`."""
    name, is_pkg = _module_name(path, root)
    tree = ast.parse(path.read_text(), filename=str(path))
    top = {id(n) for n in tree.body}
    known = {_module_name(p, root)[0] for p in root.rglob("*.py")}
    out = []
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom):
            if node.level:
                base = name.split(".") if is_pkg else name.split(".")[:-1]
                base = base[: len(base) - (node.level - 1)]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module or ""
            targets = [target]
            for alias in node.names:                 # `from . import submodule`
                if f"{target}.{alias.name}" in known:
                    targets.append(f"{target}.{alias.name}")
        elif isinstance(node, ast.Import):
            targets = [a.name for a in node.names]
        else:
            continue
        for t in targets:
            if t == root.name or t.startswith(root.name + "."):
                out.append((t, node.lineno, id(node) in top))
    return name, out


def layout_violations(root: Path) -> list:
    """Upward imports and module-level import circles in the package at `root`."""
    problems = []
    graph = {}
    modules = {}
    for path in sorted(root.rglob("*.py")):
        name, imports = _imports(path, root)
        modules[name] = path
        graph[name] = set()
        for target, line, top_level in imports:
            src, dst = _stage(name), _stage(target)
            if STAGE_RANK[dst] > STAGE_RANK[src]:
                problems.append(f"{path.relative_to(root.parent)}:{line}: stage '{src or 'qhl'}' imports "
                                f"'{target}' of the higher stage '{dst}'")
            if top_level:
                graph[name].add(target)
    # module-level circles (depth-first search with colours)
    colour, stack = {}, []

    def visit(m):
        colour[m] = 1
        stack.append(m)
        for t in sorted(graph.get(m, ())):
            if t not in graph:                          # a name, not a module of the package
                continue
            if colour.get(t) == 1:
                cycle = stack[stack.index(t):] + [t]
                problems.append("import circle: " + " -> ".join(cycle))
            elif t not in colour:
                visit(t)
        stack.pop()
        colour[m] = 2

    for m in sorted(graph):
        if m not in colour:
            visit(m)
    return problems


def test_every_stage_is_known():
    stages = {p.name for p in PACKAGE.iterdir() if p.is_dir() and (p / "__init__.py").exists()}
    assert stages == set(STAGE_RANK) - {""}


def test_no_upward_imports_and_no_circles():
    assert layout_violations(PACKAGE) == []


def test_every_stage_says_what_it_may_import():
    for stage in set(STAGE_RANK) - {""}:
        doc = ast.get_docstring(ast.parse((PACKAGE / stage / "__init__.py").read_text())) or ""
        assert "Imports:" in doc, stage


@pytest.mark.parametrize("source, expected", [
    # the engine (exact) reaching up into the emulator
    ({"exact/engine.py": "from ..emulation.runner import FamilyRunner\n",
      "emulation/runner.py": "X = 1\n"}, "stage 'exact' imports 'qhl.emulation.runner'"),
    # a lazy, function-level upward import counts too
    ({"spins/model.py": "def f():\n    from ..costing import budget\n", "costing/budget.py": "Y = 1\n"},
     "stage 'spins' imports 'qhl.costing"),
    # two modules of one stage importing each other
    ({"learning/a.py": "from .b import x\n", "learning/b.py": "from .a import y\nx = 1\n"}, "import circle"),
])
def test_the_check_catches_what_it_should(tmp_path, source, expected):
    root = tmp_path / "qhl"
    for stage in set(STAGE_RANK) - {""}:
        (root / stage).mkdir(parents=True)
        (root / stage / "__init__.py").write_text("")
    (root / "__init__.py").write_text("")
    for rel, text in source.items():
        (root / rel).write_text(text)
    problems = layout_violations(root)
    assert any(expected in p for p in problems), problems


def test_developers_module_map_names_every_module():
    # DEVELOPERS.md's module map must match the tree: every module named (dotted, or `cmd_x` for commands)
    text = (PACKAGE.parent / "DEVELOPERS.md").read_text()
    missing = []
    for path in sorted(PACKAGE.rglob("*.py")):
        if path.name in ("__init__.py", "__main__.py"):
            continue
        dotted = _module_name(path, PACKAGE)[0]
        if dotted not in text and f"`{path.stem}`" not in text:
            missing.append(dotted)
    assert missing == []
