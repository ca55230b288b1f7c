"""The shell's side of the freshness exchange (:mod:`fecproxy.protocol.freshness`): seal and send
our challenges and hellos, answer the peer's challenges with echoes, and keep the history of our
own sequence numbers that an echo vouches from.  Thin: every decision is the protocol module's."""

from __future__ import annotations

from typing import Any

import trio

from fecproxy.protocol import freshness
from fecproxy.protocol.events import ChallengeDue, ControlReceived


class FreshnessLink:
    """Bound to one daemon's encoder (it seals) and decoder (its gate decides)."""

    def __init__(self, encoder: Any, decoder: Any) -> None:
        self.encoder, self.decoder = encoder, decoder
        self.echoes = freshness.EchoResponder()
        self._sequences: freshness.SequenceHistory | None = None  # keyed: what we sealed when

    def start(self, now: float) -> None:
        """The link socket is open: the gate's "listening since", our first sequence number."""
        self.decoder.freshness.listening(now)
        self.note(now)

    def note(self, now: float) -> None:
        """Keyed: remember which sequence number we seal from ``now`` on (cheap; per batch)."""
        sealer = self.encoder.sealer
        if sealer is None:
            return
        if self._sequences is None:
            self._sequences = freshness.SequenceHistory(now, sealer.next_sequence)
        else:
            self._sequences.note(now, sealer.next_sequence)

    @staticmethod
    def claims(event: ChallengeDue | ControlReceived) -> bool:
        """Ours: a challenge to send, or a control packet that is a challenge or an echo (an echo
        that reaches the shell answers a challenge already answered: retries cross)."""
        return isinstance(event, ChallengeDue) or freshness.kind_of(event.body) in (
            freshness.KIND_CHALLENGE,
            freshness.KIND_ECHO,
        )

    async def answer(self, event: ChallengeDue | ControlReceived, send: Any, peer: Any, now: float) -> None:
        """Send our challenge, or our echo to the peer's, with ``send(packets, address, now)``:
        to where the packet came from (a learned ``peer`` may not be proven yet)."""
        packet, destination = self.packet_for(event, now), event.address or peer
        if packet is not None and destination is not None:
            await send([packet], destination, now)

    def packet_for(self, event: ChallengeDue | ControlReceived, now: float) -> bytes | None:
        """The sealed control packet answering ``event`` (our challenge, or our echo to the
        peer's challenge), or None (unkeyed, not a challenge, over the rate)."""
        sealer = self.encoder.sealer
        if sealer is None:
            return None
        body: bytes | None = event.body
        if isinstance(event, ControlReceived):
            if freshness.kind_of(event.body) != freshness.KIND_CHALLENGE:
                return None
            self.note(now)
            assert self._sequences is not None  # made by note(): the sealer is set
            body = self.echoes.answer(event.body, self.encoder.session, self._sequences, sealer.next_sequence, now)
        return self.encoder.control(body) if body is not None else None

    async def hellos(self, send: Any, peer: Any) -> None:
        """Keyed, with a known peer address: a few hellos at start, so the peer's session is
        proven before its first reply.  ``send(packets, address, now)``; ``peer()`` the address."""
        gate = self.decoder.freshness
        while self.encoder.sealer is not None and peer() is not None:
            now = trio.current_time()
            body = gate.hello(now)
            if body is not None:
                await send([self.encoder.control(body)], peer(), now)
            deadline = gate.hello_deadline()
            if deadline is None:
                return
            await trio.sleep_until(deadline)
