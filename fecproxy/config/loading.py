"""Reading a config file: bytes -> UTF-8 text -> YAML (duplicate keys caught) -> Config,
then the key files it names (auth.key_file, auth.previous_key_file) -> keys in the Config."""

from __future__ import annotations

import dataclasses
import errno
import os
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import yaml

from fecproxy.config.schema import Config, ConfigError, ConfigUnreadable, parse_config
from fecproxy.protocol.keys import (
    MAX_KEY_FILE_BYTES,
    KeyFileError,
    MasterKey,
    check_credential_mode,
    check_key_file_mode,
    parse_key_text,
)

#: Set by systemd for a service whose unit has LoadCredential= (systemd.exec(5), "Credentials"):
#: the folder holding the credentials it passed, readable by the service's user only.
CREDENTIALS_ENV = "CREDENTIALS_DIRECTORY"

#: A config file is a few hundred bytes; refusing more than 1 MiB keeps a wrong path (a log, a
#: disk image) from being read into memory and parsed.
MAX_CONFIG_FILE_BYTES = 1024 * 1024


class _StrictLoader(yaml.SafeLoader):
    """SafeLoader that records duplicate keys (PyYAML silently keeps the last one)."""

    def __init__(self, stream: str) -> None:
        super().__init__(stream)
        self.duplicates: list[tuple[str, int, int]] = []

    def construct_mapping(self, node: yaml.MappingNode, deep: bool = False) -> dict[Any, Any]:
        seen: set[str] = set()
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
    config = parse_config_text(text, source)
    return load_keys(config, source, Path(path).parent)


def key_file_path(written: str, base: Path) -> Path:
    """Where a key file named in the config lives: relative paths are taken from the config
    file's directory, so the daemon finds it whatever its working directory."""
    return base / Path(written).expanduser()


def credential_path(written: str, environ: Mapping[str, str] | None = None) -> Path | None:
    """The systemd credential standing for a key file, if there is one: a key file written as a
    plain name (``link.key``) is taken from ``$CREDENTIALS_DIRECTORY`` when systemd set it and
    passed a credential of that name (``LoadCredential=link.key:/etc/fecproxy/link.key``).  So
    one config serves the service (key passed by systemd, the file itself root's, mode 0600)
    and a manual run as root (the same name read beside the config)."""
    directory = (os.environ if environ is None else environ).get(CREDENTIALS_ENV)
    if not directory or Path(written).name != written:
        return None
    candidate = Path(directory) / written
    return candidate if os.path.lexists(candidate) else None


def read_key_file(path: Path, *, credential: bool = False) -> MasterKey:
    """Open, check the mode of what was opened (no race with a swapped file), read, parse.

    ``credential``: the file is a systemd credential (its own mode rule, see
    ``keys.check_credential_mode``).  Raises KeyFileError naming the file and what to do.
    """
    shown = str(path)
    try:
        descriptor = os.open(path, os.O_RDONLY | getattr(os, "O_CLOEXEC", 0) | getattr(os, "O_NONBLOCK", 0))
    except FileNotFoundError:
        raise KeyFileError(
            f"{shown}: no such key file; create one with `fecproxy keygen {shown}` and copy it to the peer"
        ) from None
    except OSError as error:
        remedy = (
            'pass it with systemd\'s LoadCredential= (README, "Installing as a service"), or run as its owner'
            if error.errno == errno.EACCES and not credential
            else "make it readable by the user fecproxy runs as, and by no one else (chmod 600)"
        )
        raise KeyFileError(f"{shown}: cannot read the key file ({error.strerror or error}); {remedy}") from None
    try:
        status = os.fstat(descriptor)
        if credential:
            check_credential_mode(status.st_mode, status.st_uid, os.geteuid(), shown)
        else:
            check_key_file_mode(status.st_mode, shown)
        data = os.read(descriptor, MAX_KEY_FILE_BYTES + 1)
    except OSError as error:
        raise KeyFileError(f"{shown}: cannot read the key file ({error.strerror or error})") from None
    finally:
        os.close(descriptor)
    if len(data) > MAX_KEY_FILE_BYTES:
        raise KeyFileError(
            f"{shown}: larger than {MAX_KEY_FILE_BYTES} bytes, so not a key file; expected 64 hexadecimal digits"
        )
    return parse_key_text(data.decode("ascii", errors="replace"), shown)


def load_keys(config: Config, source: str, base: Path) -> Config:
    """Read the key files the config names; ConfigError listing every fault (the keys never
    appear in a message)."""
    auth = config.auth
    if auth.key_file is None:
        return config
    errors: list[str] = []
    loaded: dict[str, MasterKey] = {}
    for name in ("key_file", "previous_key_file"):
        written = getattr(auth, name)
        if written is None:
            continue
        try:
            credential = credential_path(written)
            if credential is not None:
                loaded[name] = read_key_file(credential, credential=True)
            else:
                loaded[name] = read_key_file(key_file_path(written, base))
        except KeyFileError as error:
            errors.append(f"{source}: auth.{name}: {error}")
    if not errors and "previous_key_file" in loaded and loaded["key_file"] == loaded["previous_key_file"]:
        errors.append(
            f"{source}: auth.previous_key_file: holds the same key as auth.key_file; expected the old key during a "
            f"rollover, or no previous_key_file"
        )
    if errors:
        raise ConfigError(errors)
    keys = dataclasses.replace(auth, key=loaded["key_file"], previous_key=loaded.get("previous_key_file"))
    return dataclasses.replace(config, auth=keys)


def parse_config_text(text: str, source: str = "<text>") -> Config:
    """Validate YAML text (for configs embedded in tools and tests); raise ConfigError."""
    return parse_config(_read_yaml(text, source), source)
