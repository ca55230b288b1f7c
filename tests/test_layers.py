"""The package's layers, enforced: imports flow downward only, and no import cycle exists.

The allowed direction is written once, here (DEVELOPERS.md shows the same table):

    coding  <  protocol  <  linkmodel  <  config  <  shell  <  commands  <  cli / __main__

A module may import modules of its own layer's subpackage and of any lower layer.  Two further
rules: a command never imports another command's module (``commands.demo`` may not reach into
``commands.impair``: what both need lives in a lower layer), and the package root
(``fecproxy/__init__.py``) imports nothing of the package eagerly (its public names load lazily).
Every import counts, including those inside functions and under ``if TYPE_CHECKING:`` — except
the package root's ``if TYPE_CHECKING:`` block: there the public names are re-exported for type
checkers only, code that never runs, so it cannot make the root heavy nor close a cycle.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE_ROOT = Path(__file__).resolve().parents[1] / "fecproxy"

#: Lowest first.  The key is the first component below ``fecproxy``.
LAYERS = ("coding", "protocol", "linkmodel", "config", "examples", "shell", "commands", "cli", "__main__")
RANK = {name: rank for rank, name in enumerate(LAYERS)}
#: Subpackages whose children are independent tools that must not import each other.
SILOED = ("commands",)


def module_name(path: Path, root: Path, package: str) -> str:
    parts = list(path.relative_to(root).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join([package, *parts])


def _is_type_checking_block(node: ast.AST) -> bool:
    """``if TYPE_CHECKING:`` or ``if typing.TYPE_CHECKING:``."""
    if not isinstance(node, ast.If):
        return False
    test = node.test
    return (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or (
        isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING"
    )


def _nodes(tree: ast.AST, *, skip_type_checking: bool) -> list[ast.AST]:
    """Every node of ``tree``; without the bodies of ``if TYPE_CHECKING:`` blocks if asked."""
    found: list[ast.AST] = []
    pending = [tree]
    while pending:
        node = pending.pop()
        found.append(node)
        children = list(ast.iter_child_nodes(node))
        if skip_type_checking and _is_type_checking_block(node):
            assert isinstance(node, ast.If)
            children = [node.test, *node.orelse]
        pending.extend(children)
    return found


def imports_of(path: Path, name: str, package: str) -> set[str]:
    """Every module of ``package`` that ``path`` imports, resolved to full dotted names (for the
    package root, the imports that run: not those under ``if TYPE_CHECKING:``)."""
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    is_package = path.name == "__init__.py"
    found: set[str] = set()
    for node in _nodes(tree, skip_type_checking=name == package):
        if isinstance(node, ast.Import):
            found.update(alias.name for alias in node.names if alias.name.split(".")[0] == package)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = name.split(".")
                base = base if is_package else base[:-1]
                base = base[: len(base) - (node.level - 1)]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module or ""
            if target.split(".")[0] != package:
                continue
            found.add(target)
            # ``from fecproxy.protocol import wire`` imports the module fecproxy.protocol.wire.
            found.update(f"{target}.{alias.name}" for alias in node.names)
    return found


def collect(root: Path, package: str) -> dict[str, set[str]]:
    """module -> the package's modules it imports (only names that exist as modules)."""
    modules = {module_name(path, root, package): path for path in sorted(root.rglob("*.py"))}
    graph: dict[str, set[str]] = {}
    for name, path in modules.items():
        graph[name] = {target for target in imports_of(path, name, package) if target in modules and target != name}
    return graph


def layer_of(module: str) -> str | None:
    parts = module.split(".")
    return parts[1] if len(parts) > 1 else None  # None: the package root


def violations(graph: dict[str, set[str]]) -> list[str]:
    found = []
    for module, targets in sorted(graph.items()):
        source = layer_of(module)
        for target in sorted(targets):
            if target == module.rsplit(".", 1)[0] and target.count(".") >= 1:
                continue  # a module may see its own subpackage's __init__ (implicit on import)
            destination = layer_of(target)
            if source is None:
                found.append(f"{module} (package root) imports {target}: load it lazily instead")
            elif destination is None:
                continue  # the root (e.g. __version__) is importable from anywhere
            elif destination not in RANK or source not in RANK:
                found.append(f"{module} -> {target}: layer {destination or source!r} is not in LAYERS")
            elif RANK[destination] > RANK[source]:
                found.append(f"{module} (layer {source}) imports {target} (higher layer {destination})")
            elif source == destination and source in SILOED:
                mine, theirs = module.split(".")[:3], target.split(".")[:3]
                if len(mine) > 2 and len(theirs) > 2 and mine != theirs:
                    found.append(f"{module} imports another command's module {target}")
    return found


def cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected components of more than one module (Tarjan), plus self-loops."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    found: list[list[str]] = []
    counter = 0

    def visit(node: str) -> None:
        nonlocal counter
        index[node] = low[node] = counter
        counter += 1
        stack.append(node)
        on_stack.add(node)
        for target in graph.get(node, ()):
            if target not in index:
                visit(target)
                low[node] = min(low[node], low[target])
            elif target in on_stack:
                low[node] = min(low[node], index[target])
        if low[node] == index[node]:
            component = []
            while True:
                member = stack.pop()
                on_stack.discard(member)
                component.append(member)
                if member == node:
                    break
            if len(component) > 1:
                found.append(sorted(component))

    for node in sorted(graph):
        if node not in index:
            visit(node)
    return found


def without_parent_edges(graph: dict[str, set[str]]) -> dict[str, set[str]]:
    """Importing ``a.b.c`` runs ``a/b/__init__`` first; that implicit edge is not a cycle we made."""
    return {m: {t for t in ts if not m.startswith(t + ".")} for m, ts in graph.items()}


# ------------------------------------------------------------------------------------- the package


def test_every_import_flows_downward():
    graph = collect(PACKAGE_ROOT, "fecproxy")
    assert len(graph) > 20, "the checker found too few modules: is PACKAGE_ROOT right?"
    assert violations(graph) == []


def test_no_import_cycle():
    assert cycles(without_parent_edges(collect(PACKAGE_ROOT, "fecproxy"))) == []


def test_every_subpackage_is_a_known_layer():
    subpackages = {p.name for p in PACKAGE_ROOT.iterdir() if p.is_dir() and (p / "__init__.py").exists()}
    modules = {p.stem for p in PACKAGE_ROOT.glob("*.py")} - {"__init__"}
    assert subpackages | modules <= set(LAYERS)


# ------------------------------------------------------------------ the checker on a synthetic tree


def write_tree(root: Path, files: dict[str, str]) -> Path:
    for relative, text in files.items():
        path = root / "pkg" / relative
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(text)
    return root / "pkg"


@pytest.fixture
def layered(tmp_path, monkeypatch):
    def make(files: dict[str, str]) -> dict[str, set[str]]:
        base = {"__init__.py": "", "coding/__init__.py": "", "protocol/__init__.py": "", "commands/__init__.py": ""}
        return collect(write_tree(tmp_path, base | files), "pkg")

    return make


def test_checker_accepts_a_downward_import(layered):
    graph = layered({"coding/field.py": "X = 1\n", "protocol/wire.py": "from pkg.coding import field\n"})
    assert violations(graph) == []
    assert cycles(without_parent_edges(graph)) == []


def test_checker_fails_on_an_inverted_import(layered):
    graph = layered({"coding/field.py": "def f():\n    from ..protocol import wire\n", "protocol/wire.py": "X = 1\n"})
    assert "pkg.coding.field (layer coding) imports pkg.protocol.wire (higher layer protocol)" in violations(graph)


def test_checker_fails_on_a_cycle(layered):
    graph = layered({"protocol/a.py": "from pkg.protocol import b\n", "protocol/b.py": "from . import a\n"})
    assert violations(graph) == []
    assert cycles(without_parent_edges(graph)) == [["pkg.protocol.a", "pkg.protocol.b"]]


def test_checker_sees_type_checking_imports_and_sibling_commands(layered):
    graph = layered(
        {
            "commands/demo.py": "from typing import TYPE_CHECKING\nif TYPE_CHECKING:\n    from pkg.commands.impair "
            "import R\n",
            "commands/impair.py": "R = 1\n",
        }
    )
    assert violations(graph) == ["pkg.commands.demo imports another command's module pkg.commands.impair"]


def test_checker_allows_type_checking_re_exports_in_the_root_only(layered):
    root = "from typing import TYPE_CHECKING\nif TYPE_CHECKING:\n    from pkg.protocol.wire import X as X\n"
    graph = layered({"__init__.py": root, "protocol/wire.py": "X = 1\n"})
    assert violations(graph) == []
    # The same block anywhere else still counts: coding may not see protocol, even for types.
    graph = layered({"coding/field.py": root, "protocol/wire.py": "X = 1\n"})
    assert violations(graph) == ["pkg.coding.field (layer coding) imports pkg.protocol.wire (higher layer protocol)"]
    # And an import after the block, or in its else branch, runs: it counts in the root too.
    graph = layered({"__init__.py": root + "else:\n    from pkg.protocol import wire\n", "protocol/wire.py": "X = 1\n"})
    assert "pkg (package root) imports pkg.protocol.wire: load it lazily instead" in violations(graph)


def test_checker_fails_on_an_eager_root_import(layered):
    graph = layered({"__init__.py": "from pkg.coding import field\n", "coding/field.py": "X = 1\n"})
    assert "pkg (package root) imports pkg.coding.field: load it lazily instead" in violations(graph)
