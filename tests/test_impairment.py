"""The sans-IO impaired link, driven with a fake clock: no sockets, no sleeps."""

from __future__ import annotations

import math

import numpy as np
import pytest

from fecproxy.linkmodel import impairment
from fecproxy.linkmodel.impairment import (
    IPV4_UDP_HEADER_BYTES,
    IPV6_UDP_HEADER_BYTES,
    Blackout,
    ImpairedLink,
    ImpairmentConfigError,
    LinkImpairment,
    parse_duration,
)
from fecproxy.linkmodel.loss_models import GilbertElliott

SIGMAS = 4.0


def drain_all(link: ImpairedLink, limit: int = 1_000_000) -> list[tuple[float, bytes]]:
    """Jump the fake clock from deadline to deadline until nothing is in flight."""
    out: list[tuple[float, bytes]] = []
    for _ in range(limit):
        deadline = link.next_deadline()
        if deadline is None:
            return out
        out.extend((deadline, d) for d in link.due(deadline))
    raise AssertionError("link never drained")


def test_clean_link_passes_everything_at_once_in_order():
    link = ImpairedLink(LinkImpairment())
    for i in range(5):
        link.submit(b"%d" % i, now=1.0)
    assert link.next_deadline() == 1.0
    assert link.due(1.0) == [b"0", b"1", b"2", b"3", b"4"]
    assert link.next_deadline() is None
    stats = link.stats()
    assert (stats.submitted, stats.sent, stats.delivered, stats.lost) == (5, 5, 5, 0)


def test_fixed_delay():
    link = ImpairedLink(LinkImpairment(delay=0.25))
    link.submit(b"a", now=10.0)
    assert link.due(10.2) == []
    assert link.next_deadline() == pytest.approx(10.25)
    assert link.due(10.25) == [b"a"]


def test_jitter_without_reordering_keeps_order_and_bounds():
    link = ImpairedLink(LinkImpairment(delay=0.05, jitter=0.02), seed=1)
    sent = {}
    for i in range(2000):
        now = i * 0.001  # 1 kpps: jitter far larger than the spacing, so reordering would be easy
        sent[b"%d" % i] = now
        link.submit(b"%d" % i, now=now)
    out = drain_all(link)
    assert [d for _, d in out] == [b"%d" % i for i in range(2000)]
    delays = np.array([t - sent[d] for t, d in out])
    assert delays.min() >= 0.03 - 1e-12 and delays.max() <= 0.07 + 1e-12


def test_jitter_with_reordering_is_uniform_around_the_delay():
    link = ImpairedLink(LinkImpairment(delay=0.05, jitter=0.02, reorder=True), seed=2)
    sent = {}
    count = 5000
    for i in range(count):
        sent[b"%d" % i] = i * 0.001
        link.submit(b"%d" % i, now=i * 0.001)
    out = drain_all(link)
    order = [int(d) for _, d in out]
    assert order != sorted(order)  # some overtaking happened
    delays = np.array([t - sent[d] for t, d in out])
    assert delays.min() >= 0.03 - 1e-12 and delays.max() <= 0.07 + 1e-12
    # Uniform on [delay − j, delay + j]: mean = delay, SD = j/√3 (uniform distribution).
    assert abs(delays.mean() - 0.05) < SIGMAS * (0.02 / math.sqrt(3)) / math.sqrt(count)


def test_jitter_never_delivers_before_sending():
    link = ImpairedLink(LinkImpairment(delay=0.001, jitter=0.01, reorder=True), seed=3)
    for i in range(500):
        link.submit(b"x", now=float(i))
        assert link.next_deadline() >= float(i)
        link.due(float(i) + 1.0)


def test_duplication_rate():
    # Binomial proportion of duplicated datagrams: SE = sqrt(q(1−q)/N).
    q, count = 0.1, 20_000
    link = ImpairedLink(LinkImpairment(duplicate=q), seed=4)
    out = []
    for i in range(count):
        link.submit(b"%d" % i, now=float(i))
        out.extend(link.due(float(i)))
    stats = link.stats()
    assert len(out) == count + stats.duplicates == stats.delivered
    assert abs(stats.duplicates / count - q) < SIGMAS * math.sqrt(q * (1 - q) / count)


def test_packet_rate_cap_spaces_departures():
    link = ImpairedLink(LinkImpairment(rate_pps=100, queue_packets=50))
    for i in range(10):
        link.submit(b"%d" % i, now=0.0)
    times = [t for t, _ in drain_all(link)]
    # each datagram comes out when its 10 ms transmission ends
    np.testing.assert_allclose(times, [0.01 * (i + 1) for i in range(10)], rtol=1e-12)


def test_bit_rate_cap_counts_headers():
    link = ImpairedLink(LinkImpairment(rate_bps=64_000, queue_packets=10))
    link.submit(bytes(172), now=0.0)
    # (172 + 28) bytes × 8 / 64 kbit/s = 25 ms
    assert link.next_deadline() == pytest.approx((172 + IPV4_UDP_HEADER_BYTES) * 8 / 64_000)
    assert IPV4_UDP_HEADER_BYTES == 20 + 8  # IPv4 header without options (RFC 791 §3.1) + UDP header (RFC 768)


def test_bit_rate_cap_counts_ipv6_headers():
    link = ImpairedLink(LinkImpairment(rate_bps=64_000, queue_packets=10), header_bytes=IPV6_UDP_HEADER_BYTES)
    link.submit(bytes(152), now=0.0)
    # (152 + 48) bytes × 8 / 64 kbit/s = 25 ms
    assert link.next_deadline() == pytest.approx(0.025)
    assert IPV6_UDP_HEADER_BYTES == 40 + 8  # IPv6 fixed header (RFC 8200 §3) + UDP header (RFC 768)


def test_full_buffer_tail_drops_and_recovers():
    link = ImpairedLink(LinkImpairment(rate_pps=10, queue_packets=5))
    for i in range(20):
        link.submit(b"%d" % i, now=0.0)
    stats = link.stats(now=0.0)
    assert (stats.queue_drops, stats.queued) == (15, 5)
    # Tail drop: the first five were kept.
    assert [d for _, d in drain_all(link)] == [b"0", b"1", b"2", b"3", b"4"]
    # 0.5 s later the buffer has drained and accepts again.
    link.submit(b"late", now=0.5)
    assert link.stats(now=0.5).queue_drops == 15
    assert link.stats(now=0.5).queued == 1


def test_buffer_admits_as_transmissions_finish():
    link = ImpairedLink(LinkImpairment(rate_pps=10, queue_packets=2))
    accepted = 0
    for i in range(100):  # offered at 20/s into a 10/s link: about half must be dropped
        before = link.stats().queue_drops
        link.submit(b"x", now=i * 0.05)
        accepted += link.stats().queue_drops == before
    assert accepted == pytest.approx(50, abs=3)


def test_blackout_schedule():
    outage = Blackout(duration=3.0, period=60.0)
    assert not outage.active(0.0) and not outage.active(59.99)
    assert outage.active(60.0) and outage.active(62.99) and not outage.active(63.0)
    assert outage.active(121.0) and not outage.active(125.0)
    link = ImpairedLink(LinkImpairment(blackout=outage), start=100.0)
    for tenth in range(0, 1300):
        link.submit(b"x", now=100.0 + tenth / 10)
    stats = link.stats()
    # 130 s at 10/s; outages at [60, 63) and [120, 123): 2 × 30 datagrams
    assert stats.blackout_drops == 60
    assert stats.delivered + len(link.due(1e9)) == 1300 - 60


def test_blackout_parsing():
    assert Blackout.parse("3s/60s") == Blackout(3.0, 60.0, 60.0)
    assert Blackout.parse("500ms/10s@2s") == Blackout(0.5, 10.0, 2.0)
    assert Blackout.parse("3/60") == Blackout(3.0, 60.0)
    assert Blackout.parse("none") is None
    assert parse_duration("250ms") == 0.25
    for bad in ("3s", "3s/2s", "x/60s", "0s/60s", "3s/60s@-1s"):
        with pytest.raises(ImpairmentConfigError):
            Blackout.parse(bad)


def test_rate_cap_and_blackout_use_transmission_start():
    # A datagram queued before an outage but put on the air during it is lost.
    link = ImpairedLink(LinkImpairment(rate_pps=1, queue_packets=10, blackout=Blackout(1.0, 100.0, 1.5)))
    link.submit(b"a", now=0.0)  # on air 0..1
    link.submit(b"b", now=0.0)  # on air 1..2: starts before the outage
    link.submit(b"c", now=0.0)  # on air 2..3: starts inside [1.5, 2.5)
    link.submit(b"d", now=0.0)  # on air 3..4
    assert [d for _, d in drain_all(link)] == [b"a", b"b", b"d"]
    assert link.stats().blackout_drops == 1


def test_loss_model_statistics_over_the_link():
    # Over 10^5 datagrams the link's measured loss and mean burst match the configuration:
    # loss within 4σ of a two-state chain's occupation fraction (σ² = π(1−π)/N·(1+λ)/(1−λ),
    # λ = 1 − p − r, from memory), burst within 4σ of a geometric(r) mean (σ² = (1−r)/r²/M).
    params = GilbertElliott.from_loss_burst(0.08, 2.5)
    link = ImpairedLink(LinkImpairment(loss=params), seed=9)
    count = 100_000
    for i in range(count):
        link.submit(b"x", now=i * 1e-3)
        link.due(i * 1e-3)
    stats = link.stats()
    pi, lam = params.stationary_bad, 1 - params.p - params.r
    assert abs(stats.measured_loss - 0.08) < SIGMAS * math.sqrt(pi * (1 - pi) / count * (1 + lam) / (1 - lam))
    bursts = stats.lost / stats.measured_mean_burst
    assert abs(stats.measured_mean_burst - 2.5) < SIGMAS * math.sqrt((1 - params.r) / bursts) / params.r
    assert stats.lost + stats.delivered + stats.in_flight == count


def test_accounting_identity_with_everything_on():
    config = LinkImpairment(
        loss=GilbertElliott.from_loss_burst(0.1, 2),
        delay=0.02,
        jitter=0.01,
        reorder=True,
        duplicate=0.05,
        rate_pps=500,
        queue_packets=8,
        blackout=Blackout(0.2, 2.0),
    )
    link = ImpairedLink(config, seed=10)
    for i in range(5000):
        link.submit(b"x", now=i * 0.0015)  # offered above the 500/s cap
    delivered = len(drain_all(link))
    s = link.stats()
    assert s.submitted == s.sent + s.queue_drops + s.blackout_drops
    assert s.sent == s.lost + (delivered - s.duplicates) + s.in_flight_drops
    assert min(s.queue_drops, s.blackout_drops, s.lost, s.duplicates) > 0
    assert sum(s.drops.values()) == s.lost + s.queue_drops + s.blackout_drops + s.in_flight_drops


def test_in_flight_limit_is_counted(monkeypatch):
    monkeypatch.setattr(impairment, "MAX_IN_FLIGHT_PACKETS", 10)
    link = ImpairedLink(LinkImpairment(delay=1.0))
    for _ in range(25):
        link.submit(b"x", now=0.0)
    stats = link.stats()
    assert (stats.in_flight, stats.in_flight_drops) == (10, 15)


def test_same_seed_same_link():
    config = LinkImpairment(loss=GilbertElliott.from_loss_burst(0.2, 3), jitter=0.01, reorder=True, duplicate=0.1)

    def run(seed):
        link = ImpairedLink(config, seed=seed)
        for i in range(3000):
            link.submit(b"%d" % i, now=i * 0.001)
        return drain_all(link)

    assert run(5) == run(5)
    assert run(5) != run(6)


@pytest.mark.parametrize(
    "kwargs,message",
    [
        (dict(delay=-1), "delay"),
        (dict(jitter=float("nan")), "jitter"),
        (dict(duplicate=2), "duplicate"),
        (dict(rate_bps=0), "rate_bps"),
        (dict(queue_packets=0), "queue_packets"),
        (dict(loss=0.1), "GilbertElliott"),
    ],
)
def test_bad_config_is_a_typed_error(kwargs, message):
    with pytest.raises(ImpairmentConfigError, match=message):
        LinkImpairment(**kwargs)
