"""fecproxy: forward error correction for UDP across lossy links.

Public library API (stable), importable from here:

* :class:`BlockCode` — the RFC 5510 Reed–Solomon block code over GF(2^8);
* :class:`BlockEncoder` / :class:`EncoderSettings` and :class:`BlockDecoder` /
  :class:`DecoderSettings` — the sans-IO sender and receiver cores (datagrams or packets and a
  ``now`` in; packets or events and the next deadline out);
* the decoder's events (base :class:`Event`) :class:`Delivery`, :class:`BlockReport`,
  :class:`Dropped`, :class:`SessionStarted`, and the counter labels :class:`DropReason` and
  :class:`BlockOutcome`.

The names load on first use (PEP 562), so ``import fecproxy`` stays cheap for commands that need
none of them, and the package root imports nothing eagerly (see tests/test_layers.py).  Type
checkers and editors see them through the ``TYPE_CHECKING`` imports below, which never run;
tests/test_public_api.py keeps that list and ``_PUBLIC`` the same.
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from fecproxy.coding.codec import BlockCode as BlockCode
    from fecproxy.protocol.decoder import BlockDecoder as BlockDecoder
    from fecproxy.protocol.decoder import DecoderSettings as DecoderSettings
    from fecproxy.protocol.encoder import BlockEncoder as BlockEncoder
    from fecproxy.protocol.encoder import EncoderSettings as EncoderSettings
    from fecproxy.protocol.events import BlockOutcome as BlockOutcome
    from fecproxy.protocol.events import BlockReport as BlockReport
    from fecproxy.protocol.events import Delivery as Delivery
    from fecproxy.protocol.events import Dropped as Dropped
    from fecproxy.protocol.events import DropReason as DropReason
    from fecproxy.protocol.events import Event as Event
    from fecproxy.protocol.events import SessionStarted as SessionStarted

__version__ = "0.1.0"

#: public name -> module that defines it
_PUBLIC = {
    "BlockCode": "fecproxy.coding.codec",
    "BlockEncoder": "fecproxy.protocol.encoder",
    "EncoderSettings": "fecproxy.protocol.encoder",
    "BlockDecoder": "fecproxy.protocol.decoder",
    "DecoderSettings": "fecproxy.protocol.decoder",
    "Event": "fecproxy.protocol.events",
    "Delivery": "fecproxy.protocol.events",
    "BlockReport": "fecproxy.protocol.events",
    "Dropped": "fecproxy.protocol.events",
    "SessionStarted": "fecproxy.protocol.events",
    "DropReason": "fecproxy.protocol.events",
    "BlockOutcome": "fecproxy.protocol.events",
}

__all__ = ["__version__", *_PUBLIC]


def __getattr__(name: str) -> Any:
    module = _PUBLIC.get(name)
    if module is None:
        raise AttributeError(f"module 'fecproxy' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(__all__)
