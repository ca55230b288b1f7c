"""The trio shell: moves bytes between sockets and the sans-IO cores, and fires their timers.

One ``Daemon`` is one side of the pair.  Both sides encode what they send on the link and decode
what they receive from it; they differ only in the application side, one object per role chosen
once at start (:mod:`fecproxy.shell.app_side`).

The decisions are the cores': the decoder learns the peer's address and says when a key check is
due and when the peer's code settled (typed events, :mod:`fecproxy.protocol.events`); loss reports
and adaptation are :class:`~fecproxy.linkmodel.feedback.Feedback`'s.  Every event goes through one
handler here, which logs it and moves the bytes it asks for.

All tasks live in one nursery; the timer task sleeps in a cancel scope whose deadline is the
earliest of the cores' ``next_deadline()`` values and is moved whenever a core's changes.  What
a config means for the cores, at start and on SIGHUP, is :mod:`fecproxy.shell.settings`.
"""

from __future__ import annotations

import logging
import math
import secrets
import signal
from contextlib import nullcontext
from pathlib import Path
from typing import Any

import trio

from fecproxy import __version__
from fecproxy.config import Config
from fecproxy.config.addresses import format_sockaddr
from fecproxy.linkmodel.feedback import Feedback, ReportDue
from fecproxy.protocol import auth
from fecproxy.protocol.decoder import BlockDecoder
from fecproxy.protocol.events import (
    BlockOutcome,
    BlockReport,
    ChallengeDue,
    ControlReceived,
    Delivery,
    DropReason,
    KeyCheckDue,
    SessionStarted,
)
from fecproxy.protocol.loss_report import KEY_CHECK_BODY
from fecproxy.protocol.ordering import InOrderDelivery
from fecproxy.protocol.pacer import PacketKind
from fecproxy.protocol.sliding_encoder import SlidingEncoder
from fecproxy.shell.app_side import SideOpenError, app_side
from fecproxy.shell.event_log import log_core_event, stats_fields
from fecproxy.shell.fdlimit import ensure_open_files, files_needed
from fecproxy.shell.freshness_link import FreshnessLink
from fecproxy.shell.history import History
from fecproxy.shell.link_output import LinkOutput
from fecproxy.shell.logs import event_sink, log_event, log_exception
from fecproxy.shell.metrics import MetricsServer, build_registry, serve
from fecproxy.shell.operator_notes import OversizeWarning, ratio_field
from fecproxy.shell.settings import (
    ReloadRejected,
    apply_flow_timeouts,
    apply_sliding,
    configure_feedback,
    decoder_settings,
    flow_table,
    keep_fixed,
    keyring,
    make_encoder,
    needs_restart,
    read_new_config,
)
from fecproxy.shell.udp import DatagramReader, DatagramWriter, open_udp_socket, resolve
from fecproxy.shell.view import DaemonStatsView, ShellCounts

log = logging.getLogger("fecproxy.shell.daemon")

#: SIGTERM/SIGINT stop (after flushing the open block), SIGHUP reloads the config.
HANDLED_SIGNALS = (signal.SIGTERM, signal.SIGINT, signal.SIGHUP)
#: How a block ended without all its datagrams: its gaps are given up for in-order delivery.
GIVEN_UP = frozenset((BlockOutcome.EXPIRED, BlockOutcome.EVICTED, BlockOutcome.SUPERSEDED))


def _add(by_flow: dict[int, list[bytes]], deliveries: list[Delivery]) -> None:
    """Append deliveries to the per-flow batch the application side sends, in their order."""
    for delivery in deliveries:
        datagrams = by_flow.get(delivery.flow)
        if datagrams is None:
            by_flow[delivery.flow] = [delivery.data]
        else:
            datagrams.append(delivery.data)


class SocketOpenError(OSError):
    """A configured address that cannot be bound or resolved; says which key and address."""

    def __init__(self, key: str, address: object, error: OSError):
        reason = error.strerror or str(error)
        super().__init__(error.errno, f"{key} {address}: {reason}")
        self.key, self.address, self.reason = key, address, reason

    def __str__(self) -> str:
        return self.strerror or ""


class Daemon:
    """One side of the pair.  ``await daemon.run()`` until SIGTERM/SIGINT or ``stop()``."""

    def __init__(self, config: Config, *, config_path: str | Path | None = None, handle_signals: bool = True):
        self.config = config
        self.config_path = config_path
        self.handle_signals = handle_signals
        self.session = secrets.randbits(32)
        keys = keyring(config)
        # A fresh random salt per start: with the random session it makes the encrypted mode's
        # nonces unique across restarts (protocol.auth, "Nonce rule").
        sealer = None if keys is None else auth.Sealer(keys.current, secrets.randbits(auth.SALT_BITS))
        # fec.code: block or sliding; both offer the loops and the feedback the same surface.
        self.encoder = make_encoder(config, self.session, sealer)
        # No configured peer: the decoder learns it from the followed session's packets.
        self.decoder = BlockDecoder(decoder_settings(config), keys, learn_peer=config.link.peer is None)
        # Loss reports on the direction we decode; adaptation of the one we encode (fec.adapt).
        self.feedback = Feedback(self.encoder, self.decoder)
        #: The application side, by role (sender: clients at ``listen``; receiver: ``forward``).
        self.app = app_side(config, flow_table(config), self._encode_and_send)
        self.counts = ShellCounts()
        self.freshness = FreshnessLink(self.encoder, self.decoder)  # keyed: proving sessions live
        #: delivery.order: in_order puts each flow back in the sender's order before the
        #: application side (protocol.ordering); None delivers as available.
        self.order = InOrderDelivery(config.delivery.max_wait_seconds) if config.delivery.in_order else None
        #: Every link packet goes out through here: at once, or paced to link.rate.
        self.link = LinkOutput(config)
        self.oversize = OversizeWarning()
        self._heard = 0  # valid packets from the peer so far (decoder counts + loss reports)
        self.view = DaemonStatsView(
            str(config.role), self.encoder, self.decoder, self.feedback, self.app, self.counts, self.order, self.link
        )
        self._link_sock: Any = None
        self._link_writer: DatagramWriter | None = None
        self._timer_scope: trio.CancelScope | None = None
        self._nursery: trio.Nursery | None = None
        self._stopping = False
        self.registry, self.recovery_delay = build_registry(self.view)
        #: Recent samples and events for /status.json (every INFO+ log_event of this daemon's tasks).
        self.history = History()
        self.metrics_port: int | None = None
        self.metrics_address: tuple[str, int] | None = None
        self.link_address: tuple[Any, ...] | None = None

    @property
    def flows(self) -> Any:
        """The application side's flow table."""
        return self.app.flows

    @property
    def peer(self) -> tuple[Any, ...] | None:
        """Where packets for the peer go: configured, or learned by the decoder (None before)."""
        return self.decoder.peer

    @property
    def listen_address(self) -> tuple[Any, ...] | None:
        """The sender's bound ``listen`` address (None on a receiver)."""
        return self.app.address

    # ------------------------------------------------------------ lifecycle
    def _open_sockets(self) -> MetricsServer | None:
        """Bind every configured address; on failure close what was opened and raise a
        SocketOpenError naming the config key and address.  Returns the metrics server."""
        cfg = self.config
        buffers = dict(receive_buffer=cfg.sockets.receive_buffer_bytes, send_buffer=cfg.sockets.send_buffer_bytes)
        metrics = None
        key: str = "link.bind"
        address: object = cfg.link.bind
        try:
            self._link_sock = open_udp_socket(cfg.link.bind.host, cfg.link.bind.port, **buffers, purpose="link.bind")
            self._link_writer = writer = DatagramWriter(self._link_sock)
            self.counts.link_send_errors = lambda: writer.send_errors
            self.link_address = self._link_sock.getsockname()
            self.link.attach(writer, self._link_sock.family, trio.current_time())
            if cfg.link.peer is not None:
                key, address = "link.peer", cfg.link.peer
                self.decoder.peer = resolve(cfg.link.peer.host, cfg.link.peer.port, self._link_sock.family)
            try:
                self.app.open(buffers)
            except SideOpenError as error:
                key, address = error.key, error.address
                raise error.error from None
            if cfg.metrics.listen is not None:
                key, address = "metrics.listen", cfg.metrics.listen
                listen, facts = cfg.metrics.listen, self.view.status_facts
                metrics = serve(self.registry, listen.host, listen.port, history=self.history, facts=facts)
                self.metrics_port, self.metrics_address = metrics.port, metrics.address
        except OSError as error:
            self.app.close()
            if self._link_sock is not None:
                self._link_sock.close()
            raise SocketOpenError(key, address, error) from error
        return metrics

    @property
    def stopping(self) -> bool:
        """True from the first stop request on (the open block is being flushed, or was)."""
        return self._stopping

    async def run(self, *, task_status: Any = trio.TASK_STATUS_IGNORED) -> None:
        # Signals are received from before "started" is logged until every socket is closed, so
        # a SIGTERM repeated during the flush is seen here, not by the default action (exit -15).
        # Trio re-raises signals still pending when the receiver closes: the process owner
        # (commands/run.py) keeps a handler beneath it for those.
        with trio.open_signal_receiver(*HANDLED_SIGNALS) if self.handle_signals else nullcontext() as signals:
            await self._run(signals, task_status)

    def _check_open_files(self) -> None:
        """Raise the open-file limit if the flow table may need more; warn if it cannot."""
        limit = ensure_open_files(files_needed(self.config.flows.max, holds_flow_sockets=self.app.holds_flow_sockets))
        if limit.raised_from is not None:
            log_event(log, logging.INFO, "open_files_raised", soft=limit.soft, was=limit.raised_from, hard=limit.hard)
        if not limit.enough:
            log_event(
                log,
                logging.WARNING,
                "open_files_low",
                need=limit.need,
                soft=limit.soft,
                hard=limit.hard,
                fix=f"LimitNOFILE={limit.need} in the systemd unit, or ulimit -n {limit.need} before starting",
                effect=f"about {limit.flows_that_fit} of flows.max={self.config.flows.max} flows fit; "
                "datagrams of new flows beyond that are dropped (reason no_socket)",
            )

    async def _run(self, signals: Any, task_status: Any) -> None:
        cfg = self.config
        self._check_open_files()
        metrics = self._open_sockets()
        self.freshness.start(trio.current_time())
        configure_feedback(self.feedback, cfg, trio.current_time())
        # From here on, this task's events and those of the tasks it starts go to the history too.
        sink = event_sink.set(self.history.record)
        try:
            async with trio.open_nursery() as nursery:
                self._nursery = nursery
                self.app.start(nursery)
                if metrics is not None:
                    nursery.start_soon(metrics.run)  # the metrics port: a task here, no thread
                nursery.start_soon(self._link_loop)
                nursery.start_soon(self.link.run)
                nursery.start_soon(self._timer_loop)
                nursery.start_soon(self.freshness.hellos, self.link.send, lambda: self.peer)
                if signals is not None:
                    nursery.start_soon(self._signal_loop, signals)
                if cfg.log.stats_interval_s:
                    nursery.start_soon(self._stats_loop, cfg.log.stats_interval_s)
                side = self.app.log_fields()
                # k and m: the code this side sends with (on a receiver, its replies); the code it
                # decodes is the peer's, known from its first repair packets (a "peer_code" line).
                log_event(
                    log,
                    logging.INFO,
                    "started",
                    version=__version__,
                    role=str(cfg.role),
                    link=format_sockaddr(self.link_address),
                    peer=format_sockaddr(self.peer) if self.peer else "learned",
                    listen=side["listen"],
                    forward=side["forward"],
                    code=str(cfg.fec.code),
                    **self._code_fields(cfg),
                    flush_ms=cfg.fec.flush_ms,
                    adapt="on" if self.feedback.adapting else "off",
                    link_rate=f"{cfg.link.rate:g}" if cfg.link.rate is not None else "off",
                    reports_ms=cfg.reports.interval_ms,
                    sends=side["sends"],
                    decoding="peer's code unknown until traffic",
                    session=f"{self.session:08x}",
                    metrics=f"http://{format_sockaddr(self.metrics_address)}/metrics"
                    if self.metrics_address
                    else "off",
                    auth=self.decoder.keyring.describe() if self.decoder.keyring is not None else "off",
                )
                task_status.started(self)
        finally:
            self.app.close()
            self._link_sock.close()
            if metrics is not None:
                metrics.stop()
            event_sink.reset(sink)
        log_event(log, logging.INFO, "stopped", **self.summary())

    def _metrics_url(self) -> str:
        """Where to point a browser, Prometheus or ``fecproxy watch``; "off" without a port."""
        if self.metrics_address is None:
            return "off"
        return f"http://{format_sockaddr(self.metrics_address)}/metrics"

    async def stop(self) -> None:
        """Close the open block (its repair packets go out), then end every task."""
        if self._stopping or self._nursery is None:
            return
        self._stopping = True
        await self._send_to_peer(self.encoder.close())
        now = trio.current_time()
        await self._handle_events(self.decoder.close(), now)
        if self.order is not None:  # what waits behind a gap goes now, in order
            by_flow: dict[int, list[bytes]] = {}
            _add(by_flow, self.order.close(now))
            if by_flow:
                await self.app.deliver(by_flow, now)
        left = await self.link.drain()  # the paced queue: the last block's repair packets
        if left:
            log_event(log, logging.INFO, "queue_discarded", packets=left, detail="still queued for the link at stop")
        self._nursery.cancel_scope.cancel()

    def summary(self) -> dict[str, int]:
        enc, dec = self.encoder.stats, self.decoder.stats
        return dict(
            source_sent=enc.source_packets,
            repair_sent=enc.repair_packets,
            blocks_sent=enc.blocks,
            received_source=dec.source_received,
            received_repair=dec.repair_received,
            lost=dec.lost,
            recovered=dec.recovered,
            unrecovered=dec.unrecovered,
            delivered=dec.delivered,
            dropped=sum(self.view.drop_counts().values()),
        )

    # ------------------------------------------------------------ tasks
    async def _encode_and_send(self, items: list[tuple[bytes, int]], now: float) -> None:
        """Frame a batch (blocks it fills share codec calls, see BlockEncoder.send_batch) and
        put it on the link.  Both roles: the sender's client datagrams, the receiver's replies."""
        encoder = self.encoder
        self.freshness.note(now)
        oversize = encoder.stats.dropped.get(DropReason.OVERSIZE, 0)
        try:
            out = encoder.send_batch(items, now)
        except Exception:  # a bug must cost one batch, never the daemon
            self._internal_error("encoder")
            out = []
        dropped = encoder.stats.dropped.get(DropReason.OVERSIZE, 0) - oversize
        if dropped:  # a warning at most every 10 s, with size, limit and key (operator_notes)
            self.oversize.note(dropped, max(len(data) for data, _ in items), encoder.settings.max_datagram, now)
        await self._send_to_peer(out)
        self._reschedule()

    def _internal_error(self, where: str) -> None:
        self.counts.drop(DropReason.INTERNAL_ERROR)
        log_exception(log, "internal_error", where=where)

    async def _link_loop(self) -> None:
        """Both roles: link packets -> decoder -> applications."""
        # The peer sends with GSO, so with GRO a burst of its packets is one read (see udp.py).
        reader = DatagramReader(self._link_sock, coalesce=True)
        receive_batch = self.decoder.receive_batch
        order = self.order
        by_flow: dict[int, list[bytes]] = {}
        while True:
            batch = await reader.read_batch()
            now = trio.current_time()
            # One call per read: the blocks it makes decodable are rebuilt together.
            try:
                events = receive_batch(batch, now)
            except Exception:  # a bug must cost one read, never the daemon
                self._internal_error("decoder")
                events = []
            try:  # nor may a bug in what follows the decoder (ordering, events): one read, not the daemon
                for event in events:
                    if type(event) is Delivery:  # the common case, inline: once per datagram
                        if event.recovered:
                            self.recovery_delay.observe(event.delay)
                        if order is not None:
                            _add(by_flow, order.push(event, now))
                            continue
                        datagrams = by_flow.get(event.flow)
                        if datagrams is None:
                            by_flow[event.flow] = [event.data]
                        else:
                            datagrams.append(event.data)
                    else:
                        if type(event) is SessionStarted:
                            if order is not None:  # the old conversations' waiting datagrams first
                                _add(by_flow, order.reset(now, event.session, joined=event.joined))
                            if by_flow:
                                # What came before a peer restart belongs to the old conversations.
                                await self.app.deliver(by_flow, now)
                                by_flow = {}
                        elif order is not None and type(event) is BlockReport:
                            _add(by_flow, self._give_up(event, now))
                        await self._handle_event(event, now)
                if by_flow:
                    await self.app.deliver(by_flow, now)
                    by_flow = {}
            except Exception:
                self._internal_error("link events")
                by_flow = {}
            stats = self.decoder.stats
            heard = stats.source_received + stats.repair_received + self.feedback.stats.received
            if heard != self._heard:  # anything valid from the peer: it is there
                self._heard = heard
                await self._handle_events(self.feedback.peer.heard(now), now)
            self._reschedule()

    async def _timer_loop(self) -> None:
        while True:
            deadline = self._next_deadline()
            with trio.CancelScope(deadline=deadline) as scope:
                self._timer_scope = scope
                await trio.sleep_forever()
            self._timer_scope = None
            now = trio.current_time()
            await self._send_to_peer(self.encoder.on_timer(now))
            events = self.decoder.on_timer(now)
            if self.order is not None:
                by_flow: dict[int, list[bytes]] = {}
                for event in events:
                    if type(event) is BlockReport:
                        _add(by_flow, self._give_up(event, now))
                _add(by_flow, self.order.on_timer(now))
                if by_flow:
                    await self.app.deliver(by_flow, now)
            await self._handle_events(events, now)
            await self._handle_events(self.feedback.on_timer(now), now)
            self.app.expire(now)

    async def _signal_loop(self, signals: Any) -> None:
        async for signum in signals:
            if signum == signal.SIGHUP:
                self.reload()
            elif not self._stopping:
                log_event(log, logging.INFO, "stopping", signal=signal.Signals(signum).name)
                await self.stop()
            # A repeated SIGTERM/SIGINT while stopping changes nothing: the flush is under way.

    # ------------------------------------------------------------ events
    async def _handle_events(self, events: list[Any], now: float) -> None:
        for event in events:
            await self._handle_event(event, now)

    async def _handle_event(self, event: Any, now: float) -> None:
        """The one handler of what the cores say (deliveries aside, batched by the link loop):
        act on the event, then log it (shell.event_log)."""
        if isinstance(event, BlockReport):
            self.feedback.on_block(event)
        elif isinstance(event, KeyCheckDue):
            # Sealed with our key, so the peer's log says the same as ours (see loss_report).
            if self.encoder.sealer is not None:
                await self.link.send([self.encoder.control(KEY_CHECK_BODY)], event.address, now)
        elif isinstance(event, ChallengeDue | ControlReceived) and self.freshness.claims(event):
            await self.freshness.answer(event, self.link.send, self.peer, now)
        elif isinstance(event, ControlReceived):
            await self._handle_events(self.feedback.on_control(event, now), now)
        elif isinstance(event, SessionStarted):
            if event.previous is not None:
                self.app.peer_restarted()
        elif isinstance(event, ReportDue):
            await self._send_to_peer([event.packet])
        log_core_event(event, self.feedback.repair)

    # ------------------------------------------------------------ helpers
    def _give_up(self, report: BlockReport, now: float) -> list[Delivery]:
        """In order: a block ended without all its datagrams, so gaps older than every block still
        open can no longer be rebuilt; what waited behind them goes on (protocol.ordering)."""
        if self.order is None or not report.unrecovered or report.outcome not in GIVEN_UP:
            return []
        return self.order.give_up_before(self.decoder.oldest_open_since(), now)

    def reload(self, config: Config | None = None) -> bool:
        """Apply new FEC, decoder and flow-timeout settings from the next block on; keep flows.

        Flow timeouts and ``flows.protect_s`` apply at once; ``flows.max`` needs a restart.

        ``config`` defaults to the config file read again.  Settings that need a restart
        (settings.RESTART_KEYS, RESTART_FIELDS) are reported and left as they are.
        """
        try:
            new = config if config is not None else read_new_config(self.config_path)
        except ReloadRejected as rejected:
            self.counts.reloads["rejected"] += 1
            log_event(log, logging.ERROR, "reload_rejected", errors=rejected.errors)
            return False
        fixed = needs_restart(self.config, new)
        if fixed:
            log_event(log, logging.WARNING, "reload_needs_restart", keys=",".join(fixed))
        apply_sliding(self.encoder, new)
        configure_feedback(self.feedback, new, trio.current_time())
        self.decoder.settings = decoder_settings(new)
        self._apply_keys(new)
        apply_flow_timeouts(self.app.flows, new)
        self.config = keep_fixed(self.config, new)
        self.counts.reloads["applied"] += 1
        log_event(
            log,
            logging.INFO,
            "reloaded",
            **self._code_fields(new),
            flush_ms=new.fec.flush_ms,
        )
        self._reschedule()
        return True

    def _code_fields(self, cfg: Config) -> dict[str, Any]:
        """What the log says of the code this side sends with: k and m, or the sliding window."""
        encoder = self.encoder
        if isinstance(encoder, SlidingEncoder):
            sliding = encoder.sliding_settings
            return dict(
                window=sliding.window,
                window_ms=round(sliding.window_age * 1000),
                repair_interval=sliding.repair_interval,
            )
        return dict(k=cfg.fec.block_size, m=encoder.next_settings.repair)  # from the next block on

    def _apply_keys(self, new: Config) -> None:
        """New keys from the reloaded config: sent with from the next packet on, accepted at
        once; the sequence runs on and every session keeps its replay window."""
        keys = keyring(new)
        changed = repr(keys) != repr(self.decoder.keyring)
        self.decoder.keyring = keys
        if keys is None:
            self.encoder.sealer = None
        elif self.encoder.sealer is None:
            self.encoder.sealer = auth.Sealer(keys.current, secrets.randbits(auth.SALT_BITS))
        else:
            self.encoder.sealer.key = keys.current
        if changed:
            log_event(log, logging.INFO, "keys", auth=keys.describe() if keys is not None else "off")

    async def _stats_loop(self, interval: float) -> None:
        """One INFO line every ``interval`` seconds with the counters since the previous line, so
        a long run shows it is alive and what the link did without a metrics endpoint."""
        previous = self._stats_snapshot()
        while True:
            await trio.sleep(interval)
            now = self._stats_snapshot()
            delta = {key: now[key] - previous[key] for key in now}
            previous = now
            log_event(log, logging.INFO, "stats", **stats_fields(interval, delta, self._stats_states()))

    def _stats_snapshot(self) -> dict[str, int]:
        counts = self.summary()
        counts["datagrams_in"] = self.encoder.stats.source_packets  # one source packet per datagram taken in
        if self.order is not None:
            counts["held"], counts["gaps_skipped"] = self.order.stats.held, self.order.stats.gaps_skipped
        counts["oversize"] = self.encoder.stats.dropped.get(DropReason.OVERSIZE, 0)
        figures = self.link.figures()
        if figures.rate_bps is not None:  # paced: air bytes used and the pacer's drops
            counts["air_bytes"] = sum(figures.air_bytes[kind] for kind in PacketKind)
            counts["queue_dropped"] = sum(figures.dropped.values())
        return counts

    def _stats_states(self) -> dict[str, object]:
        """The stats line's states: flows, the peer address, the far end as the peer reports it."""
        peer = self.feedback.peer
        before, after = peer.peer_loss()
        return dict(
            flows=len(self.app.flows),
            peer=format_sockaddr(self.peer) if self.peer else "-",
            peer_link_loss=ratio_field(before),
            peer_residual_loss=ratio_field(after),
            peer_silent_s=round(peer.seconds_since_heard(trio.current_time()), 1) if peer.silent else 0,
        )

    def _next_deadline(self) -> float:
        cores = (
            self.encoder.next_deadline(),
            self.decoder.next_deadline(),
            self.app.flows.next_deadline(),
            self.feedback.next_deadline(),
            None if self.order is None else self.order.next_deadline(),
        )
        deadlines = [d for d in cores if d is not None]
        return min(deadlines) if deadlines else math.inf

    def _reschedule(self) -> None:
        if self._timer_scope is not None:
            self._timer_scope.deadline = self._next_deadline()

    async def _send_to_peer(self, packets: list[bytes]) -> None:
        if not packets:
            return
        peer = self.decoder.peer
        if peer is None or self._link_writer is None:
            self.counts.drop(DropReason.NO_PEER, len(packets))
            return
        await self.link.send(packets, peer, trio.current_time())
