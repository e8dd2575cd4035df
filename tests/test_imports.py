"""Import boundaries: every module imports only modules to its left in LAYERS, and nothing imports
in a cycle.  Imports inside functions count as well (a lazy import is still a dependency)."""

import ast
from pathlib import Path

import pytest

PKG = Path(__file__).resolve().parents[1] / "sigmasim"

# The layer order of DEVELOPERS.md's architecture map, left to right.  A top-level module or
# package of sigmasim is one entry (``sigmasim.kernels`` covers kernels/*); ``sigmasim`` is the
# package's __init__ (the version).
LAYERS = [
    "sigmasim",
    "sigmasim.errors",
    "sigmasim.interrupt",
    "sigmasim.config",
    "sigmasim.lattice",
    "sigmasim.rng",
    "sigmasim.kernels",
    "sigmasim.updates",
    "sigmasim.models",
    "sigmasim.chain",
    "sigmasim.files",
    "sigmasim.storage",
    "sigmasim.progress",
    "sigmasim.threads",
    "sigmasim.cluster",
    "sigmasim.run",
    "sigmasim.exact",
    "sigmasim.vacua",
    "sigmasim.analysis",
    "sigmasim.validation",
    "sigmasim.export",
    "sigmasim.synth",
    "sigmasim.score",
    "sigmasim.protocols",
    "sigmasim.scan",
    "sigmasim.reference",
    "sigmasim.info",
    "sigmasim.cli",
    "sigmasim.__main__",
]


def _module_name(path: Path) -> str:
    rel = path.relative_to(PKG.parent).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _exists(name: str) -> bool:
    p = PKG.parent / name.replace(".", "/")
    return p.with_suffix(".py").exists() or (p / "__init__.py").exists()


def imports_of(path: Path) -> set[str]:
    """The sigmasim modules ``path`` imports (``from a import b`` counts as ``a.b`` when that is a
    module, else as ``a``)."""
    name = _module_name(path)
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    out = set()
    for node in ast.walk(ast.parse(path.read_text(), str(path))):
        if isinstance(node, ast.Import):
            out.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")[: len(package.split(".")) - node.level + 1]
                mod = ".".join(base + ([node.module] if node.module else []))
            else:
                mod = node.module or ""
            subs = [f"{mod}.{a.name}" for a in node.names if _exists(f"{mod}.{a.name}")]
            out.update(subs or [mod])
    return {m for m in out if m == "sigmasim" or m.startswith("sigmasim.")}


def layer_of(module: str) -> str:
    parts = module.split(".")
    return ".".join(parts[:2])


def graph() -> dict[str, set[str]]:
    """module -> the sigmasim modules it imports, for every module of the package."""
    return {_module_name(p): imports_of(p) for p in sorted(PKG.rglob("*.py"))}


def rightward_imports(g: dict, layers: list) -> list[str]:
    rank = {name: i for i, name in enumerate(layers)}
    bad = []
    for mod, deps in g.items():
        here = layer_of(mod)
        if here not in rank:
            bad.append(f"{mod} is not in LAYERS")
            continue
        for dep in sorted(deps):
            there = layer_of(dep)
            if there not in rank:
                bad.append(f"{mod} imports {dep}, which is not in LAYERS")
            elif rank[there] > rank[here]:
                bad.append(f"{mod} imports {dep} (rightwards: {there} is right of {here})")
    return bad


def cycles(g: dict) -> list[list[str]]:
    """The import cycles among modules (each once, as a path that returns to its start)."""
    found, state, stack = [], {}, []

    def visit(m):
        state[m] = 1
        stack.append(m)
        for d in sorted(g.get(m, ())):
            if d == m or d not in g:
                continue
            if state.get(d) == 1:
                found.append(stack[stack.index(d):] + [d])
            elif d not in state:
                visit(d)
        stack.pop()
        state[m] = 2

    for m in sorted(g):
        if m not in state:
            visit(m)
    return found


def test_every_module_imports_only_leftwards():
    bad = rightward_imports(graph(), LAYERS)
    assert not bad, "\n".join(bad)


def test_no_import_cycles():
    found = cycles(graph())
    assert not found, "\n".join(" -> ".join(c) for c in found)


def test_layers_name_existing_modules():
    for name in LAYERS:
        assert name == "sigmasim" or _exists(name), name


@pytest.mark.parametrize("case", ["rightward", "cycle", "unknown"])
def test_the_checks_can_fail(case):
    g = {"sigmasim.chain": {"sigmasim.kernels.measure"}, "sigmasim.kernels.measure": set()}
    if case == "rightward":
        g["sigmasim.kernels.measure"] = {"sigmasim.chain"}
        assert rightward_imports(g, LAYERS) == [
            "sigmasim.kernels.measure imports sigmasim.chain (rightwards: sigmasim.chain is right of "
            "sigmasim.kernels)"]
    elif case == "cycle":
        g["sigmasim.kernels.measure"] = {"sigmasim.kernels.u1"}
        g["sigmasim.kernels.u1"] = {"sigmasim.kernels.measure"}
        assert cycles(g) == [["sigmasim.kernels.measure", "sigmasim.kernels.u1", "sigmasim.kernels.measure"]]
    else:
        g["sigmasim.newthing"] = set()
        assert rightward_imports(g, LAYERS) == ["sigmasim.newthing is not in LAYERS"]


def test_the_parser_sees_lazy_and_relative_imports(tmp_path):
    src = PKG / "models" / "_probe_imports.py"
    try:
        src.write_text("def f():\n    from sigmasim import storage\n    from . import chiral\n"
                       "    import sigmasim.kernels.u1\n")
        assert imports_of(src) == {"sigmasim.storage", "sigmasim.models.chiral", "sigmasim.kernels.u1"}
    finally:
        src.unlink()


def test_only_the_command_line_prints():
    """cli.py holds all printing: no other module calls print() or defines a ``*_command``."""
    bad = []
    for path in sorted(PKG.rglob("*.py")):
        if path.name == "cli.py" and path.parent == PKG:
            continue
        for node in ast.walk(ast.parse(path.read_text(), str(path))):
            if isinstance(node, ast.Call) and isinstance(node.func, ast.Name) and node.func.id == "print":
                bad.append(f"{path.relative_to(PKG.parent)}:{node.lineno} calls print()")
            if isinstance(node, ast.FunctionDef) and node.name.endswith("_command") and node.col_offset == 0:
                bad.append(f"{path.relative_to(PKG.parent)}:{node.lineno} defines {node.name}")
    assert not bad, "\n".join(bad)
