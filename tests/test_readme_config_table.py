"""README's configuration table against the schema: every key the schema accepts is documented
with its default, and every key the table names is one the schema accepts.

Several helpers add keys at once; this keeps a new key from going undocumented and a renamed one
from lingering in the table.
"""

from __future__ import annotations

import dataclasses
import enum
import re
from pathlib import Path

from fecproxy.config.sections import AdaptSection
from fecproxy.config.tables import _DEFAULTS, _SECTIONS, ALL_KEY_PATHS

README = (Path(__file__).resolve().parent.parent / "README.md").read_text()


def _table_rows() -> dict[str, str]:
    """key path -> the README's default column, for every key in the first column."""
    section = README.split("### Configuration", 1)[1].split("\n### ", 1)[0]
    rows: dict[str, str] = {}
    for line in section.splitlines():
        if not line.startswith("| `"):
            continue
        columns = [column.strip() for column in line.split("|")]
        keys = re.findall(r"`([a-z_.]+)`", columns[1])
        defaults = [text.strip(" `") for text in columns[2].split(",")]
        for index, key in enumerate(keys):
            rows[key] = defaults[min(index, len(defaults) - 1)]
    return rows


def _schema_keys() -> dict[str, object]:
    """Every settable key path (sections themselves excluded) -> its default (absent = required)."""
    keys: dict[str, object] = {}
    for path in ALL_KEY_PATHS:
        if path in _SECTIONS:
            continue
        keys[path] = _DEFAULTS.get(path, "—")
    for field in dataclasses.fields(AdaptSection):  # fec.adapt's nested keys
        keys[f"fec.adapt.{field.name}"] = field.default
    return keys


def _as_readme_writes(value: object) -> str:
    if value is None:
        return "null"
    if isinstance(value, bool):
        return str(value).lower()
    if isinstance(value, enum.Enum):
        return str(value.value)
    if isinstance(value, tuple):
        return "[" + ", ".join(str(item) for item in value) + "]"
    return str(value)


def test_every_schema_key_is_in_the_readme_table_and_back():
    documented, schema = set(_table_rows()), set(_schema_keys())
    assert not schema - documented, f"add to README's configuration table: {sorted(schema - documented)}"
    assert not documented - schema, f"README's table names keys the schema refuses: {sorted(documented - schema)}"


def test_readme_defaults_are_the_schema_defaults():
    rows = _table_rows()
    wrong = {}
    for key, default in _schema_keys().items():
        written = rows[key]
        # "off" is how the table writes an optional feature left unset (null in YAML), "—" a key
        # whose need depends on the role (listen, forward, link.peer).
        if written in ("off", "—") and default is None:
            continue
        if written != _as_readme_writes(default):
            wrong[key] = (written, _as_readme_writes(default))
    assert not wrong, f"README default vs schema default: {wrong}"


def test_readme_names_every_setting_a_reload_cannot_apply():
    """README's Signals paragraph lists what needs a restart; the daemon's list is the truth."""
    from fecproxy.shell.settings import RESTART_FIELDS, RESTART_KEYS

    paragraph = README.split("`SIGHUP` re-reads the config", 1)[1].split("\n\n", 1)[0]
    listed = set(re.findall(r"`([a-z_.]+)`", paragraph.split("need a restart", 1)[0].split("Changes to", 1)[1]))
    assert listed == set(RESTART_KEYS) | set(RESTART_FIELDS)
