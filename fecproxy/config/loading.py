"""Reading a config file: bytes -> UTF-8 text -> YAML (duplicate keys caught) -> Config."""

from __future__ import annotations

from pathlib import Path

import yaml

from fecproxy.config.schema import Config, ConfigError, ConfigUnreadable, parse_config

#: A config file is a few hundred bytes; refusing more than 1 MiB keeps a wrong path (a log, a
#: disk image) from being read into memory and parsed.
MAX_CONFIG_FILE_BYTES = 1024 * 1024


class _StrictLoader(yaml.SafeLoader):
    """SafeLoader that records duplicate keys (PyYAML silently keeps the last one)."""

    def __init__(self, stream):
        super().__init__(stream)
        self.duplicates: list[tuple[str, int, int]] = []

    def construct_mapping(self, node, deep=False):
        seen = set()
        for key_node, _ in node.value:
            if isinstance(key_node, yaml.ScalarNode):
                key = key_node.value
                if key in seen:
                    mark = key_node.start_mark
                    self.duplicates.append((key, mark.line + 1, mark.column + 1))
                seen.add(key)
        return super().construct_mapping(node, deep=deep)


def _reader_message(error: yaml.reader.ReaderError, text: str, source: str) -> str:
    """A character YAML forbids (control codes): say where, as line and column."""
    position = min(max(error.position, 0), len(text))
    line = text.count("\n", 0, position) + 1
    column = position - (text.rfind("\n", 0, position) + 1) + 1
    return (
        f"{source}: line {line}, column {column}: YAML syntax error: character "
        f"U+{error.character:04X} is not allowed; expected printable text"
    )


def _read_yaml(text: str, source: str) -> object:
    try:
        loader = _StrictLoader(text)
    except yaml.reader.ReaderError as error:
        raise ConfigError([_reader_message(error, text, source)]) from None
    try:
        document = loader.get_single_data()
    except yaml.reader.ReaderError as error:
        raise ConfigError([_reader_message(error, text, source)]) from None
    except yaml.MarkedYAMLError as error:
        mark = error.problem_mark or error.context_mark
        where = f"line {mark.line + 1}, column {mark.column + 1}: " if mark else ""
        problem = error.problem or error.context or "not valid YAML"
        raise ConfigError([f"{source}: {where}YAML syntax error: {problem}"]) from None
    except yaml.YAMLError as error:
        raise ConfigError([f"{source}: YAML error: {error}"]) from None
    except RecursionError:
        raise ConfigError([f"{source}: YAML nested too deeply; expected a flat mapping of settings"]) from None
    finally:
        loader.dispose()
    if loader.duplicates:
        messages = [
            f"{source}: line {line}, column {column}: {key}: duplicate key; expected each key once"
            for key, line, column in loader.duplicates
        ]
        try:
            parse_config(document, source)
        except ConfigError as error:
            messages += error.messages
        raise ConfigError(messages)
    return document


def load_config(path: str | Path) -> Config:
    """Read and validate a YAML config file.

    Raises ConfigUnreadable when the file cannot be read at all, ConfigError (listing every
    fault) when it can but is not a valid config.
    """
    source = str(path)
    try:
        with open(path, "rb") as file:
            data = file.read(MAX_CONFIG_FILE_BYTES + 1)
    except OSError as error:
        raise ConfigUnreadable([f"{source}: cannot read the file: {error.strerror or error}"]) from None
    if len(data) > MAX_CONFIG_FILE_BYTES:
        raise ConfigUnreadable([f"{source}: file is larger than {MAX_CONFIG_FILE_BYTES} bytes; is this a config file?"])
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as error:
        raise ConfigError([f"{source}: byte {error.start} is not UTF-8; expected a UTF-8 text file"]) from None
    return parse_config_text(text, source)


def parse_config_text(text: str, source: str = "<text>") -> Config:
    """Validate YAML text (for configs embedded in tools and tests); raise ConfigError."""
    return parse_config(_read_yaml(text, source), source)
