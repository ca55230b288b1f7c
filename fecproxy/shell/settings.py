"""A daemon's core settings from its config, at start and on a SIGHUP reload.

The cores can take new FEC, decoder and flow settings between blocks, so a reload applies those
without dropping a flow (flow timeouts and the protected interval included).  What is bound to
sockets or to the process's shape (role, addresses, metrics endpoint, socket buffers, logging,
the flow table's size) cannot change under a running daemon: a reload reports such a change and
keeps the running values until a restart.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

from fecproxy.config import Config, ConfigError, load_config
from fecproxy.linkmodel.adaptation import AdaptPolicy
from fecproxy.linkmodel.feedback import Feedback
from fecproxy.protocol.auth import Keyring, Sealer
from fecproxy.protocol.decoder import DecoderSettings
from fecproxy.protocol.encoder import BlockEncoder, EncoderSettings
from fecproxy.protocol.flows import ClientFlowTable, PeerFlowTable
from fecproxy.protocol.sliding_encoder import SlidingEncoder, SlidingSettings

#: Config sections a reload cannot apply (they need new sockets or another role; logging is set
#: up once by the command, whose --log-level/--log-format may override it; the delivery order is
#: kept, since switching it mid-stream would reorder what waits): a change to one is reported,
#: and the running value is kept.
RESTART_KEYS = ("role", "listen", "forward", "link", "metrics", "sockets", "log", "delivery")
#: Single keys a reload cannot apply: the flow table is built at its size once.
RESTART_FIELDS = ("flows.max", "fec.code")


class ReloadRejected(Exception):
    """The new config could not be used; ``errors`` is one line for the log."""

    def __init__(self, errors: str):
        super().__init__(errors)
        self.errors = errors


def adapt_policy(config: Config) -> AdaptPolicy | None:
    """The controller's policy from ``fec`` and ``fec.adapt``; None when m is fixed."""
    fec, adapt = config.fec, config.fec.adapt
    if adapt is None or not config.reports.enabled:
        return None
    return AdaptPolicy(
        block_size=fec.block_size,
        target_residual=adapt.target_residual,
        min_repair=min(adapt.min_repair, adapt.repair_ceiling(fec.block_size)),
        max_repair=adapt.repair_ceiling(fec.block_size),
        max_overhead=adapt.max_overhead,
        report_interval=config.reports.interval_ms / 1000,
        allow_repair_above_source=fec.allow_repair_above_source,
        short_block_repair=str(fec.short_block_repair),
        flush_interval=fec.flush_seconds,
        depths=(fec.interleave,),  # the sender's configured D: m is chosen for the layout it sends
        air_rate_bps=config.link.rate,  # the headroom the source leaves bounds the repair
    )


def configure_feedback(feedback: Feedback, config: Config, now: float) -> None:
    """Loss reports and adaptation as ``config`` says (at start and on a reload)."""
    interval = config.reports.interval_ms if config.reports.enabled else None
    feedback.configure(adapt_policy(config), interval, encoder_settings(config), now)


def encoder_settings(config: Config) -> EncoderSettings:
    fec = config.fec
    return EncoderSettings(
        block_size=fec.block_size,
        repair=fec.repair,
        flush_interval=fec.flush_seconds,
        max_datagram=fec.max_datagram_bytes,
        short_block_repair=str(fec.short_block_repair),
        interleave=fec.interleave,
        size_classes=fec.size_classes,
        allow_repair_above_source=fec.allow_repair_above_source,
    )


def sliding_settings(config: Config) -> SlidingSettings:
    """fec.code: sliding — the window, its age, the repair interval and the flush time."""
    fec = config.fec
    return SlidingSettings(
        window=fec.window,
        window_age=fec.window_ms / 1000,
        repair_interval=fec.repair_interval,
        flush=fec.flush_seconds,
        max_datagram=fec.max_datagram_bytes,
    )


def make_encoder(config: Config, session: int, sealer: Sealer | None) -> BlockEncoder | SlidingEncoder:
    """The encoder of ``fec.code``: blocks, or the sliding window (which the same loops drive)."""
    if config.fec.code == "sliding":
        return SlidingEncoder(
            sliding_settings(config),
            session,
            sealer=sealer,
            reference=encoder_settings(config),
            follow_repair=config.fec.adapt is not None,
        )
    return BlockEncoder(encoder_settings(config), session, sealer=sealer)


def apply_sliding(encoder: BlockEncoder | SlidingEncoder, config: Config) -> None:
    """A reload's window, age, interval and flush (fec.code itself needs a restart)."""
    if isinstance(encoder, SlidingEncoder) and config.fec.code == "sliding":
        encoder.follow_repair = config.fec.adapt is not None
        encoder.update(sliding_settings(config))


def decoder_settings(config: Config) -> DecoderSettings:
    return DecoderSettings(
        hold_time=config.decoder.hold_seconds,
        max_open_blocks=config.decoder.max_open_blocks,
        max_datagram=config.fec.max_datagram_bytes,
        max_memory_bytes=config.decoder.max_memory_bytes,
        max_rebuilds_per_s=config.decoder.max_rebuilds_per_s,
    )


def keyring(config: Config) -> Keyring | None:
    """The keys the config names (already read and checked by load_config), or None."""
    section = config.auth
    if not section.enabled or section.key is None:
        return None
    return Keyring(section.key, section.previous_key, encrypt=section.encrypt)


def flow_table(config: Config) -> ClientFlowTable | PeerFlowTable:
    """The sender's table of client addresses, or the receiver's table of the peer's flow ids."""
    flows = config.flows
    table = ClientFlowTable if config.role == "sender" else PeerFlowTable
    return table(
        flows.max,
        first_exchange_timeout=float(flows.first_exchange_timeout_s),
        idle_timeout=float(flows.idle_timeout_s),
        protect=float(flows.protect_s),
    )


def apply_flow_timeouts(table: ClientFlowTable | PeerFlowTable, config: Config) -> None:
    """A reload's new timeouts and protected interval; they apply from the next check on.  The
    table's size (``flows.max``) needs a restart: it sizes the receiver's descriptor budget."""
    flows = config.flows
    table.first_exchange_timeout = float(flows.first_exchange_timeout_s)
    table.idle_timeout = float(flows.idle_timeout_s)
    table.protect = float(flows.protect_s)


def read_new_config(path: str | Path | None) -> Config:
    """The config file as it is now; raises ReloadRejected saying why it cannot be used."""
    if path is None:
        raise ReloadRejected("this daemon was started without a config file, so there is nothing to reload")
    try:
        return load_config(path)
    except ConfigError as error:  # also covers an unreadable file (ConfigUnreadable)
        raise ReloadRejected("; ".join(error.messages)) from None


def _field(config: Config, path: str):
    section, key = path.split(".")
    return getattr(getattr(config, section), key)


def needs_restart(running: Config, new: Config) -> list[str]:
    """The RESTART_KEYS sections and RESTART_FIELDS keys that differ between the running config
    and the new one: what the reload leaves as it was."""
    changed = [key for key in RESTART_KEYS if getattr(new, key) != getattr(running, key)]
    return changed + [path for path in RESTART_FIELDS if _field(new, path) != _field(running, path)]


def keep_fixed(running: Config, new: Config) -> Config:
    """The running config after a reload: the new tunables, the running sockets, addresses,
    logging and flow-table size (what ``needs_restart`` reports), so it shows what is in force."""
    kept = dataclasses.replace(new, **{key: getattr(running, key) for key in RESTART_KEYS})
    for path in RESTART_FIELDS:
        section, key = path.split(".")
        kept = dataclasses.replace(
            kept, **{section: dataclasses.replace(getattr(kept, section), **{key: _field(running, path)})}
        )
    return kept
