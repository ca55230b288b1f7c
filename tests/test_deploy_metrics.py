"""The byte counters behind the dashboard's repair overhead in bytes: the encoder counts exactly
the bytes of the packets it returns, one by one or in batches, and /metrics exports them."""

from __future__ import annotations

import random

from prometheus_client import CollectorRegistry, generate_latest
from support.stand_in_view import StandInView

from fecproxy.protocol import wire
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


def stand_in(encoder: BlockEncoder) -> StandInView:
    """A sender's view with this encoder's counters and nothing received."""
    return StandInView(
        role="sender",
        encoder_stats=encoder.stats,
        block_shape=(encoder.settings.block_size, encoder.settings.repair),
        interleave=encoder.settings.interleave,
        size_class_names=encoder.settings.class_names,
        flows=0,
        estimate=None,
        received_code=(None, None),
    )


def test_metrics_export_the_byte_counters():
    encoder = BlockEncoder(EncoderSettings(block_size=4, repair=2), session=7)
    for data in datagrams(4, seed=3):
        encoder.send(data, flow=0, now=0.0)
    registry = CollectorRegistry(auto_describe=False)
    registry.register(DaemonCollector(stand_in(encoder)))
    text = generate_latest(registry).decode()
    assert f"fecproxy_source_bytes_sent_total {float(encoder.stats.source_bytes)}" in text
    assert f"fecproxy_repair_bytes_sent_total {float(encoder.stats.repair_bytes)}" in text
