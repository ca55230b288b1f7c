"""Sans-IO in-order delivery: each flow's datagrams leave in the order the sender took them.

The decoder delivers a source datagram the moment it arrives and a rebuilt one when its block
completes, i.e. after the datagrams that followed it.  Raw MPEG-TS over UDP, many telemetry and
serial-over-UDP protocols cannot take that: their receivers see a late datagram as a second
discontinuity and throw it away.  :class:`InOrderDelivery` sits between the decoder's deliveries
and the application: a datagram after a gap waits until the gap is filled (rebuilt), until the
caller says the blocks that could hold the gap are given up (:meth:`give_up_before`), or until
it has waited ``max_wait`` — then the gap is skipped and counted, and what waited is released in
order.  Nothing is delivered twice, nothing waits beyond ``max_wait`` and nothing is reordered
within a flow: a datagram that comes after its place was skipped is dropped and counted
(``order_late``).

Order comes from the per-flow sequence number the sender stamps in every source packet and
inside every source symbol (``wire``: 16 bits, serial-number arithmetic after RFC 1982 §3.1), so
it holds across size classes, interleaved blocks and rebuilt datagrams alike.  A flow is known by
its sender session and flow id together: a restarted sender numbers its flows from 0 again, and
its datagrams come (the decoder delivers a new session's at once) while the old session's may
still wait; :meth:`reset` then lets the old sessions' flows go.

Memory is bounded: at most ``WINDOW`` sequence numbers ahead of a flow's next one are held (a
datagram further ahead moves the flow's front to itself, skipping what is missing), at most
``max_held_bytes`` across all flows (beyond, the flow that has waited longest skips its gap), and
at most ``max_flows`` flows are tracked (the one first seen longest ago goes; its next datagram starts it
afresh).

Like the decoder: values and ``now`` in, deliveries and the next deadline out; no clock, no I/O.
"""

from __future__ import annotations

from bisect import bisect_left
from dataclasses import dataclass, field
from enum import StrEnum

from fecproxy.protocol.events import Delivery, DropReason
from fecproxy.protocol.wire import FLOW_ID_BITS, SEQUENCE_MODULUS

#: How long a datagram after a gap may wait for the gap to be rebuilt.  A gap is rebuilt when its
#: block completes: at most the sender's flush interval after the gap (20 ms by default, more
#: with interleaving, which stretches a block over D times as many datagrams) plus the link's
#: delay spread.  200 ms covers the default flush with 8 lanes of interleaving and a radio link's
#: jitter while staying far below a video player's usual buffer (common practice, no source).
DEFAULT_MAX_WAIT = 0.200
#: The longest bound accepted: waiting longer than the decoder keeps a block open gains nothing,
#: and the decoder's hold time is at most seconds (config caps it).  Our own bound.
MAX_MAX_WAIT = 10.0
#: Sequence numbers held ahead of a flow's next one.  4096 datagrams is 4 s of a 1 000
#: datagrams/s flow and 80 ms of a 50 000/s one, both longer than any bound in use, and far below
#: half the 16-bit sequence space (32 768), so "ahead" and "behind" are never confused
#: (RFC 1982 §3.2).  Our own bound.
WINDOW = 4096
#: A sequence number up to this far behind the next one is a late datagram (its place in the
#: order was skipped); further behind, the flow is taken to have started again (a restarted
#: sender counts from 0) and is followed afresh.  Equal to the window: the front never moves
#: further than that past a datagram that could still arrive.
LATE_WINDOW = WINDOW
#: Bytes held across all flows.  8 MiB holds 200 ms of a 300 Mbit/s stream of 1400-byte
#: datagrams with every gap open at once, which is more than the decoder itself keeps (its
#: default budget is 16 MiB for whole blocks).  Our own bound.
DEFAULT_MAX_HELD_BYTES = 8 * 1024 * 1024
#: What one held datagram costs beyond its payload: the Delivery, its dict slot and the tuple
#: (measured with sys.getsizeof, rounded up).
HELD_OVERHEAD_BYTES = 200
#: Flows followed at once: the flow table's own upper bound (config ``flows.max`` ≤ 65 536) would
#: cost ~150 bytes each; 65 536 flows is ~10 MB.  Beyond it the one first seen longest ago goes.
DEFAULT_MAX_FLOWS = 65536
#: Upper bounds (seconds) of the added-wait histogram buckets; the last bucket is +Inf.  Zero is
#: its own bucket, so "no added wait" is read exactly; then 1 ms to 10 s, 1-2-5 steps.
WAIT_BUCKETS: tuple[float, ...] = (
    0.0,
    0.001,
    0.002,
    0.005,
    0.010,
    0.020,
    0.050,
    0.100,
    0.200,
    0.500,
    1.0,
    2.0,
    5.0,
    10.0,
)

#: Flows whose next sequence number a sender remembers: twice the 65 536 slots of the wire's flow
#: id, so every live flow (at most one per slot) and its slot's previous generations fit; the
#: least recently used beyond that is long over (~100 bytes each, ~13 MB at worst).
MAX_SEQUENCE_FLOWS = 1 << 17

_HALF = SEQUENCE_MODULUS // 2
_MASK = SEQUENCE_MODULUS - 1


class FlowSequencer:
    """The sender's side: each flow's datagrams counted from 0 in the order it takes them.

    ``counts`` maps flow -> next number, least recently used first (each use moves the flow to
    the end), so the table is cut from the front at MAX_SEQUENCE_FLOWS.  The block encoder's hot
    loop inlines :meth:`next` on ``counts``; both must stay the same rule."""

    __slots__ = ("counts",)

    def __init__(self) -> None:
        self.counts: dict[int, int] = {}

    def next(self, flow: int) -> int:
        counts = self.counts
        seq = counts.pop(flow, -1)
        if seq < 0:
            seq = 0
            if len(counts) >= MAX_SEQUENCE_FLOWS:
                del counts[next(iter(counts))]
        counts[flow] = (seq + 1) & _MASK
        return seq


class SkipReason(StrEnum):
    """Why a gap was skipped; each is a label of the gaps-skipped counter."""

    MAX_WAIT = "max_wait"  # a datagram after it had waited delivery.max_wait_ms
    GIVEN_UP = "given_up"  # the decoder gave up every block that could hold it
    WINDOW = "window"  # a datagram more than WINDOW ahead pushed the front
    MEMORY = "memory"  # the byte budget was full: the longest waiter's flow moved on
    CLOSED = "closed"  # shutdown or a new sender session: everything held was released


@dataclass
class OrderStats:
    """Counters, plain ints read by the metrics collector."""

    held: int = 0  # datagrams that had to wait behind a gap
    late: int = 0  # dropped: came after their place in the order was skipped
    duplicates: int = 0  # dropped: a second datagram with a sequence number already waiting
    restarts: int = 0  # a flow's sequence jumped far behind: followed afresh
    skipped: dict[str, int] = field(default_factory=lambda: dict.fromkeys(SkipReason, 0))
    held_bytes: int = 0  # now
    held_datagrams: int = 0  # now
    #: Added wait: count per WAIT_BUCKETS bucket (not cumulative; one more for +Inf) and the sum.
    wait_counts: list[int] = field(default_factory=lambda: [0] * (len(WAIT_BUCKETS) + 1))
    wait_sum: float = 0.0

    @property
    def released(self) -> int:
        """Datagrams handed on (each counted once in the wait histogram)."""
        return sum(self.wait_counts)

    @property
    def gaps_skipped(self) -> int:
        return sum(self.skipped.values())

    @property
    def dropped(self) -> dict[str, int]:
        """The datagrams this stage dropped, by drop reason (the daemon's drop counters)."""
        return {DropReason.ORDER_LATE: self.late, DropReason.DUPLICATE: self.duplicates}


class _Flow:
    __slots__ = ("id", "next", "held")

    def __init__(self, flow: int, next_seq: int):
        self.id = flow
        self.next = next_seq
        # seq -> (arrival time, delivery); insertion order is arrival order, so the first entry
        # is the one that has waited longest.
        self.held: dict[int, tuple[float, Delivery]] = {}


class InOrderDelivery:
    """Per-flow reordering of the decoder's deliveries; see the module docstring."""

    def __init__(
        self,
        max_wait: float = DEFAULT_MAX_WAIT,
        *,
        max_held_bytes: int = DEFAULT_MAX_HELD_BYTES,
        max_flows: int = DEFAULT_MAX_FLOWS,
    ):
        if not 0 < max_wait <= MAX_MAX_WAIT:
            raise ValueError(f"max_wait must be in (0, {MAX_MAX_WAIT}] seconds, got {max_wait}")
        if max_held_bytes < 1 or max_flows < 1:
            raise ValueError("max_held_bytes and max_flows must be ≥ 1")
        self.max_wait = max_wait
        self.max_held_bytes = max_held_bytes
        self.max_flows = max_flows
        self.stats = OrderStats()
        self._zero_waits = self.stats.wait_counts  # bucket 0 counts the datagrams that did not wait
        # Insertion order: beyond max_flows the flow first seen longest ago goes (a use does not
        # move it: that would cost every datagram; a live flow so pushed out starts afresh).
        self._flows: dict[int, _Flow] = {}
        self._waiting: dict[int, _Flow] = {}  # flows holding something
        self._evicted: list[Delivery] = []  # released by a flow pushed out of the table
        #: After a reset for a session joined mid-stream: until then, a new flow starts at its
        #: first datagram (the ones before it went to whoever listened before us).
        self._joined_until = -1.0

    # ------------------------------------------------------------------ feeding
    def push(self, delivery: Delivery, now: float) -> list[Delivery]:
        """One delivery from the decoder; returns what may go to the application now, in order."""
        flow_id = delivery.session << FLOW_ID_BITS | delivery.flow  # each sender session's flows apart
        seq = delivery.seq
        state = self._flows.get(flow_id)
        if state is not None and seq == state.next and not state.held:
            # The common case, first and cheapest: in order, nothing waiting, no added wait.
            state.next = (seq + 1) & _MASK
            self._zero_waits[0] += 1
            return [delivery]
        if state is None:
            # A new flow: the sender counts each flow from 0, so a first datagram a little way
            # in means the first ones are missing (and may still be rebuilt); far in, we joined
            # an established flow and start from it, as we do with every flow that shows up
            # within max_wait of joining a session already under way (see reset).
            state = self._new_flow(flow_id, 0 if seq < WINDOW and now >= self._joined_until else seq, now)
            if self._evicted:
                out_evicted, self._evicted = self._evicted, []
                return out_evicted + self.push(delivery, now)
        ahead = (seq - state.next) & _MASK
        out: list[Delivery] = []
        if ahead >= _HALF:
            if SEQUENCE_MODULUS - ahead <= LATE_WINDOW:
                self.stats.late += 1
                return out
            # Far behind: the sender started the flow again.  What waited goes first.
            self.stats.restarts += 1
            self._release_all(state, now, SkipReason.CLOSED, out)
            state.next = seq
            ahead = 0
        elif ahead >= WINDOW:
            # Beyond the window: a long outage or a restarted flow.  Waiting cannot bring back
            # that much; what waited goes, the rest is skipped, and this one leads.
            self._advance_to(state, seq, now, SkipReason.WINDOW, out)
            ahead = 0
        if ahead == 0:
            state.next = (seq + 1) & _MASK
            self._count_release(0.0)
            out.append(delivery)
            self._release_run(state, now, out)
        elif seq in state.held:
            self.stats.duplicates += 1  # the decoder delivers once; a forged or replayed copy, counted
        else:
            if not state.held:
                self._waiting[flow_id] = state
            state.held[seq] = (now, delivery)
            cost = len(delivery.data) + HELD_OVERHEAD_BYTES
            stats = self.stats
            stats.held += 1
            stats.held_datagrams += 1
            stats.held_bytes += cost
            if stats.held_bytes > self.max_held_bytes:
                self._shed(now, out)
        return out

    def next_deadline(self) -> float | None:
        """When ``on_timer`` must run next: the longest waiter's bound; None if nothing waits."""
        if not self._waiting:
            return None
        return min(next(iter(state.held.values()))[0] for state in self._waiting.values()) + self.max_wait

    def on_timer(self, now: float) -> list[Delivery]:
        """Skip the gaps in front of every datagram that has waited ``max_wait``."""
        out: list[Delivery] = []
        wait = self.max_wait
        for state in list(self._waiting.values()):
            while state.held:
                arrived, oldest = next(iter(state.held.values()))
                if arrived + wait > now:  # the same sum as next_deadline: no rounding between them
                    break
                self._advance_to(state, oldest.seq, now, SkipReason.MAX_WAIT, out)
                self._release_run(state, now, out)
        return out

    def give_up_before(self, since: float | None, now: float) -> list[Delivery]:
        """The decoder has no open block first seen at or before ``since`` (None: no open block at
        all), so a gap whose first waiter arrived before that can no longer be rebuilt: each
        such gap is skipped and what waited behind it released.  Our approximation (documented in
        docs/design.md): a datagram's block is seen by the time its successors arrive."""
        out: list[Delivery] = []
        for state in list(self._waiting.values()):
            while state.held:
                arrived, oldest = next(iter(state.held.values()))
                if since is not None and arrived >= since:
                    break
                self._advance_to(state, oldest.seq, now, SkipReason.GIVEN_UP, out)
                self._release_run(state, now, out)
        return out

    def close(self, now: float) -> list[Delivery]:
        """Release everything held, in order per flow (shutdown, or the sender restarted)."""
        out: list[Delivery] = []
        for state in list(self._waiting.values()):
            self._release_all(state, now, SkipReason.CLOSED, out)
        return out

    def reset(self, now: float, keep: int | None = None, *, joined: bool = False) -> list[Delivery]:
        """The peer's sender restarted: release what waits and forget the flows of every session
        but ``keep`` (the new one, whose flows may already have begun).

        ``joined``: the new session was under way before we heard it (this receiver restarted),
        so the flows that show up within ``max_wait`` are taken from their first datagram:
        waiting for the ones before it would hold them ``max_wait`` and count thousands of gaps
        that are no loss (an earlier process delivered them)."""
        out: list[Delivery] = []
        for key, state in list(self._flows.items()):
            if keep is not None and key >> FLOW_ID_BITS == keep:
                continue
            self._release_all(state, now, SkipReason.CLOSED, out)
            del self._flows[key]
        self._joined_until = now + self.max_wait if joined else -1.0
        return out

    # ------------------------------------------------------------------ internals
    def _new_flow(self, flow_id: int, next_seq: int, now: float) -> _Flow:
        flows = self._flows
        if len(flows) >= self.max_flows:
            gone = flows.pop(next(iter(flows)))
            self._release_all(gone, now, SkipReason.CLOSED, self._evicted)  # what it held goes on
        state = flows[flow_id] = _Flow(flow_id, next_seq)
        return state

    def _count_release(self, wait: float) -> None:
        stats = self.stats
        stats.wait_sum += wait
        stats.wait_counts[bisect_left(WAIT_BUCKETS, wait)] += 1

    def _take(self, state: _Flow, seq: int, now: float, out: list[Delivery]) -> None:
        arrived, delivery = state.held.pop(seq)
        stats = self.stats
        stats.held_datagrams -= 1
        stats.held_bytes -= len(delivery.data) + HELD_OVERHEAD_BYTES
        self._count_release(now - arrived)
        out.append(delivery)

    def _release_run(self, state: _Flow, now: float, out: list[Delivery]) -> None:
        """Release the held datagrams that now follow the front without a gap."""
        held = state.held
        seq = state.next
        while seq in held:
            self._take(state, seq, now, out)
            seq = (seq + 1) & _MASK
        state.next = seq
        if not held:
            self._waiting.pop(state.id, None)

    def _advance_to(self, state: _Flow, target: int, now: float, reason: SkipReason, out: list[Delivery]) -> None:
        """Move the front to ``target``: held datagrams before it are released in order, missing
        sequence numbers are skipped (each counted once)."""
        skipped = 0
        seq = state.next
        held = state.held
        while seq != target:
            if seq in held:
                self._take(state, seq, now, out)
            else:
                skipped += 1
            seq = (seq + 1) & _MASK
        state.next = target
        self.stats.skipped[reason] += skipped
        if not held:
            self._waiting.pop(state.id, None)

    def _release_all(self, state: _Flow, now: float, reason: SkipReason, out: list[Delivery]) -> None:
        """Release every held datagram in order, skipping the gaps."""
        held = state.held
        if not held:
            return
        last = max(held, key=lambda s: (s - state.next) & _MASK)
        target = (last + 1) & _MASK
        skipped = 0
        seq = state.next
        while seq != target:
            if seq in held:
                self._take(state, seq, now, out)
            else:
                skipped += 1
            seq = (seq + 1) & _MASK
        state.next = target
        self.stats.skipped[reason] += skipped
        self._waiting.pop(state.id, None)

    def _shed(self, now: float, out: list[Delivery]) -> None:
        """Over the byte budget: the flows whose datagrams waited longest skip their gaps."""
        while self.stats.held_bytes > self.max_held_bytes and self._waiting:
            state = min(self._waiting.values(), key=lambda s: next(iter(s.held.values()))[0])
            oldest = next(iter(state.held.values()))[1]
            self._advance_to(state, oldest.seq, now, SkipReason.MEMORY, out)
            self._release_run(state, now, out)
