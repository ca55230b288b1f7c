"""The daemon's status page: one self-contained HTML document (no CDN, no library).

Why files beside this module: the page's HTML, CSS and JavaScript are edited as what they are and
shipped as package data; :func:`load` inlines the style and the script into the document once, so
the browser makes no request but ``/status.json``.  The Content-Security-Policy allows exactly that
style and script (by their SHA-256) and connections to the daemon itself, nothing else.
"""

from __future__ import annotations

import base64
import functools
import hashlib
from dataclasses import dataclass
from importlib import resources

STYLE_MARK = "/* page.css */"
SCRIPT_MARK = "/* page.js */"


@dataclass(frozen=True)
class Page:
    html: str
    content_security_policy: str


def _hash_source(text: str) -> str:
    return "'sha256-" + base64.b64encode(hashlib.sha256(text.encode()).digest()).decode() + "'"


@functools.cache
def load() -> Page:
    """The assembled document and the policy that lets exactly its own style and script run."""
    files = resources.files(__name__)
    html = files.joinpath("page.html").read_text(encoding="utf-8")
    style = files.joinpath("page.css").read_text(encoding="utf-8")
    script = files.joinpath("page.js").read_text(encoding="utf-8")
    if html.count(STYLE_MARK) != 1 or html.count(SCRIPT_MARK) != 1:
        raise RuntimeError("page.html must hold the style and script marks once each")
    style_text, script_text = "\n" + style, "\n" + script
    html = html.replace(STYLE_MARK, style_text).replace(SCRIPT_MARK, script_text)
    policy = (
        f"default-src 'none'; style-src {_hash_source(style_text)}; script-src {_hash_source(script_text)}; "
        "connect-src 'self'; img-src 'self' data:; base-uri 'none'; form-action 'none'; frame-ancestors 'none'"
    )
    return Page(html=html, content_security_policy=policy)
