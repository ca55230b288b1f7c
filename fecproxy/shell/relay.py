"""A bidirectional UDP relay through two emulated lossy links: the trio shell of
:mod:`fecproxy.linkmodel.impairment`, used by ``fecproxy impair`` and the demo.

Datagrams arriving on ``listen`` go through the *forward* :class:`ImpairedLink` to ``to``;
datagrams coming back from ``to`` go through the *return* link to whichever address last sent to
``listen``.  In-process use (a demo or a test inside a trio nursery)::

    relay = await nursery.start(run_relay, RelayConfig(listen=("127.0.0.1", 0), to=receiver_addr, ...))
    relay.listen_address   # where the sender should send
    relay.stats()          # per-direction LinkStats
"""

from __future__ import annotations

import math
import socket as stdlib_socket
from collections import Counter
from dataclasses import dataclass, field

import trio
from prometheus_client import CollectorRegistry
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily

from fecproxy.config.addresses import format_sockaddr
from fecproxy.linkmodel.impairment import (
    IPV4_UDP_HEADER_BYTES,
    IPV6_UDP_HEADER_BYTES,
    ImpairedLink,
    LinkImpairment,
    LinkStats,
)
from fecproxy.shell.metrics import MetricsServer, add_process_collectors, serve
from fecproxy.shell.udp import MAX_UDP_PAYLOAD

#: Default seed: runs are reproducible unless the user asks otherwise.
DEFAULT_SEED = 1
#: Socket receive/send buffers asked of the kernel.  The relay is one Python task per direction;
#: a sender's burst must wait in the kernel rather than be dropped there, where we cannot count
#: it.  4 MiB holds about a second of a 30 Mbit/s link; Linux caps it at net.core.rmem_max/wmem_max.
SOCKET_BUFFER_BYTES = 4 * 1024 * 1024
DIRECTIONS = ("forward", "return")
#: Drops that happen in the relay shell rather than on the emulated link.
SHELL_DROP_REASONS = ("no_client", "send_error")


class RelayError(RuntimeError):
    """The relay could not start (address resolution or bind failed)."""


@dataclass(frozen=True)
class RelayConfig:
    """Everything :func:`run_relay` needs; the two :class:`LinkImpairment` are already validated."""

    listen: tuple[str, int]
    to: tuple[str, int]
    forward: LinkImpairment = field(default_factory=LinkImpairment)
    back: LinkImpairment = field(default_factory=LinkImpairment)
    seed: int | str = DEFAULT_SEED
    bind_out: tuple[str, int] | None = None  # local address toward ``to``; None = any


class UdpRelay:
    """The running relay: two sockets, two impaired links, a pump per direction."""

    def __init__(self, config: RelayConfig) -> None:
        self.config = config
        self.links: dict[str, ImpairedLink] = {}
        self.shell_drops: Counter[tuple[str, str]] = Counter()
        self.listen_address: tuple | None = None
        self.out_address: tuple | None = None
        self.client: tuple | None = None  # who sent to --listen last; replies go there
        self._wake = {direction: trio.Event() for direction in DIRECTIONS}

    async def run(self, *, task_status=trio.TASK_STATUS_IGNORED) -> None:
        """Bind, report ``self`` through ``task_status``, relay until cancelled."""
        config = self.config
        try:
            listen_info = await trio.socket.getaddrinfo(*config.listen, type=stdlib_socket.SOCK_DGRAM)
            to_info = await trio.socket.getaddrinfo(*config.to, type=stdlib_socket.SOCK_DGRAM)
            listen_sock = trio.socket.socket(listen_info[0][0], stdlib_socket.SOCK_DGRAM)
            out_sock = trio.socket.socket(to_info[0][0], stdlib_socket.SOCK_DGRAM)
        except OSError as exc:
            raise RelayError(
                f"cannot resolve or open sockets for {format_sockaddr(config.listen)} / "
                f"{format_sockaddr(config.to)}: {exc}"
            ) from None
        with listen_sock, out_sock:
            for sock in (listen_sock, out_sock):
                for option in (stdlib_socket.SO_RCVBUF, stdlib_socket.SO_SNDBUF):
                    try:
                        sock.setsockopt(stdlib_socket.SOL_SOCKET, option, SOCKET_BUFFER_BYTES)
                    except OSError:  # a smaller buffer still works; only bursts suffer
                        pass
            try:
                await listen_sock.bind(listen_info[0][4])
                if config.bind_out is not None:
                    await out_sock.bind(config.bind_out)
                await out_sock.connect(to_info[0][4])
            except OSError as exc:
                raise RelayError(
                    f"cannot bind {format_sockaddr(config.listen)} or reach {format_sockaddr(config.to)}: {exc}"
                ) from None
            self.listen_address = listen_sock.getsockname()
            self.out_address = out_sock.getsockname()
            start = trio.current_time()
            # The rate cap counts the IP header each datagram really carries on its way out.
            headers = {
                direction: IPV6_UDP_HEADER_BYTES if sock.family == stdlib_socket.AF_INET6 else IPV4_UDP_HEADER_BYTES
                for direction, sock in (("forward", out_sock), ("return", listen_sock))
            }
            self.links = {
                "forward": ImpairedLink(
                    config.forward, seed=f"{config.seed}:forward", start=start, header_bytes=headers["forward"]
                ),
                "return": ImpairedLink(
                    config.back, seed=f"{config.seed}:return", start=start, header_bytes=headers["return"]
                ),
            }
            task_status.started(self)
            async with trio.open_nursery() as nursery:
                nursery.start_soon(self._receive_from_clients, listen_sock)
                nursery.start_soon(self._receive_from_far_end, out_sock)
                nursery.start_soon(self._pump, "forward", out_sock, listen_sock)
                nursery.start_soon(self._pump, "return", out_sock, listen_sock)

    async def _receive_from_clients(self, sock) -> None:
        link = self.links["forward"]
        while True:
            try:
                data, address = await sock.recvfrom(MAX_UDP_PAYLOAD)
            except OSError:  # an ICMP error for an earlier send surfaces here; nothing was received
                continue
            self.client = address
            link.submit(data, trio.current_time())
            self._wake["forward"].set()

    async def _receive_from_far_end(self, sock) -> None:
        link = self.links["return"]
        while True:
            try:
                data = await sock.recv(MAX_UDP_PAYLOAD)
            except OSError:  # e.g. ECONNREFUSED while the far end is not up yet
                continue
            link.submit(data, trio.current_time())
            self._wake["return"].set()

    async def _pump(self, direction: str, out_sock, listen_sock) -> None:
        """Send what the link says is due, then sleep until its next deadline or new input."""
        link = self.links[direction]
        while True:
            for datagram in link.due(trio.current_time()):
                try:
                    if direction == "forward":
                        await out_sock.send(datagram)
                    elif self.client is None:
                        self.shell_drops[(direction, "no_client")] += 1
                    else:
                        await listen_sock.sendto(datagram, self.client)
                except OSError:
                    self.shell_drops[(direction, "send_error")] += 1
            wake = self._wake[direction]
            deadline = link.next_deadline()
            with trio.move_on_at(math.inf if deadline is None else deadline):
                await wake.wait()
            if wake.is_set():
                self._wake[direction] = trio.Event()

    def set_impairment(self, direction: str, impairment: LinkImpairment) -> None:
        """Change one direction's impairment while the relay runs (see ImpairedLink.reconfigure):
        a test or a demo can fade the link and bring it back, or cut the return path."""
        if direction not in DIRECTIONS:
            raise ValueError(f"direction must be one of {DIRECTIONS}, got {direction!r}")
        self.links[direction].reconfigure(impairment)
        self._wake[direction].set()

    # -- reporting ---------------------------------------------------------------------------------

    def stats(self) -> dict[str, LinkStats]:
        """Per-direction link counters (safe to call from another thread: it only reads)."""
        return {direction: link.stats() for direction, link in self.links.items()}


async def run_relay(config: RelayConfig, *, task_status=trio.TASK_STATUS_IGNORED) -> None:
    """Run a relay until cancelled; ``task_status.started`` receives the :class:`UdpRelay`
    (its ``listen_address`` is the bound address, its ``stats()`` the counters)."""
    await UdpRelay(config).run(task_status=task_status)


# -- metrics -------------------------------------------------------------------------------------------


class _RelayCollector:
    """Prometheus collector reading the relay's counters at scrape time (no per-packet cost)."""

    def __init__(self, relay: UdpRelay) -> None:
        self.relay = relay

    def collect(self):
        prefix = "fecproxy_impair_"
        counters = {
            "submitted": CounterMetricFamily(
                prefix + "datagrams_submitted", "datagrams offered to the emulated link", labels=["direction"]
            ),
            "sent": CounterMetricFamily(
                prefix + "datagrams_sent", "datagrams put on the air (faced the loss model)", labels=["direction"]
            ),
            "delivered": CounterMetricFamily(
                prefix + "datagrams_delivered", "datagrams delivered, duplicates included", labels=["direction"]
            ),
            "duplicates": CounterMetricFamily(
                prefix + "datagrams_duplicated", "extra copies delivered", labels=["direction"]
            ),
        }
        dropped = CounterMetricFamily(
            prefix + "datagrams_dropped", "datagrams dropped, by reason", labels=["direction", "reason"]
        )
        loss = GaugeMetricFamily(prefix + "loss_ratio", "measured loss ratio of the loss model", labels=["direction"])
        burst = GaugeMetricFamily(
            prefix + "mean_burst_packets", "measured mean run of consecutive losses", labels=["direction"]
        )
        queued = GaugeMetricFamily(prefix + "queue_datagrams", "datagrams in the modem buffer", labels=["direction"])
        in_flight = GaugeMetricFamily(
            prefix + "in_flight_datagrams", "datagrams delayed and not yet due", labels=["direction"]
        )
        for direction, stats in self.relay.stats().items():
            for name, family in counters.items():
                family.add_metric([direction], getattr(stats, name))
            for reason, count in stats.drops.items():
                dropped.add_metric([direction, reason], count)
            for reason in SHELL_DROP_REASONS:
                dropped.add_metric([direction, reason], self.relay.shell_drops[(direction, reason)])
            loss.add_metric([direction], stats.measured_loss)
            burst.add_metric([direction], stats.measured_mean_burst)
            queued.add_metric([direction], stats.queued)
            in_flight.add_metric([direction], stats.in_flight)
        yield from counters.values()
        yield from (dropped, loss, burst, queued, in_flight)


def start_metrics_server(relay: UdpRelay, address: tuple[str, int]) -> MetricsServer:
    """Serve the relay's counters at ``/metrics`` (see :func:`fecproxy.shell.metrics.serve`);
    the returned server's ``address`` is the bound one, its ``stop()`` ends it."""
    registry = CollectorRegistry(auto_describe=False)
    registry.register(_RelayCollector(relay))
    add_process_collectors(registry)
    return serve(registry, address[0], address[1])
