"""The trio shell: moves bytes between sockets and the sans-IO cores, and fires their timers.

One ``Daemon`` is one side of the pair.  Both sides encode what they send on the link and decode
what they receive from it; they differ only in the application side:

* sender: applications send to ``listen``; every client address is a flow; decoded replies go
  back to the client through the same socket.
* receiver: rebuilt datagrams go to ``forward`` from one upstream socket per flow
  (:mod:`fecproxy.shell.upstream`), so the server's replies come back on that socket and are
  encoded towards the sender with the flow's id.

All tasks live in one nursery; the timer task sleeps in a cancel scope whose deadline is the
earliest of the cores' ``next_deadline()`` values and is moved whenever a core's changes.  What
a config means for the cores, at start and on SIGHUP, is :mod:`fecproxy.shell.settings`.
"""

from __future__ import annotations

import logging
import math
import secrets
import signal
from collections import defaultdict
from contextlib import nullcontext
from pathlib import Path

import trio

from fecproxy import __version__
from fecproxy.config import Config
from fecproxy.config.addresses import format_sockaddr
from fecproxy.linkmodel.estimator import LossEstimator
from fecproxy.protocol import auth
from fecproxy.protocol.decoder import BlockDecoder, DecoderStats
from fecproxy.protocol.encoder import BlockEncoder, EncoderStats
from fecproxy.protocol.events import BlockReport, ControlReceived, Delivery, Dropped, DropReason, SessionStarted
from fecproxy.protocol.flows import ClientFlowTable, PeerFlowTable
from fecproxy.protocol.loss_report import KEY_CHECK_BODY
from fecproxy.shell.fdlimit import ensure_open_files, files_needed
from fecproxy.shell.logs import log_event, log_exception
from fecproxy.shell.metrics import MetricsServer, build_registry, serve
from fecproxy.shell.reports import Feedback
from fecproxy.shell.settings import (
    ReloadRejected,
    apply_flow_timeouts,
    decoder_settings,
    encoder_settings,
    flow_table,
    keep_fixed,
    keyring,
    needs_restart,
    read_new_config,
)
from fecproxy.shell.udp import DatagramReader, DatagramWriter, open_udp_socket, resolve
from fecproxy.shell.upstream import Upstreams

#: Authentication failures that mean the two sides' keys or encryption modes differ (not a forgery
#: of ours): each logged line also sends the peer a key check.
KEY_FAULT_KINDS = frozenset({"unknown_key", "mode_mismatch"})

log = logging.getLogger("fecproxy.shell.daemon")

#: Source packets the link-loss estimate looks back over: long enough to see several bursts at a
#: few percent loss, short enough to follow a changing link within seconds at telemetry rates
#: (common practice, no source).
LOSS_ESTIMATE_WINDOW = 10_000
#: SIGTERM/SIGINT stop (after flushing the open block), SIGHUP reloads the config.
HANDLED_SIGNALS = (signal.SIGTERM, signal.SIGINT, signal.SIGHUP)


class SocketOpenError(OSError):
    """A configured address that cannot be bound or resolved; says which key and address."""

    def __init__(self, key: str, address, error: OSError):
        reason = error.strerror or str(error)
        super().__init__(error.errno, f"{key} {address}: {reason}")
        self.key, self.address, self.reason = key, address, reason

    def __str__(self) -> str:
        return self.strerror


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
        self.encoder = BlockEncoder(encoder_settings(config), self.session, sealer=sealer)
        self.decoder = BlockDecoder(decoder_settings(config), keys)
        self.auth_notice = auth.FailureNotice()
        self._key_check_due = False  # a key fault was logged: tell the peer too (see _send_key_check)
        self.estimator = LossEstimator(window=LOSS_ESTIMATE_WINDOW)
        # Loss reports on the direction we decode; adaptation of the one we encode (fec.adapt).
        self.feedback = Feedback(self.encoder, self.decoder, log)
        #: Sender: client addresses -> flow ids; receiver: the peer's flow ids -> conversations.
        self.flows: ClientFlowTable | PeerFlowTable = flow_table(config)
        self._reloads: dict[str, int] = {"applied": 0, "rejected": 0}
        self._drops: dict[DropReason, int] = defaultdict(int)
        self.upstreams: Upstreams | None = None  # receiver only, from run() on
        self._link_sock = self._app_sock = None
        self._link_writer: DatagramWriter | None = None
        self._app_writer: DatagramWriter | None = None
        self._timer_scope: trio.CancelScope | None = None
        self._nursery: trio.Nursery | None = None
        self._stopping = False
        self.registry, self.recovery_delay = build_registry(self)
        self.metrics_port: int | None = None
        self.peer: tuple | None = None
        self.link_address: tuple | None = None
        self.listen_address: tuple | None = None
        self._logged_code: tuple[int, int] | None = None  # the peer's code last logged

    # ------------------------------------------------------------ what metrics reads (DaemonView)
    @property
    def role(self) -> str:
        return str(self.config.role)

    @property
    def encoder_stats(self) -> EncoderStats:
        return self.encoder.stats

    @property
    def decoder_stats(self) -> DecoderStats:
        return self.decoder.stats

    @property
    def block_shape(self) -> tuple[int, int]:
        """(k, m) of the blocks being sent now."""
        settings = self.encoder.settings
        return settings.block_size, settings.repair

    @property
    def interleave(self) -> int:
        return self.encoder.settings.interleave

    @property
    def size_class_names(self) -> tuple[str, ...]:
        return self.encoder.settings.class_names

    @property
    def reloads(self) -> dict[str, int]:
        """SIGHUP reloads by result, "applied" and "rejected" (a copy)."""
        return dict(self._reloads)

    def drop_counts(self) -> dict[str, int]:
        totals = dict(self._drops)
        sources = [self.encoder.stats.dropped, self.decoder.stats.dropped]
        if self.upstreams is not None:
            sources.append(self.upstreams.drops)
        for source in sources:
            for reason, count in source.items():
                totals[reason] = totals.get(reason, 0) + count
        return totals

    def send_errors(self) -> int:
        errors = sum(w.send_errors for w in (self._link_writer, self._app_writer) if w is not None)
        if self.upstreams is not None:
            errors += self.upstreams.send_errors()
        return errors

    def flow_count(self) -> int:
        return len(self.flows)

    def flows_evicted(self) -> int:
        return self.flows.stats.evicted

    @property
    def received_code(self) -> tuple[int | None, int | None]:
        """(k, m) of the peer's code as seen in its repair packets; (None, None) before any."""
        code = self.decoder.received_code
        return code.k, code.m

    def loss_estimate(self) -> tuple[float, float] | None:
        estimate = self.estimator.estimate()
        if estimate.samples == 0:
            return None
        return estimate.average_loss, estimate.mean_burst

    # ------------------------------------------------------------ lifecycle
    def _open_sockets(self) -> MetricsServer | None:
        """Bind every configured address; on failure close what was opened and raise a
        SocketOpenError naming the config key and address.  Returns the metrics server."""
        cfg = self.config
        buffers = dict(receive_buffer=cfg.sockets.receive_buffer_bytes, send_buffer=cfg.sockets.send_buffer_bytes)
        metrics = None
        key, address = "link.bind", cfg.link.bind
        try:
            self._link_sock = open_udp_socket(cfg.link.bind.host, cfg.link.bind.port, **buffers, purpose="link.bind")
            self._link_writer = DatagramWriter(self._link_sock)
            self.link_address = self._link_sock.getsockname()
            if cfg.link.peer is not None:
                key, address = "link.peer", cfg.link.peer
                self.peer = resolve(cfg.link.peer.host, cfg.link.peer.port, self._link_sock.family)
            if cfg.role == "sender":
                key, address = "listen", cfg.listen
                self._app_sock = open_udp_socket(cfg.listen.host, cfg.listen.port, **buffers, purpose="listen")
                self._app_writer = DatagramWriter(self._app_sock)
                self.listen_address = self._app_sock.getsockname()
            else:
                key, address = "forward", cfg.forward
                forward = resolve(cfg.forward.host, cfg.forward.port)
                self.upstreams = Upstreams(forward, self.flows, self._encode_and_send)
            if cfg.metrics.listen is not None:
                key, address = "metrics.listen", cfg.metrics.listen
                metrics = serve(self.registry, cfg.metrics.listen.host, cfg.metrics.listen.port)
                self.metrics_port = metrics.port
        except OSError as error:
            for sock in (self._link_sock, self._app_sock):
                if sock is not None:
                    sock.close()
            raise SocketOpenError(key, address, error) from error
        return metrics

    @property
    def stopping(self) -> bool:
        """True from the first stop request on (the open block is being flushed, or was)."""
        return self._stopping

    async def run(self, *, task_status=trio.TASK_STATUS_IGNORED) -> None:
        # Signals are received from before "started" is logged until every socket is closed, so
        # a SIGTERM repeated during the flush is seen here, not by the default action (exit -15).
        # Trio re-raises signals still pending when the receiver closes: the process owner
        # (commands/run.py) keeps a handler beneath it for those.
        with trio.open_signal_receiver(*HANDLED_SIGNALS) if self.handle_signals else nullcontext() as signals:
            await self._run(signals, task_status)

    def _check_open_files(self) -> None:
        """Raise the open-file limit if the flow table may need more; warn if it cannot."""
        receiver = self.config.role == "receiver"
        limit = ensure_open_files(files_needed(self.config.flows.max, holds_flow_sockets=receiver))
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

    async def _run(self, signals, task_status) -> None:
        cfg = self.config
        self._check_open_files()
        metrics = self._open_sockets()
        self.feedback.configure(cfg, encoder_settings(cfg), trio.current_time())
        try:
            async with trio.open_nursery() as nursery:
                self._nursery = nursery
                if self.upstreams is not None:
                    self.upstreams.attach(nursery)
                if metrics is not None:
                    nursery.start_soon(metrics.run)  # the metrics port: a task here, no thread
                nursery.start_soon(self._link_loop)
                nursery.start_soon(self._timer_loop)
                if self._app_sock is not None:
                    nursery.start_soon(self._client_loop)
                if signals is not None:
                    nursery.start_soon(self._signal_loop, signals)
                if cfg.log.stats_interval_s:
                    nursery.start_soon(self._stats_loop, cfg.log.stats_interval_s)
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
                    listen=format_sockaddr(self.listen_address),
                    forward=str(cfg.forward) if cfg.forward else "-",
                    k=cfg.fec.block_size,
                    m=self.encoder.settings.repair,
                    flush_ms=cfg.fec.flush_ms,
                    adapt="on" if self.feedback.adapting else "off",
                    reports_ms=cfg.reports.interval_ms,
                    sends="datagrams" if cfg.role == "sender" else "replies",
                    decoding="peer's code unknown until traffic",
                    session=f"{self.session:08x}",
                    metrics=self.metrics_port or "off",
                    auth=repr(self.decoder.keyring) if self.decoder.keyring is not None else "off",
                )
                task_status.started(self)
        finally:
            if self.upstreams is not None:
                self.upstreams.close_all()
            self._link_sock.close()
            if self._app_sock is not None:
                self._app_sock.close()
            if metrics is not None:
                metrics.stop()
        log_event(log, logging.INFO, "stopped", **self.summary())

    async def stop(self) -> None:
        """Close the open block (its repair packets go out), then end every task."""
        if self._stopping or self._nursery is None:
            return
        self._stopping = True
        await self._send_to_peer(self.encoder.close())
        self._handle_events(self.decoder.close(), trio.current_time())
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
            dropped=sum(self.drop_counts().values()),
        )

    # ------------------------------------------------------------ tasks
    async def _client_loop(self) -> None:
        """Sender: applications' datagrams -> flows -> encoder -> link."""
        reader = DatagramReader(self._app_sock, coalesce=True)
        flows = self.flows
        assert isinstance(flows, ClientFlowTable)
        unseen = object()  # a client not yet looked up in this batch (None = every flow protected)
        while True:
            batch = await reader.read_batch()
            now = trio.current_time()
            # One flow-table lookup per client per batch: all of a batch shares one `now`, so
            # repeating it per datagram would only redo the same bookkeeping.
            flow_of: dict = {}
            items: list[tuple[bytes, int]] = []
            for data, address in batch:
                flow = flow_of.get(address, unseen)
                if flow is unseen:
                    flow = flow_of[address] = flows.request(address, now)
                if flow is None:
                    self._drops[DropReason.FLOW_LIMIT] += 1
                    continue
                items.append((data, flow))
            await self._encode_and_send(items, now)

    async def _encode_and_send(self, items: list[tuple[bytes, int]], now: float) -> None:
        """Frame a batch (blocks it fills share codec calls, see BlockEncoder.send_batch) and
        put it on the link.  Both roles: the sender's client datagrams, the receiver's replies."""
        encoder = self.encoder
        oversize = encoder.stats.dropped.get(DropReason.OVERSIZE, 0)
        try:
            out = encoder.send_batch(items, now)
        except Exception:  # a bug must cost one batch, never the daemon
            self._internal_error("encoder")
            out = []
        dropped = encoder.stats.dropped.get(DropReason.OVERSIZE, 0) - oversize
        if dropped:
            log_event(
                log,
                logging.DEBUG,
                "dropped",
                reason=DropReason.OVERSIZE,
                count=dropped,
                detail=f"datagrams over max_datagram {encoder.settings.max_datagram} bytes",
            )
        await self._send_to_peer(out)
        self._reschedule()

    def _internal_error(self, where: str) -> None:
        self._drops[DropReason.INTERNAL_ERROR] += 1
        log_exception(log, "internal_error", where=where)

    async def _link_loop(self) -> None:
        """Both roles: link packets -> decoder -> applications."""
        # The peer sends with GSO, so with GRO a burst of its packets is one read (see udp.py).
        reader = DatagramReader(self._link_sock, coalesce=True)
        receive = self.decoder.receive
        estimator = self.estimator
        learn = self.config.role == "receiver" and self.config.link.peer is None
        while True:
            batch = await reader.read_batch()
            now = trio.current_time()
            deliveries: list[Delivery] = []
            for data, address in batch:
                try:
                    events, in_session = receive(data, now)
                except Exception:  # a bug must cost one packet, never the daemon
                    self._internal_error("decoder")
                    continue
                valid = True
                for event in events:
                    kind = type(event)
                    if kind is Delivery:
                        deliveries.append(event)
                    elif kind is BlockReport and not event.lost and event.span:
                        # A block with nothing lost is one run of arrivals, a segment of its own.
                        estimator.observe_block(event.arrived_mask, event.span)
                        self.feedback.observe_block(event.arrived_mask, event.span)
                    elif kind is SessionStarted and event.previous is not None and self.upstreams is not None:
                        # A restarted sender numbers its flows afresh: what came before belongs
                        # to the old conversations, which all end now.
                        await self._deliver(deliveries, now)
                        deliveries = []
                        self.upstreams.close_ended(self.flows.clear())
                        self._handle_event(event, now)
                    else:
                        valid = valid and kind is not Dropped
                        self._handle_event(event, now)
                if self._key_check_due:
                    await self._send_key_check(address)
                # The peer is learnt only from a valid packet of the replied-to session (see
                # protocol.decoder: it changes only once it has been quiet for the hold time) that
                # dropped nothing: a stranger's packets of a session of its own never move it.
                if learn and in_session and valid and address != self.peer:
                    if self.peer is not None:
                        log_event(
                            log,
                            logging.INFO,
                            "peer_changed",
                            old=format_sockaddr(self.peer),
                            new=format_sockaddr(address),
                        )
                    self.peer = address
            await self._deliver(deliveries, now)
            self._reschedule()
            settled = self.decoder.received_code.settled
            if settled is not None and settled != self._logged_code:
                self._log_peer_code(*settled)

    async def _send_key_check(self, source) -> None:
        """After logging that the peer's packets carry a key (or encryption mode) we do not share,
        send it one key check sealed with ours (at most once per log interval, as the log line),
        so its log says the same: to the configured or learned peer, else to the packet's source
        (one small packet a minute cannot amplify a forged source into anything)."""
        self._key_check_due = False
        if self.encoder.sealer is None:
            return
        await self._link_writer.send([self.encoder.control(KEY_CHECK_BODY)], self.peer or source)

    async def _timer_loop(self) -> None:
        while True:
            deadline = self._next_deadline()
            with trio.CancelScope(deadline=deadline) as scope:
                self._timer_scope = scope
                await trio.sleep_forever()
            self._timer_scope = None
            now = trio.current_time()
            await self._send_to_peer(self.encoder.on_timer(now))
            self._handle_events(self.decoder.on_timer(now), now)
            await self._send_to_peer(self.feedback.on_timer(now))
            expired = self.flows.expire(now)
            if self.upstreams is not None:
                self.upstreams.close_ended(expired)

    async def _signal_loop(self, signals) -> None:
        async for signum in signals:
            if signum == signal.SIGHUP:
                self.reload()
            elif not self._stopping:
                log_event(log, logging.INFO, "stopping", signal=signal.Signals(signum).name)
                await self.stop()
            # A repeated SIGTERM/SIGINT while stopping changes nothing: the flush is under way.

    # ------------------------------------------------------------ helpers
    def reload(self, config: Config | None = None) -> bool:
        """Apply new FEC, decoder and flow-timeout settings from the next block on; keep flows.

        Flow timeouts and ``flows.protect_s`` apply at once; ``flows.max`` needs a restart.

        ``config`` defaults to the config file read again.  Settings that need a restart
        (settings.RESTART_KEYS, RESTART_FIELDS) are reported and left as they are.
        """
        try:
            new = config if config is not None else read_new_config(self.config_path)
        except ReloadRejected as rejected:
            self._reloads["rejected"] += 1
            log_event(log, logging.ERROR, "reload_rejected", errors=rejected.errors)
            return False
        fixed = needs_restart(self.config, new)
        if fixed:
            log_event(log, logging.WARNING, "reload_needs_restart", keys=",".join(fixed))
        self.feedback.configure(new, encoder_settings(new), trio.current_time())
        self.decoder.settings = decoder_settings(new)
        self._apply_keys(new)
        apply_flow_timeouts(self.flows, new)
        self.config = keep_fixed(self.config, new)
        self._reloads["applied"] += 1
        log_event(
            log,
            logging.INFO,
            "reloaded",
            k=new.fec.block_size,
            m=self.encoder.settings.repair,
            flush_ms=new.fec.flush_ms,
        )
        self._reschedule()
        return True

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
            log_event(log, logging.INFO, "keys", auth=repr(keys) if keys is not None else "off")

    def _log_peer_code(self, k: int, m: int) -> None:
        """The code the peer sends with, as its repair packets show it (settled: a later block has
        begun): INFO the first time per peer session, DEBUG when it changes later (an adapting
        peer changes m often)."""
        first = self._logged_code is None
        self._logged_code = (k, m)
        log_event(
            log,
            logging.INFO if first else logging.DEBUG,
            "peer_code",
            k=k,
            m=m,
            detail="decoding the peer's blocks (k from its repair packets, m = highest repair ESI - k + 1)",
        )

    async def _stats_loop(self, interval: float) -> None:
        """One INFO line every ``interval`` seconds with the counters since the previous line, so
        a long run shows it is alive and what the link did without a metrics endpoint."""
        previous = self._stats_snapshot()
        while True:
            await trio.sleep(interval)
            now = self._stats_snapshot()
            delta = {key: now[key] - previous[key] for key in now}
            previous = now
            expected = delta["lost"] + delta["received_source"]
            log_event(
                log,
                logging.INFO,
                "stats",
                interval_s=interval,
                datagrams_in=delta["datagrams_in"],
                datagrams_out=delta["delivered"],
                link_packets_in=delta["received_source"] + delta["received_repair"],
                link_packets_out=delta["source_sent"] + delta["repair_sent"],
                # Ratios of the interval's source datagrams; "-" when the peer sent none.
                link_loss=round(delta["lost"] / expected, 6) if expected else "-",
                residual_loss=round(delta["unrecovered"] / expected, 6) if expected else "-",
                recovered=delta["recovered"],
                dropped=delta["dropped"],
                flows=len(self.flows),
            )

    def _stats_snapshot(self) -> dict[str, int]:
        counts = self.summary()
        counts["datagrams_in"] = self.encoder.stats.source_packets  # one source packet per datagram taken in
        return counts

    def _next_deadline(self) -> float:
        cores = (
            self.encoder.next_deadline(),
            self.decoder.next_deadline(),
            self.flows.next_deadline(),
            *self.feedback.deadlines(),
        )
        deadlines = [d for d in cores if d is not None]
        return min(deadlines) if deadlines else math.inf

    def _reschedule(self) -> None:
        if self._timer_scope is not None:
            self._timer_scope.deadline = self._next_deadline()

    async def _send_to_peer(self, packets: list[bytes]) -> None:
        if not packets:
            return
        if self.peer is None:
            self._drops[DropReason.NO_PEER] += len(packets)
            return
        await self._link_writer.send(packets, self.peer)

    def _handle_events(self, events, now: float) -> None:
        for event in events:
            self._handle_event(event, now)

    def _handle_event(self, event, now: float) -> None:
        kind = type(event)
        if kind is BlockReport:
            # One segment per block: repair positions sit between blocks on the link, so chaining
            # blocks would bias the burst estimate (see linkmodel.estimator.LossEstimator).
            self.estimator.observe_block(event.arrived_mask, event.span)
            self.feedback.observe_block(event.arrived_mask, event.span)
            if event.unrecovered:
                log_event(
                    log,
                    logging.DEBUG,
                    "block_unrecovered",
                    sbn=event.sbn,
                    k=event.k,
                    lost=event.lost,
                    outcome=event.outcome,
                )
        elif kind is Dropped:
            if event.reason is DropReason.AUTH and event.error is not None:
                # One line per kind of failure per interval: a peer with the wrong key says so
                # plainly, a flood of forgeries does not flood the log.
                line = self.auth_notice.note(event.error, now)
                if line is not None:
                    log_event(log, logging.WARNING, "auth_failed", kind=event.error.kind, detail=line)
                    self._key_check_due = event.error.kind in KEY_FAULT_KINDS
            else:
                log_event(log, logging.DEBUG, "dropped", reason=event.reason, detail=event.detail)
        elif kind is ControlReceived:
            drop = self.feedback.on_control(event, now)
            if drop is not None:
                self._drops[drop.reason] += 1
                self._handle_event(drop, now)
        elif kind is SessionStarted:
            self._logged_code = None  # a new peer session: its code is logged afresh
            log_event(
                log,
                logging.INFO,
                "peer_session",
                session=f"{event.session:08x}",
                previous=f"{event.previous:08x}" if event.previous is not None else "-",
            )

    async def _deliver(self, deliveries: list[Delivery], now: float) -> None:
        if not deliveries:
            return
        by_destination: dict[int, list[bytes]] = {}
        for delivery in deliveries:
            if delivery.recovered:
                self.recovery_delay.observe(delivery.delay)
            datagrams = by_destination.get(delivery.flow)
            if datagrams is None:
                by_destination[delivery.flow] = [delivery.data]
            else:
                datagrams.append(delivery.data)
        upstreams = self.upstreams
        for flow, datagrams in by_destination.items():
            if upstreams is None:  # sender: back to the client whose conversation this is now
                client = self.flows.reply(flow, now)
                if client is None:
                    self._drops[DropReason.UNKNOWN_FLOW] += len(datagrams)
                    continue
                await self._app_writer.send(datagrams, client)
            else:  # receiver: to the server, from this conversation's own socket
                writer = upstreams.writer_for(flow, now, len(datagrams))
                if writer is None:
                    continue  # counted in upstreams.drops
                await writer.send(datagrams, upstreams.forward)
