"""The byte counters behind the dashboard's repair overhead in bytes: the encoder counts exactly
the bytes of the packets it returns, one by one or in batches, and /metrics exports them."""

from __future__ import annotations

import random

from prometheus_client import CollectorRegistry, generate_latest

from fecproxy.linkmodel.feedback import Feedback
from fecproxy.protocol import wire
from fecproxy.protocol.decoder import BlockDecoder
from fecproxy.protocol.encoder import BlockEncoder, EncoderSettings
from fecproxy.shell.metrics import DaemonCollector


def datagrams(count: int, seed: int) -> list[bytes]:
    rng = random.Random(seed)
    return [bytes(rng.randrange(256) for _ in range(rng.randrange(1, 300))) for _ in range(count)]


def split(packets: list[bytes]) -> tuple[int, int]:
    """(source bytes, repair bytes) of link packets, told apart by their type field."""
    source = sum(len(p) for p in packets if p[0] & 0x0F == wire.PacketType.SOURCE)
    return source, sum(len(p) for p in packets) - source


def test_send_and_timer_count_the_bytes_they_return():
    encoder = BlockEncoder(EncoderSettings(block_size=8, repair=3, flush_interval=0.02), session=5)
    packets = []
    for i, data in enumerate(datagrams(21, seed=1)):
        packets += encoder.send(data, flow=1, now=i * 0.001)
    packets += encoder.on_timer(1.0)  # the last block closes short
    assert (encoder.stats.source_bytes, encoder.stats.repair_bytes) == split(packets)
    assert encoder.stats.repair_bytes > 0


def test_send_batch_counts_the_bytes_it_returns():
    encoder = BlockEncoder(EncoderSettings(block_size=8, repair=3, max_datagram=250), session=6)
    batch = [(data, 2) for data in datagrams(40, seed=2)]  # some above max_datagram: dropped
    packets = encoder.send_batch(batch, now=0.0) + encoder.close()
    assert (encoder.stats.source_bytes, encoder.stats.repair_bytes) == split(packets)


class _Daemon:
    """Just what the collector reads (shell.metrics.DaemonView)."""

    def __init__(self, encoder):
        self.encoder_stats = encoder.stats
        self.decoder_stats = type(
            "S",
            (),
            {
                "source_received": 0,
                "repair_received": 0,
                "lost": 0,
                "recovered": 0,
                "unrecovered": 0,
                "delivered": 0,
                "repair_unneeded": 0,
                "blocks": {},
            },
        )()
        self.role = "sender"
        self.block_shape = (encoder.settings.block_size, encoder.settings.repair)
        self.interleave = encoder.settings.interleave
        self.size_class_names = encoder.settings.class_names
        self.reloads = {"applied": 0, "rejected": 0}
        self.feedback = Feedback(BlockEncoder(EncoderSettings(), 1), BlockDecoder())  # no reports yet

    def drop_counts(self):
        return {}

    def send_errors(self):
        return 0

    def flow_count(self):
        return 0

    def link_figures(self):
        return None  # not paced

    def flows_evicted(self):
        return 0

    def loss_estimate(self):
        return None

    received_code = (None, None)


def test_metrics_export_the_byte_counters():
    encoder = BlockEncoder(EncoderSettings(block_size=4, repair=2), session=7)
    for data in datagrams(4, seed=3):
        encoder.send(data, flow=0, now=0.0)
    registry = CollectorRegistry(auto_describe=False)
    registry.register(DaemonCollector(_Daemon(encoder)))
    text = generate_latest(registry).decode()
    assert f"fecproxy_source_bytes_sent_total {float(encoder.stats.source_bytes)}" in text
    assert f"fecproxy_repair_bytes_sent_total {float(encoder.stats.repair_bytes)}" in text
