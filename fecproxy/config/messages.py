"""How the config layer shows a bad value and suggests a key: one voice for every message."""

from __future__ import annotations

import difflib
import json
from collections.abc import Iterable, Mapping

#: difflib ratio at which an unknown key is close enough to suggest (difflib's own default).
SUGGESTION_CUTOFF = 0.6
#: Longest rendering of a bad value inside a message.
MAX_SHOWN_VALUE_CHARS = 60


def kind_of(value: object) -> str:
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "a boolean"
    if isinstance(value, int):
        return "an integer"
    if isinstance(value, float):
        return "a number with a fraction" if not float(value).is_integer() else "a floating-point number"
    if isinstance(value, str):
        return "a string"
    if isinstance(value, Mapping):
        return "a mapping"
    if isinstance(value, (list, tuple)):
        return "a list"
    return f"a {type(value).__name__}"


def show_value(value: object) -> str:
    """A bad value as the user would recognise it from the YAML."""
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        text = json.dumps(value, ensure_ascii=False)
    elif isinstance(value, (int, float)):
        text = repr(value)
    elif isinstance(value, Mapping):
        text = "{…}" if value else "{}"
    elif isinstance(value, (list, tuple)):
        text = "[…]" if value else "[]"
    else:
        text = str(value)
    return clip(text)


def clip(text: str, limit: int = MAX_SHOWN_VALUE_CHARS) -> str:
    return text if len(text) <= limit else text[: limit - 1] + "…"


def key_text(key: object) -> str:
    if isinstance(key, bool):
        return "true" if key else "false"
    return key if isinstance(key, str) else show_value(key)


def or_list(words: list[str]) -> str:
    return ", ".join(words[:-1]) + f" or {words[-1]}" if len(words) > 1 else words[0]


def closest(word: str, candidates: Iterable[str]) -> str | None:
    lowered = {candidate.lower(): candidate for candidate in candidates}
    match = difflib.get_close_matches(word.lower(), list(lowered), n=1, cutoff=SUGGESTION_CUTOFF)
    return lowered[match[0]] if match else None
