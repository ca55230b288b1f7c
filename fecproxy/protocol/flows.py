"""Flow tables: which application conversation a flow id stands for — bounded, expiring, recycled.

The sender gives every application client address a flow; the receiver keeps, per flow, the
upstream socket it opened towards the application server, so replies find their way back.  Pure
bookkeeping with ``now`` passed in: the shell owns the sockets.

The rules (docs/design.md, "Flow identifiers"):

* Directions.  A *request* travels from the side that opened the flow (the application client on
  the sender, the link on the receiver); a *reply* travels back.
* Two tiers.  A flow is in its *first exchange* from its first request until a request follows a
  reply; from then on it is *established*.  First-exchange flows (no reply yet, or replies to the
  first request only) expire after the short timeout, established ones after the long one, as
  stateful firewalls keep UDP (common practice, no source).  The short timeout never exceeds the
  long one: the smaller of the two applies.
* Recycling.  A full table never refuses a new client while it can recycle: a flow already past
  its timeout goes first (closed as expired); otherwise the least recently active flow is evicted
  (counted) — unless even that one was active within the protected interval, in which case every
  flow was, and the new client is refused (the caller counts ``flow_limit``).
* Identifiers.  A flow id is a 16-bit slot and an 8-bit generation, packed as
  ``slot << 8 | generation``.  The sender hands out free slots least recently freed first, and a
  slot given to a new client gets the next generation; the receiver takes a newer generation on a
  known slot as a new conversation and an older one as a late datagram of a finished one.

Each table keeps its flows in two dicts ordered by last activity, one per tier: expiry, eviction
and ``next_deadline`` look only at the two fronts, so every operation is O(1) per packet.
"""

from __future__ import annotations

import enum
import math
from collections import OrderedDict, deque
from collections.abc import Hashable
from dataclasses import dataclass
from typing import Generic, TypeVar

from fecproxy.protocol.wire import GENERATION_BITS, SLOT_BITS

# --------------------------------------------------------------------------------------------
# Flow identifiers
# --------------------------------------------------------------------------------------------

# A slot is SLOT_BITS = 16 bits of the 24-bit flow id of wire format version 2 (the layout's home
# is fecproxy.protocol.wire): thousands of concurrent clients, where the one-byte flow id of the
# RFC 6363 §4 source symbol stops at 256.
FLOW_SLOTS = 1 << SLOT_BITS
# A generation is GENERATION_BITS = 8 bits: it tells a slot's new client from its previous one.
# A receiver judges old against new by serial-number arithmetic (half the space ahead is newer), so
# it needs only that fewer than 128 conversations of one slot pass unseen while it still holds it.
GENERATIONS = 1 << GENERATION_BITS
_GENERATION_MASK = GENERATIONS - 1
_HALF_GENERATIONS = GENERATIONS // 2


def flow_id(slot: int, generation: int) -> int:
    """The packed identifier the wire carries: ``slot << GENERATION_BITS | generation``."""
    return slot << GENERATION_BITS | generation


def slot_of(flow: int) -> int:
    return flow >> GENERATION_BITS


def generation_of(flow: int) -> int:
    return flow & _GENERATION_MASK


def is_newer_generation(candidate: int, current: int) -> bool:
    """Serial-number order modulo 256: 1..127 ahead is newer; 0 and 128..255 ahead are not."""
    return 0 < (candidate - current) & _GENERATION_MASK < _HALF_GENERATIONS


# --------------------------------------------------------------------------------------------
# Results
# --------------------------------------------------------------------------------------------


class CloseReason(enum.StrEnum):
    EXPIRED = "expired"  # idle past its tier's timeout
    EVICTED = "evicted"  # the least recently active flow, recycled for a new client
    REPLACED = "replaced"  # receiver: the sender gave the slot to a new client
    PEER_RESTARTED = "peer_restarted"  # receiver: the sender started a new session
    REMOVED = "removed"  # the caller removed it (e.g. its upstream socket failed)


@dataclass(frozen=True, slots=True)
class FlowClosed:
    """A conversation that ended; the receiver's shell closes its upstream socket."""

    flow: int  # packed slot and generation
    reason: CloseReason
    client: object = None  # sender: the client address it belonged to

    @property
    def slot(self) -> int:
        return self.flow >> GENERATION_BITS


@dataclass(frozen=True, slots=True)
class Opened:
    """Receiver: a new conversation on ``flow`` — open a fresh upstream socket for it, after
    closing the sockets of ``closed`` (a replaced generation of the same slot, or a flow
    recycled to make room)."""

    flow: int
    closed: tuple[FlowClosed, ...] = ()


class Verdict(enum.Enum):
    """Receiver: what to do with a datagram of a flow that needs no new socket."""

    CURRENT = "current"  # the conversation the slot holds now: use its upstream socket
    STALE = "stale"  # an older generation: a late datagram of a finished conversation; drop it
    REFUSED = "refused"  # new, but full and every flow active within the protected interval


@dataclass(slots=True)
class FlowStats:
    """Counters the shell exports (``fecproxy_flows_evicted_total`` is ``evicted``)."""

    expired: int = 0
    evicted: int = 0
    replaced: int = 0


# --------------------------------------------------------------------------------------------
# The two tiers, shared by both tables
# --------------------------------------------------------------------------------------------

# States of a flow, and the state after a request or a reply, looked up by the current state.
_FIRST_REQUEST, _ANSWERED, _ESTABLISHED = 0, 1, 2
_AFTER_REQUEST = (_FIRST_REQUEST, _ESTABLISHED, _ESTABLISHED)
_AFTER_REPLY = (_ANSWERED, _ANSWERED, _ESTABLISHED)


def _check_settings(
    max_flows: int, limit: int, first_exchange_timeout: float, idle_timeout: float, protect: float
) -> None:
    if not 1 <= max_flows <= limit:
        raise ValueError(f"max_flows must be 1..{limit}, got {max_flows}")
    if not first_exchange_timeout > 0 or not idle_timeout > 0:
        raise ValueError(f"timeouts must be positive, got {first_exchange_timeout} and {idle_timeout}")
    if not protect >= 0:
        raise ValueError(f"protect must be ≥ 0, got {protect}")


class _Tiers:
    """Per-slot activity in two tiers, each least recently active first; the recycling rule.

    ``now`` must not go backwards (the shell's clock is monotonic); an earlier ``now`` is taken
    as the latest one seen, so the tiers stay in order whatever the caller does.
    """

    def __init__(self, max_flows: int, first_exchange_timeout: float, idle_timeout: float, protect: float):
        self.max_flows = max_flows
        #: Idle timeout of flows still in their first exchange (capped by ``idle_timeout``).
        self.first_exchange_timeout = first_exchange_timeout
        #: Idle timeout of established flows.
        self.idle_timeout = idle_timeout
        #: A flow active within this many seconds is never evicted.
        self.protect = protect
        self.stats = FlowStats()
        self._last: dict[int, float] = {}
        self._state: dict[int, int] = {}
        self._first: OrderedDict[int, None] = OrderedDict()
        self._established: OrderedDict[int, None] = OrderedDict()
        self._clock = -math.inf

    def __len__(self) -> int:
        return len(self._state)

    @property
    def short_timeout(self) -> float:
        """The timeout that applies to first-exchange flows."""
        return min(self.first_exchange_timeout, self.idle_timeout)

    def next_deadline(self) -> float | None:
        first = self._first_deadline()
        established = self._established_deadline()
        if first is None:
            return established
        if established is None or first <= established:
            return first
        return established

    def expire(self, now: float) -> list[FlowClosed]:
        """End every flow idle past its tier's timeout, earliest deadline first."""
        closed = []
        while (slot := self._next_due(now)) is not None:
            closed.append(self._end(slot, CloseReason.EXPIRED))
        return closed

    def is_established(self, flow: int) -> bool:
        """Whether ``flow`` is held now and past its first exchange."""
        return self.flow_in(flow >> GENERATION_BITS) == flow and self._state[flow >> GENERATION_BITS] == _ESTABLISHED

    def flow_in(self, slot: int) -> int | None:  # pragma: no cover - abstract
        raise NotImplementedError

    # ------------------------------------------------------------ for the tables

    def _now(self, now: float) -> float:
        if now < self._clock:
            return self._clock
        self._clock = now
        return now

    def _add(self, slot: int, now: float) -> None:
        self._last[slot] = self._now(now)
        self._state[slot] = _FIRST_REQUEST
        self._first[slot] = None

    def _activity(self, slot: int, now: float, after: tuple[int, int, int] | None) -> None:
        """A datagram on ``slot``: ``after`` is _AFTER_REQUEST, _AFTER_REPLY, or None when the
        direction is unknown (the timer restarts, the state stays)."""
        self._last[slot] = self._now(now)
        state = self._state[slot]
        new = state if after is None else after[state]
        if new != _ESTABLISHED:
            self._state[slot] = new
            self._first.move_to_end(slot)
        elif state == _ESTABLISHED:
            self._established.move_to_end(slot)
        else:
            self._state[slot] = new
            del self._first[slot]
            self._established[slot] = None

    def _first_deadline(self) -> float | None:
        if not self._first:
            return None
        return self._last[next(iter(self._first))] + self.short_timeout

    def _established_deadline(self) -> float | None:
        if not self._established:
            return None
        return self._last[next(iter(self._established))] + self.idle_timeout

    def _next_due(self, now: float) -> int | None:
        """The front flow with the earliest deadline, if that deadline has passed (a tie goes to
        the first-exchange flow)."""
        first = self._first_deadline()
        established = self._established_deadline()
        if first is not None and first <= now and (established is None or first <= established):
            return next(iter(self._first))
        if established is not None and established <= now:
            return next(iter(self._established))
        return None

    def _least_recent(self) -> int:
        """The least recently active flow (a tie goes to the first-exchange flow)."""
        if not self._established:
            return next(iter(self._first))
        oldest = next(iter(self._established))
        if self._first:
            first = next(iter(self._first))
            if self._last[first] <= self._last[oldest]:
                return first
        return oldest

    def _recycle(self, now: float) -> FlowClosed | None:
        """Make room in a full table: a flow past its timeout, else the least recently active
        one unless it is protected.  None: every flow is protected."""
        slot = self._next_due(now)
        if slot is not None:
            return self._end(slot, CloseReason.EXPIRED)
        slot = self._least_recent()
        if now - self._last[slot] < self.protect:
            return None
        return self._end(slot, CloseReason.EVICTED)

    def _end(self, slot: int, reason: CloseReason) -> FlowClosed:
        del self._last[slot]
        if self._state.pop(slot) == _ESTABLISHED:
            del self._established[slot]
        else:
            del self._first[slot]
        if reason is CloseReason.EXPIRED:
            self.stats.expired += 1
        elif reason is CloseReason.EVICTED:
            self.stats.evicted += 1
        elif reason is CloseReason.REPLACED:
            self.stats.replaced += 1
        return self._release(slot, reason)

    def _release(self, slot: int, reason: CloseReason) -> FlowClosed:  # pragma: no cover - abstract
        raise NotImplementedError

    def _slots_least_recent_first(self) -> list[int]:
        return sorted(self._last, key=self._last.__getitem__)


K = TypeVar("K", bound=Hashable)


class ClientFlowTable(_Tiers, Generic[K]):
    """Sender: application client addresses -> flow ids (slot and generation).

    ``slots`` is the slot space handed out from; free slots go least recently freed first, so a
    slot rests while every other free one is used, and each time a slot is given to a new client
    its generation steps by one (modulo 256).
    """

    def __init__(
        self,
        max_flows: int,
        *,
        first_exchange_timeout: float,
        idle_timeout: float,
        protect: float,
        slots: int = FLOW_SLOTS,
    ):
        if not 1 <= slots <= FLOW_SLOTS:
            raise ValueError(f"slots must be 1..{FLOW_SLOTS}, got {slots}")
        _check_settings(max_flows, slots, first_exchange_timeout, idle_timeout, protect)
        super().__init__(max_flows, first_exchange_timeout, idle_timeout, protect)
        self.slots = slots
        self._flow_of: dict[K, int] = {}
        self._client_at: dict[int, K] = {}
        self._next_generation = bytearray(slots)
        self._free: deque[int] = deque(range(slots))

    def request(self, client: K, now: float) -> int | None:
        """The flow of a datagram from ``client``, opened (recycling if full) when new.

        None: full and every flow protected — the caller counts a ``flow_limit`` drop.
        """
        flow = self._flow_of.get(client)
        if flow is not None:
            self._activity(flow >> GENERATION_BITS, now, _AFTER_REQUEST)
            return flow
        if len(self._flow_of) >= self.max_flows and self._recycle(now) is None:
            return None
        slot = self._free.popleft()
        generation = self._next_generation[slot]
        self._next_generation[slot] = (generation + 1) & _GENERATION_MASK
        flow = slot << GENERATION_BITS | generation
        self._flow_of[client] = flow
        self._client_at[slot] = client
        self._add(slot, now)
        return flow

    def reply(self, flow: int, now: float) -> K | None:
        """The client a reply on ``flow`` goes to; None when that conversation is over (the slot
        is free or holds another generation): the caller counts ``unknown_flow``."""
        slot = flow >> GENERATION_BITS
        client = self._client_at.get(slot)
        if client is None or self._flow_of[client] != flow:
            return None
        self._activity(slot, now, _AFTER_REPLY)
        return client

    def client_of(self, flow: int) -> K | None:
        client = self._client_at.get(flow >> GENERATION_BITS)
        if client is None or self._flow_of[client] != flow:
            return None
        return client

    def flow_of(self, client: K) -> int | None:
        return self._flow_of.get(client)

    def flow_in(self, slot: int) -> int | None:
        """The flow the slot holds now, if any."""
        client = self._client_at.get(slot)
        return None if client is None else self._flow_of[client]

    def remove(self, flow: int) -> FlowClosed | None:
        if self.client_of(flow) is None:
            return None
        return self._end(flow >> GENERATION_BITS, CloseReason.REMOVED)

    def _release(self, slot: int, reason: CloseReason) -> FlowClosed:
        client = self._client_at.pop(slot)
        flow = self._flow_of.pop(client)
        self._free.append(slot)
        return FlowClosed(flow, reason, client)


#: The receiver takes a newer generation on a slot only when the slot's conversation has been
#: quiet here for this share of ``protect``: the sender recycles only conversations quiet for
#: ``protect`` by its own clock, and the receiver sees that quiet start up to one link delay
#: late; half of the default 2 s leaves a full second for delay spread (common practice, no
#: source).  ``protect`` 0 (the sender recycles anything) turns the check off.
REPLACE_AFTER_PROTECT_FRACTION = 0.5


class PeerFlowTable(_Tiers):
    """Receiver: the sender's flow ids -> the conversation each slot holds now.

    One upstream socket per conversation (the shell's): a new generation on a known slot, or a
    slot not held, is a new conversation; an older generation is a late datagram of an old one.
    """

    def __init__(self, max_flows: int, *, first_exchange_timeout: float, idle_timeout: float, protect: float):
        _check_settings(max_flows, FLOW_SLOTS, first_exchange_timeout, idle_timeout, protect)
        super().__init__(max_flows, first_exchange_timeout, idle_timeout, protect)
        self._flow_at: dict[int, int] = {}

    def request(self, flow: int, now: float) -> Verdict | Opened:
        """A datagram from the link on ``flow``: Verdict.CURRENT (use the slot's socket),
        Verdict.STALE (drop), Verdict.REFUSED (drop, ``flow_limit``), or Opened."""
        slot = flow >> GENERATION_BITS
        current = self._flow_at.get(slot)
        if current == flow:
            self._activity(slot, now, _AFTER_REQUEST)
            return Verdict.CURRENT
        if current is not None:
            if not is_newer_generation(flow & _GENERATION_MASK, current & _GENERATION_MASK):
                return Verdict.STALE
            if now - self._last[slot] < self.protect * REPLACE_AFTER_PROTECT_FRACTION:
                # The sender gives a slot to a new client only once its conversation has been
                # quiet for `protect`: a newer generation on a conversation still active here is
                # a damaged or forged flow id, and must not end the real conversation.
                return Verdict.STALE
            closed: tuple[FlowClosed, ...] = (self._end(slot, CloseReason.REPLACED),)
        elif len(self._flow_at) >= self.max_flows:
            victim = self._recycle(now)
            if victim is None:
                return Verdict.REFUSED
            closed = (victim,)
        else:
            closed = ()
        self._flow_at[slot] = flow
        self._add(slot, now)
        return Opened(flow, closed)

    def reply(self, flow: int, now: float) -> bool:
        """A reply from ``flow``'s upstream socket: False when that conversation is over."""
        slot = flow >> GENERATION_BITS
        if self._flow_at.get(slot) != flow:
            return False
        self._activity(slot, now, _AFTER_REPLY)
        return True

    def flow_in(self, slot: int) -> int | None:
        """The flow the slot holds now, if any."""
        return self._flow_at.get(slot)

    def __contains__(self, flow: int) -> bool:
        return self._flow_at.get(flow >> GENERATION_BITS) == flow

    def remove(self, flow: int) -> FlowClosed | None:
        if flow not in self:
            return None
        return self._end(flow >> GENERATION_BITS, CloseReason.REMOVED)

    def clear(self) -> list[FlowClosed]:
        """The sender restarted (a new session): its slots and generations start afresh, so
        every conversation ends, least recently active first."""
        return [self._end(slot, CloseReason.PEER_RESTARTED) for slot in self._slots_least_recent_first()]

    def _release(self, slot: int, reason: CloseReason) -> FlowClosed:
        return FlowClosed(self._flow_at.pop(slot), reason)
