"""Driving a block decoder as the daemon's link loop does, for tests that also want to know whether
a packet made its source address the peer's."""

from __future__ import annotations

import itertools

from fecproxy.protocol.decoder import BlockDecoder
from fecproxy.protocol.events import Event, PeerAddressChanged

#: Source ports handed out one per packet, so every packet comes from a new address.
_SOURCES = itertools.count(1024)


def receive_noting_peer(decoder: BlockDecoder, data: bytes, now: float) -> tuple[list[Event], bool]:
    """``decoder.receive`` from a fresh source address each time: returns the packet's events
    (the peer-address event aside) and whether the decoder took that address as its peer's,
    which it does exactly for a valid packet of the followed session."""
    decoder.learn_peer = True
    events = decoder.receive(data, ("127.0.0.1", next(_SOURCES)), now)
    learned = [e for e in events if isinstance(e, PeerAddressChanged)]
    return [e for e in events if not isinstance(e, PeerAddressChanged)], bool(learned)
