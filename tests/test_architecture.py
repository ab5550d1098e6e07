"""The package's layout keeps its promises: no import cycles (imports inside functions
included), no module outside a term kind's or a family's own asks which concrete kind or
family it holds, no private name used outside its module, and the module map in
DEVELOPERS.md names every module. These are read from the source with ``ast``."""

from __future__ import annotations

import ast
import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGE = ROOT / "engine" / "tallgam"


def _modules() -> dict[str, Path]:
    out = {}
    for path in sorted(PACKAGE.rglob("*.py")):
        rel = path.relative_to(PACKAGE.parent).with_suffix("")
        parts = list(rel.parts)
        if parts[-1] == "__init__":
            parts = parts[:-1]
        out[".".join(parts)] = path
    return out


MODULES = _modules()


def _resolve(module: str, node: ast.ImportFrom) -> str:
    if node.level == 0:
        return node.module or ""
    base = module.split(".")
    if MODULES[module].name != "__init__.py":
        base = base[:-1]
    base = base[: len(base) - (node.level - 1)]
    return ".".join(base + ([node.module] if node.module else []))


def _imports(module: str) -> set[str]:
    """Package modules ``module`` imports, anywhere in its body."""
    tree = ast.parse(MODULES[module].read_text())
    found = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            target = _resolve(module, node)
            names = [f"{target}.{a.name}" if f"{target}.{a.name}" in MODULES else target
                     for a in node.names]
        else:
            continue
        for name in names:
            while name and name not in MODULES:
                name = name.rpartition(".")[0]
            if name.startswith("tallgam") and name != module:
                found.add(name)
    return found


def test_no_import_cycles():
    graph = {m: _imports(m) for m in MODULES}
    graph["tallgam"] = set()  # the top-level package only re-exports, lazily
    state: dict[str, int] = {}
    stack: list[str] = []
    cycles = []

    def visit(m):
        state[m] = 1
        stack.append(m)
        for n in sorted(graph.get(m, ())):
            if state.get(n) == 1:
                cycles.append(stack[stack.index(n):] + [n])
            elif n not in state:
                visit(n)
        stack.pop()
        state[m] = 2

    for m in sorted(graph):
        if m not in state:
            visit(m)
    assert not cycles, "import cycles: " + "; ".join(" → ".join(c) for c in cycles)


def _concrete_names(folder: str, suffixes: tuple[str, ...]) -> set[str]:
    names = set()
    for m, path in MODULES.items():
        if m.startswith(f"tallgam.{folder}."):
            for node in ast.walk(ast.parse(path.read_text())):
                if isinstance(node, ast.ClassDef) and node.name.endswith(suffixes):
                    names.add(node.name)
    return names


TERM_CLASSES = _concrete_names("terms", ("Spec", "Basis")) - {"TermSpec", "Basis"}
FAMILY_CLASSES = _concrete_names("families", ("",)) - {"Family", "Link", "Profiled"}


@pytest.mark.parametrize("folder,classes", [("terms", TERM_CLASSES),
                                            ("families", FAMILY_CLASSES)])
def test_only_a_kinds_own_modules_ask_for_its_class(folder, classes):
    offenders = []
    for m, path in MODULES.items():
        if m.startswith(f"tallgam.{folder}"):
            continue
        for node in ast.walk(ast.parse(path.read_text())):
            if (isinstance(node, ast.Call) and isinstance(node.func, ast.Name)
                    and node.func.id in ("isinstance", "issubclass")):
                used = {n.id for n in ast.walk(node.args[1]) if isinstance(n, ast.Name)}
                used |= {n.attr for n in ast.walk(node.args[1]) if isinstance(n, ast.Attribute)}
                if used & classes:
                    offenders.append(f"{m}:{node.lineno}")
    assert not offenders, f"isinstance on a concrete {folder} class: {offenders}"


FAMILY_NAMES = {"gaussian", "poisson", "binomial", "gamma", "inverse_gaussian", "tweedie",
                "negative_binomial"}


def test_no_comparison_of_a_family_name_outside_the_families():
    offenders = []
    for m, path in MODULES.items():
        if m.startswith("tallgam.families"):
            continue
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.Compare):
                consts = {c.value for c in [node.left, *node.comparators]
                          if isinstance(c, ast.Constant)}
                consts |= {e.value for c in [node.left, *node.comparators]
                           if isinstance(c, (ast.Tuple, ast.List, ast.Set)) for e in c.elts
                           if isinstance(e, ast.Constant)}
                if consts & FAMILY_NAMES:
                    offenders.append(f"{m}:{node.lineno}")
    assert not offenders, f"a family's name compared outside tallgam.families: {offenders}"


def test_no_private_name_is_used_outside_its_module():
    offenders = []
    for m, path in MODULES.items():
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.ImportFrom) and _resolve(m, node).startswith("tallgam"):
                offenders += [f"{m}: {a.name}" for a in node.names
                              if a.name.startswith("_") and not a.name.startswith("__")]
            if (isinstance(node, ast.Attribute) and node.attr.startswith("_")
                    and not node.attr.startswith("__") and isinstance(node.value, ast.Name)
                    and node.value.id not in ("self", "cls")
                    and f"tallgam.{node.value.id}" not in ("tallgam.self",)):
                imported = {a.asname or a.name for n in ast.walk(ast.parse(path.read_text()))
                            if isinstance(n, (ast.Import, ast.ImportFrom)) for a in n.names}
                if node.value.id in imported:
                    offenders.append(f"{m}:{node.lineno} {node.value.id}.{node.attr}")
    assert not offenders, f"private names used outside their module: {offenders}"


def test_the_module_map_names_every_module():
    text = (ROOT / "DEVELOPERS.md").read_text()
    text = text[text.index("## Architecture"):text.index("### Adding a term kind")]
    listed = {m for m in re.findall(r"`([a-z_]+(?:/[a-z_]+)*\.py)`", text)
              if not m.endswith("__init__.py")}
    present = {str(p.relative_to(PACKAGE)) for p in PACKAGE.rglob("*.py")
               if p.name != "__init__.py" and p.name != "__main__.py"}
    assert present <= listed, f"modules missing from DEVELOPERS.md: {sorted(present - listed)}"
    assert listed <= present, \
        f"DEVELOPERS.md names modules that do not exist: {sorted(listed - present)}"
