"""The package root's public names: each one loads, and the README's library example runs."""

import ast
from pathlib import Path

import numpy as np

import fecproxy


def test_every_public_name_loads():
    for name in fecproxy.__all__:
        assert getattr(fecproxy, name) is not None


def test_readme_library_example():
    # Design-notes vector, computed with `galois` from RFC 5510 §8.2 (k=4, n=7).
    code = fecproxy.BlockCode(k=4, n=7)
    source = np.arange(1, 17, dtype=np.uint8).reshape(4, 4)
    repair = code.encode(source)
    assert bytes(repair.reshape(-1)).hex() == "1516177f424140d8484b4aaf"
    rebuilt = code.decode({1: source[1], 4: repair[0], 5: repair[1], 6: repair[2]})
    assert (rebuilt == source).all()


def test_type_checkers_see_the_same_public_names_as_the_lazy_loader():
    """The root's ``if TYPE_CHECKING:`` re-exports and its ``_PUBLIC`` table name the same objects."""
    root = Path(fecproxy.__file__)
    tree = ast.parse(root.read_text(encoding="utf-8"))
    static: dict[str, str] = {}
    for node in tree.body:
        if isinstance(node, ast.If) and isinstance(node.test, ast.Name) and node.test.id == "TYPE_CHECKING":
            for statement in node.body:
                assert isinstance(statement, ast.ImportFrom) and statement.module is not None
                for alias in statement.names:
                    assert alias.asname == alias.name, "an explicit re-export is written `import X as X`"
                    static[alias.name] = statement.module
    assert static == fecproxy._PUBLIC
    assert set(fecproxy.__all__) == {"__version__", *static}


def test_the_package_is_marked_typed():
    assert (Path(fecproxy.__file__).parent / "py.typed").is_file()
