"""The package's layers: every internal import points down, and there is no cycle.

Walks the source with ``ast`` (imports inside functions included) and checks each import against
the layer order written at the top of DEVELOPERS.md. Only ``crustflow/__init__.py`` (lazy re-exports)
may import upward.
"""

from __future__ import annotations

import ast
from pathlib import Path

PACKAGE = Path(__file__).resolve().parents[1] / "crustflow"

#: Layer of each top-level module or subpackage; an import may only point to a lower or equal
#: number, and equal numbers only within one subpackage (siblings of one layer stay apart).
LAYERS = {
    "_version": 0,
    "errors": 0,
    "constants": 1,
    "units": 1,
    "variables": 2,
    "geometry": 3,
    "physics": 4,
    "scenario": 5,
    "io": 6,
    "engine": 7,
    "figures": 8,
    "analyses": 9,
    "samples": 9,
    "commands": 10,
    "cli": 11,
    "__main__": 12,
}


def _modules():
    for path in sorted(PACKAGE.rglob("*.py")):
        parts = path.relative_to(PACKAGE.parent).with_suffix("").parts
        if parts[-1] == "__init__":
            parts = parts[:-1]
        yield ".".join(parts), path


def _imports(name: str, path: Path):
    tree = ast.parse(path.read_text())
    package = name if path.name == "__init__.py" else name.rsplit(".", 1)[0]
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")[: len(package.split(".")) - node.level + 1]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module or ""
            targets = [target] + [f"{target}.{a.name}" for a in node.names]
        elif isinstance(node, ast.Import):
            targets = [a.name for a in node.names]
        else:
            continue
        for t in targets:
            if t.startswith("crustflow."):
                yield node.lineno, t


def _layer(module: str) -> tuple[int, str]:
    top = module.split(".")[1]
    return LAYERS[top], top


def _edges():
    known = {name for name, _ in _modules()}
    for name, path in _modules():
        if name == "crustflow":
            continue
        for line, target in _imports(name, path):
            while target not in known and "." in target:
                target = target.rsplit(".", 1)[0]
            if target != name and target != "crustflow":
                yield name, path, line, target


def test_every_module_has_a_layer():
    tops = {name.split(".")[1] for name, _ in _modules() if name != "crustflow"}
    assert tops <= set(LAYERS), sorted(tops - set(LAYERS))


def test_imports_point_down():
    upward = []
    for name, path, line, target in _edges():
        (mine, my_top), (theirs, their_top) = _layer(name), _layer(target)
        if theirs > mine or (theirs == mine and my_top != their_top):
            upward.append(f"{path.relative_to(PACKAGE.parent)}:{line} {name} -> {target}")
    assert not upward, "imports that point up or sideways:\n" + "\n".join(upward)


def test_no_import_cycles():
    graph: dict[str, set[str]] = {}
    for name, _, _, target in _edges():
        graph.setdefault(name, set()).add(target)
    # Only true submodule edges: a package's __init__ importing its own modules is not a cycle.
    cycles = []
    state: dict[str, int] = {}

    def visit(node, stack):
        state[node] = 1
        stack.append(node)
        for nxt in graph.get(node, ()):
            if nxt.startswith(node + "."):
                continue
            if state.get(nxt) == 1:
                cycles.append(" -> ".join(stack[stack.index(nxt) :] + [nxt]))
            elif state.get(nxt) is None:
                visit(nxt, stack)
        stack.pop()
        state[node] = 2

    for node in sorted(graph):
        if state.get(node) is None:
            visit(node, [])
    assert not cycles, "import cycles:\n" + "\n".join(cycles)


def test_private_names_stay_in_their_module():
    # A name with a leading underscore is its module's own; what another module needs is public
    # (project rule: private helpers crossing modules hide the real contract between them).
    crossing = []
    for _, path in _modules():
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.ImportFrom) and (node.module or "").startswith("crustflow"):
                names = [a.name for a in node.names if a.name.startswith("_")]
                crossing += [
                    f"{path.relative_to(PACKAGE.parent)}:{node.lineno} {node.module}.{n}"
                    for n in names
                    if not n.startswith("__")
                ]
    assert not crossing, "private names imported from another module:\n" + "\n".join(crossing)


def test_package_root_stays_small():
    root = [p for p in PACKAGE.glob("*.py")]
    assert len(root) <= 12, sorted(p.name for p in root)


#: Longest function allowed, in code lines (no blank lines, comments or docstrings). The guide asks
#: for about 80; this gate stops anything past 100.
MAX_CODE_LINES = 100


def _code_lines(source: str, node) -> int:
    body = node.body
    doc = (0, -1)
    if body and isinstance(body[0], ast.Expr) and isinstance(body[0].value, ast.Constant):
        if isinstance(body[0].value.value, str):
            doc = (body[0].lineno, body[0].end_lineno)
    count = 0
    for number, line in enumerate(source.splitlines()[node.lineno - 1 : node.end_lineno]):
        text = line.strip()
        if text and not text.startswith("#") and not doc[0] <= node.lineno + number <= doc[1]:
            count += 1
    return count


def test_functions_stay_short():
    long = []
    for _name, path in _modules():
        source = path.read_text()
        for node in ast.walk(ast.parse(source)):
            if isinstance(node, ast.FunctionDef | ast.AsyncFunctionDef):
                lines = _code_lines(source, node)
                if lines > MAX_CODE_LINES:
                    long.append(
                        f"{path.relative_to(PACKAGE.parent)}:{node.lineno} {node.name} {lines}"
                    )
    assert not long, "functions over the limit:\n" + "\n".join(long)


def test_documented_module_paths_still_import():
    # The flat layout's module paths that the README and earlier releases documented.
    import importlib

    import crustflow

    for old, attribute in (
        ("crustflow.channel", "channel_flow"),
        ("crustflow.flowlaws", "FLOW_LAWS"),
        ("crustflow.rheology", "power_law_channel"),
        ("crustflow.profiles", "velocity_profiles"),
        ("crustflow.model", "compute_fields"),
        ("crustflow.budgets", "budget_table"),
        ("crustflow.maps", "grid_geometry"),
    ):
        module = importlib.import_module(old)
        assert hasattr(module, attribute), (old, attribute)
    for name in (
        "load_scenario",
        "solve",
        "compute_fields",
        "budget_table",
        "channel_flow",
        "velocity_profile",
        "velocity_profiles",
        "evolve",
        "fit",
    ):
        assert callable(getattr(crustflow, name)), name
    assert crustflow.channel is importlib.import_module("crustflow.physics.channel")
