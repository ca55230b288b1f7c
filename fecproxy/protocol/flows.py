"""Flow table: which application conversation a flow id stands for, bounded and expiring.

The sender gives every distinct application client address a one-byte flow id (the flow id of
the RFC 6363 §4 source symbol); the receiver keeps, per flow id, the upstream socket it opened
towards the application server, so replies find their way back.  Pure bookkeeping with ``now``
passed in: the shell owns the sockets.
"""

from __future__ import annotations

from collections import OrderedDict
from collections.abc import Hashable
from typing import Generic, TypeVar

from fecproxy.protocol.wire import MAX_FLOW_IDS

K = TypeVar("K", bound=Hashable)


class FlowTable(Generic[K]):
    """Maps keys (client addresses, or flow ids themselves) to flow ids with idle expiry.

    Entries are kept in least-recently-used order, so expiry and ``next_deadline`` look only at
    the front: O(1) per packet.
    """

    def __init__(self, max_flows: int, idle_timeout: float):
        if not 1 <= max_flows <= MAX_FLOW_IDS:
            raise ValueError(f"max_flows must be 1..{MAX_FLOW_IDS}, got {max_flows}")
        self.max_flows = max_flows
        self.idle_timeout = idle_timeout
        self._by_key: OrderedDict[K, int] = OrderedDict()
        self._by_flow: dict[int, K] = {}
        self._last_used: dict[int, float] = {}
        self._free = list(range(max_flows - 1, -1, -1))  # pop() hands out the lowest id first

    def __len__(self) -> int:
        return len(self._by_key)

    def flow_for(self, key: K, now: float, *, flow: int | None = None) -> int | None:
        """The flow of ``key``, opened if new (with the given id, or the lowest free one).

        None when the table is full, or the given id is taken by another key: the caller
        counts a ``flow_limit`` drop.
        """
        existing = self._by_key.get(key)
        if existing is not None:
            self._by_key.move_to_end(key)
            self._last_used[existing] = now
            return existing
        if len(self._by_key) >= self.max_flows:
            return None  # full, however the ids were chosen (explicit ones may be ≥ max_flows)
        if flow is None:
            if not self._free:
                return None
            flow = self._free.pop()
        else:
            if flow in self._by_flow or not 0 <= flow < MAX_FLOW_IDS:
                return None
            if flow in self._free:
                self._free.remove(flow)
        self._by_key[key] = flow
        self._by_flow[flow] = key
        self._last_used[flow] = now
        return flow

    def key_for(self, flow: int) -> K | None:
        return self._by_flow.get(flow)

    def touch(self, flow: int, now: float) -> None:
        key = self._by_flow.get(flow)
        if key is not None:
            self._by_key.move_to_end(key)
            self._last_used[flow] = now

    def next_deadline(self) -> float | None:
        if not self._by_key:
            return None
        oldest = next(iter(self._by_key.values()))
        return self._last_used[oldest] + self.idle_timeout

    def expire(self, now: float) -> list[tuple[int, K]]:
        """Remove flows idle for the timeout; returns (flow, key) of each, oldest first."""
        gone: list[tuple[int, K]] = []
        while self._by_key:
            key, flow = next(iter(self._by_key.items()))
            if self._last_used[flow] + self.idle_timeout > now:
                break
            gone.append((flow, key))
            self.remove(flow)
        return gone

    def remove(self, flow: int) -> None:
        key = self._by_flow.pop(flow, None)
        if key is None:
            return
        del self._by_key[key]
        del self._last_used[flow]
        if flow < self.max_flows:
            self._free.append(flow)
            self._free.sort(reverse=True)
