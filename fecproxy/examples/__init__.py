"""The example configs (``config/``) and deploy files (``deploy/``: systemd unit, Prometheus rules
and alerts, Grafana dashboard) as package data, so an installed fecproxy can write them out
(``fecproxy init --shipped DIR``) without the source tree.

In the repository the two folders here are links to the top-level ``config/`` and ``deploy/``
(the paths README and the tests use); a built wheel holds copies of the files.
"""

from __future__ import annotations

from importlib import resources
from importlib.resources.abc import Traversable

#: The shipped folders, as named inside the package and written out.
FOLDERS = ("config", "deploy")


def shipped_files() -> list[tuple[str, Traversable]]:
    """(relative path, resource) of every shipped file, in a stable order."""
    found: list[tuple[str, Traversable]] = []

    def walk(node: Traversable, prefix: str) -> None:
        for child in sorted(node.iterdir(), key=lambda item: item.name):
            path = f"{prefix}/{child.name}"
            if child.is_dir():
                walk(child, path)
            elif not child.name.endswith((".pyc",)):
                found.append((path, child))

    root = resources.files(__name__)
    for folder in FOLDERS:
        walk(root / folder, folder)
    return found
