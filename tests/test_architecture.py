"""The house: imports run one way, from the commands down to units and errors.

Every ``import`` of a project module (at module level or inside a function)
is read from the source. A module may import from its own package or from a
package on a lower layer, never upward, never a private name (``_x``) of
another module, and no modules may import each other in a loop. Project
imports stand at the top of a module unless the line says why not (a
``startup:`` comment: the command line's start time). The layers and why
they are cut so are in DEVELOPERS.md, section "Architecture".
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
PKG = ROOT / "mdrotor"

# top layer first
LAYERS = [
    ("commands",),
    ("report", "studies"),
    ("engine",),
    ("analysis",),
    ("results",),
    ("model",),
    ("config",),
    ("electrodes",),
    ("physics",),
    ("units", "numfmt", "inputfiles"),
    ("errors", "version"),
]
RANK = {pkg: i for i, layer in enumerate(LAYERS) for pkg in layer}
RANK["mdrotor"] = -1  # the notebook face stands above everything: nothing inside imports it
SIDEWAYS = {("report", "studies")}  # the report reads sweep and optimisation files; studies never draw
FACES = {"mdrotor", "mdrotor.__main__"}  # the notebook face and `python -m mdrotor` only hand names on


def _module(path: Path) -> str:
    parts = list(path.relative_to(ROOT).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def _package(module: str) -> str:
    parts = module.split(".")
    return parts[1] if len(parts) > 1 else "mdrotor"


def _is_module(dotted: str) -> bool:
    p = PKG.joinpath(*dotted.split(".")[1:])
    return p.with_suffix(".py").exists() or (p / "__init__.py").exists()


def _imports(path: Path) -> list:
    """(line, imported module, names) of every project import in a file."""
    module = _module(path)
    here = module.split(".") if path.name == "__init__.py" else module.split(".")[:-1]
    out = []
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.ImportFrom):
            if node.level:
                base = here[:len(here) - node.level + 1]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module or ""
            if target != "mdrotor" and not target.startswith("mdrotor."):
                continue
            names = []
            for a in node.names:
                if _is_module(f"{target}.{a.name}"):
                    out.append((node.lineno, f"{target}.{a.name}", []))
                else:
                    names.append(a.name)
            if names:
                out.append((node.lineno, target, names))
        elif isinstance(node, ast.Import):
            out += [(node.lineno, a.name, []) for a in node.names if a.name.startswith("mdrotor.")]
    return out


MODULES = {_module(p): p for p in sorted(PKG.rglob("*.py"))}
EDGES = {m: _imports(p) for m, p in MODULES.items()}


def _where(m: str, line: int) -> str:
    return f"{MODULES[m].relative_to(ROOT)}:{line}"


def test_every_package_has_a_layer():
    missing = sorted({_package(m) for m in MODULES if m not in FACES} - set(RANK))
    assert not missing, f"packages without a layer in LAYERS: {missing}"


def test_imports_run_downward():
    bad = []
    for m, edges in EDGES.items():
        if m in FACES:
            continue
        for line, target, _ in edges:
            a, b = _package(m), _package(target)
            if a == b or RANK[b] > RANK[a] or (a, b) in SIDEWAYS:
                continue
            bad.append(f"{_where(m, line)} imports {target} ({a} -> {b})")
    assert not bad, "imports against the layers:\n" + "\n".join(bad)


def test_no_private_name_across_modules():
    bad = [f"{_where(m, line)} takes {target}.{n}"
           for m, edges in EDGES.items() for line, target, names in edges if target != m
           for n in names if n.startswith("_") and not n.startswith("__")]
    assert not bad, "private names used across modules:\n" + "\n".join(bad)


def test_no_import_loops():
    graph = {m: {t for _, t, _ in e if t in MODULES and t != m} for m, e in EDGES.items() if m not in FACES}
    state, loops = {}, []

    def visit(m, stack):
        state[m] = 1
        for t in sorted(graph.get(m, ())):
            if state.get(t) == 1:
                loops.append(" -> ".join(stack[stack.index(t):] + [t]))
            elif t not in state:
                visit(t, stack + [t])
        state[m] = 2

    for m in sorted(graph):
        if m not in state:
            visit(m, [m])
    assert not loops, "modules that import each other:\n" + "\n".join(loops)


def test_imports_at_module_top():
    bad = []
    for m, path in MODULES.items():
        lines = path.read_text().splitlines()
        top = {n.lineno for n in ast.parse(path.read_text()).body if isinstance(n, (ast.Import, ast.ImportFrom))}
        bad += [f"{_where(m, ln)} imports {t} inside a function" for ln, t, _ in EDGES[m]
                if ln not in top and "startup:" not in lines[ln - 1]]
    assert not bad, "imports inside functions without a startup: reason:\n" + "\n".join(bad)


@pytest.mark.parametrize("layer", [p for layer in LAYERS for p in layer if p not in ("units", "numfmt", "inputfiles", "errors", "version")])
def test_package_has_a_face(layer):
    """Each package says in its __init__ docstring what it holds."""
    init = PKG / layer / "__init__.py"
    doc = ast.get_docstring(ast.parse(init.read_text())) or ""
    assert len(doc.split()) >= 8, f"{init.relative_to(ROOT)}: a docstring that says what the package holds"
