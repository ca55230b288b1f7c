"""The loopback demo: the whole command as a subprocess, and its pure helpers in-process.

The figures in the demo's scenario (weather station, radio relay) are invented; the checks here
compare the demo's arithmetic with references it did not write.
"""

from __future__ import annotations

import io
import math
import re
import subprocess
import sys
from collections import Counter
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from scipy.stats import binom

from fecproxy.commands.demo import render, traffic
from fecproxy.commands.demo.tap import LinkTap
from fecproxy.linkmodel.impairment import ImpairedLink, LinkImpairment
from fecproxy.linkmodel.loss_models import GilbertElliott
from fecproxy.linkmodel.planner import evaluate
from fecproxy.protocol import wire
from fecproxy.protocol.encoder import BlockEncoder, EncoderSettings

REPO = Path(__file__).resolve().parent.parent
ROW = re.compile(r"datagrams lost\s+(\d+) of (\d+) \(([\d.]+) %\)\s+(\d+) of (\d+) \(([\d.]+) %\)")


# -- the whole command ------------------------------------------------------------------------


@pytest.mark.slow
def test_demo_command_shows_fec_lowering_loss_without_corruption():
    completed = subprocess.run(
        [sys.executable, "-m", "fecproxy", "demo", "--seconds", "3", "--no-live", "--metrics-port", "0"],
        cwd=REPO,
        capture_output=True,
        text=True,
        timeout=60,
    )
    out = completed.stdout
    assert completed.returncode == 0, completed.stderr + out
    assert "invented" in out
    assert re.search(r"receiver metrics: http://127\.0\.0\.1:\d+/metrics", out)
    assert "t = " not in out  # --no-live: header and summary only
    match = ROW.search(out)
    assert match, out
    without_lost, sent, _, with_lost, sent_again, _ = match.groups()
    assert int(sent) == int(sent_again) > 0
    assert int(without_lost) > 0, out  # seed 1 loses packets within 3 s
    assert int(with_lost) < int(without_lost), out
    corrupted = re.search(r"corrupted datagrams\s+–\s+(\d+)", out)
    assert corrupted and corrupted.group(1) == "0", out
    assert re.search(r"planner's prediction\s+8\.00 % lost\s+[\d.]+ % lost", out), out


def test_bad_options_exit_2_with_a_message(capsys):
    from fecproxy.cli import main

    assert main(["demo", "--k", "8", "--m", "9"]) == 2
    assert "--m must be 0..8 with --k 8" in capsys.readouterr().err
    assert main(["demo", "--burst", "0.5"]) == 2
    assert "--loss/--burst" in capsys.readouterr().err
    assert main(["demo", "--flush-ms", "0"]) == 2
    assert "--flush-ms: 0 is out of range" in capsys.readouterr().err
    assert main(["demo", "--seconds", "0"]) == 2
    assert "--seconds must be > 0" in capsys.readouterr().err


# -- the application datagram ------------------------------------------------------------------


def test_datagram_round_trip_and_every_single_byte_flip_is_caught():
    data = traffic.pack_datagram(traffic.STREAM_CAMERA, 41, 12.5, b"still image bytes")
    assert traffic.unpack_datagram(data) == traffic.AppDatagram(traffic.STREAM_CAMERA, 41, 12.5, b"still image bytes")
    assert traffic.peek_id(data) == (traffic.STREAM_CAMERA, 41)
    for position in range(len(data)):
        damaged = bytearray(data)
        damaged[position] ^= 0x01
        assert traffic.unpack_datagram(bytes(damaged)) is None
    assert traffic.unpack_datagram(data[:-1]) is None
    assert traffic.unpack_datagram(b"") is None
    assert traffic.unpack_datagram(traffic.pack_datagram(99, 0, 0.0, b"")) is None  # unknown stream


def test_camera_chunks_fit_the_datagram_size_and_reassemble():
    image = bytes(range(256)) * 300  # 76 800 bytes
    chunks = traffic.camera_chunks(7, image)
    sizes = [len(traffic.pack_datagram(traffic.STREAM_CAMERA, i, 0.0, c)) for i, c in enumerate(chunks)]
    assert max(sizes) == traffic.CAMERA_CHUNK_BYTES
    head = traffic.CAMERA_CHUNK_HEADER
    assert [head.unpack_from(c) for c in chunks] == [(7, i, len(chunks)) for i in range(len(chunks))]
    assert b"".join(c[head.size :] for c in chunks) == image


def test_seq_set_counts_distinct_and_reports_duplicates():
    seen = traffic.SeqSet()
    assert seen.add(0) and seen.add(9000) and not seen.add(9000)
    assert 9000 in seen and 1 not in seen and 10**7 not in seen
    assert seen.count == 2


# -- figures ----------------------------------------------------------------------------------


@pytest.mark.parametrize("values", [[3.0], [5.0, 1.0], list(np.linspace(0, 1, 37)), [2.0, 2.0, 9.0, 1.0, 7.0]])
@pytest.mark.parametrize("q", [0, 1, 50, 99, 100])
def test_percentile_is_the_nearest_rank_definition(values, q):
    # Nearest rank = Hyndman & Fan (1996) definition 1, numpy's method="inverted_cdf", as oracle.
    assert render.percentile(values, q) == np.percentile(values, q, method="inverted_cdf")


def test_percentile_of_nothing_is_nan():
    assert math.isnan(render.percentile([], 50))


def test_predicted_residual_weights_blocks_by_their_datagrams():
    # i.i.d. loss p: residual per datagram = p·P[Bin(n−1, p) ≥ m] (design notes), scipy.stats.binom
    # as oracle; a mix of blocks averages it over datagrams, i.e. weighted by k'.
    p = 0.08
    channel = GilbertElliott.bernoulli(p)
    blocks = Counter({(32, 16): 3, (20, 10): 5, (4, 2): 2})

    def iid(k, m):
        return p * binom.sf(m - 1, k + m - 1, p)

    expected = sum(k * count * iid(k, m) for (k, m), count in blocks.items()) / sum(
        k * c for (k, _), c in blocks.items()
    )
    assert render.predicted_residual(channel, blocks) == pytest.approx(expected, rel=1e-9)
    bursty = GilbertElliott.from_loss_burst(0.08, 3)
    assert render.predicted_residual(bursty, Counter({(32, 16): 4})) == evaluate(bursty, 32, 16).residual_loss
    assert render.predicted_residual(bursty, Counter({(5, 0): 1})) == pytest.approx(0.08)  # no repair: the link's loss
    assert math.isnan(render.predicted_residual(bursty, Counter()))


def test_formatting_helpers():
    assert render.fmt_percent(0.0801) == "8.01 %"
    assert render.fmt_percent(0.00042) == "0.042 %"
    assert render.fmt_percent(0) == "0 %"
    assert render.fmt_percent(math.nan) == "–"
    assert (
        render.fmt_ms(0.5123) == "512 ms" and render.fmt_ms(0.00123) == "1.2 ms" and render.fmt_ms(0.0004) == "0.40 ms"
    )
    assert (
        render.fmt_bytes(512) == "512 B"
        and render.fmt_bytes(61_500) == "61.5 kB"
        and render.fmt_bytes(3.1e6) == "3.1 MB"
    )
    assert "no packets" in render.describe_link(GilbertElliott.no_loss())
    assert "independently" in render.describe_link(GilbertElliott.bernoulli(0.05))
    assert "mean burst 3 packets" in render.describe_link(GilbertElliott.from_loss_burst(0.08, 3))


def _result(**changes) -> render.DemoResult:
    fields: dict[str, Any] = dict(
        seconds=20.0,
        seed=1,
        k=32,
        m=16,
        flush_ms=1000,
        channel=GilbertElliott.from_loss_burst(0.08, 3),
        sent=600,
        app_bytes=320_000,
        delivered=597,
        corrupted=0,
        duplicates=0,
        link_source_lost=48,
        source_packets=600,
        repair_packets=300,
        source_wire_bytes=326_600,
        repair_wire_bytes=250_000,
        link_packets=900,
        link_lost=70,
        rebuilt_delays=[0.1, 0.5, 0.9],
        intact_delays=[0.0006] * 10,
        images_sent=4,
        images_complete=4,
        images_complete_without_fec=1,
        acks_sent=80,
        acks_received=79,
        receiver_lost=48,
        receiver_recovered=45,
        receiver_unrecovered=3,
        blocks=Counter({(20, 10): 20, (32, 16): 6}),
    )
    fields.update(changes)
    return render.DemoResult(**fields)


def test_summary_puts_without_and_with_fec_side_by_side():
    text = render.format_summary(_result())
    assert ROW.search(text).groups() == ("48", "600", "8.00", "3", "600", "0.50")
    assert re.search(r"camera stills complete\s+1 of 4\s+4 of 4", text)
    assert re.search(r"corrupted datagrams\s+–\s+0", text)
    assert "+300 repair, 50.00 % overhead" in text
    assert "p50 500 ms, p99 900 ms, max 900 ms (3 rebuilt)" in text
    assert "for the 26 blocks sent" in text
    assert "invented" in text
    assert "ended early" in render.format_summary(_result(interrupted=True))
    assert "nothing needed rebuilding" in render.format_summary(_result(rebuilt_delays=[]))


def test_live_view_redraws_in_place_on_a_terminal_and_prints_plain_lines_otherwise():
    snapshot = render.LiveSnapshot(
        elapsed=1.0,
        rate=31,
        link_packets=100,
        link_lost=8,
        source_sent=70,
        source_lost=6,
        recovered=6,
        unrecovered=0,
        pending=3,
        delay_p50=0.0006,
        rebuilt_p50=0.4,
        acks=2,
    )

    class Terminal(io.StringIO):
        def isatty(self):
            return True

    terminal = Terminal()
    view = render.LiveView(terminal, enabled=True)
    view.show(snapshot)
    view.show(snapshot)
    lines = len(render.format_live(snapshot))
    assert terminal.getvalue().count(f"\x1b[{lines}F") == 1  # cursor back up before the redraw
    assert "link lost 8.00 % of packets, 6 of 70 datagrams" in terminal.getvalue()
    assert "pending 3 (sent, not yet delivered nor given up)" in terminal.getvalue()

    plain = io.StringIO()
    view = render.LiveView(plain, enabled=True)
    for second in range(1, 12):
        view.show(render.LiveSnapshot(**{**snapshot.__dict__, "elapsed": float(second)}))
    assert "\x1b" not in plain.getvalue()
    assert plain.getvalue().count("\n") == 3  # t = 1, 6, 11 s

    silent = io.StringIO()
    render.LiveView(silent, enabled=False).show(snapshot)
    assert silent.getvalue() == ""


def test_pending_counts_datagrams_neither_delivered_nor_given_up():
    assert render.pending(sent=70, delivered=60, unrecovered=4) == 6
    assert render.pending(sent=70, delivered=70, unrecovered=0) == 0
    # The counters are read at slightly different moments: never a negative count.
    assert render.pending(sent=70, delivered=69, unrecovered=3) == 0


def test_readme_states_the_live_view_intervals_the_code_uses():
    readme = " ".join((REPO / "README.md").read_text(encoding="utf-8").split())
    section = readme[readme.index("### What the demo shows") :]
    section = section[: section.index("## Caution")]
    from fecproxy.commands import demo

    assert demo.LIVE_INTERVAL_S == 1.0 and "redrawn once a second in a terminal" in section
    assert f"a plain line every {render.PLAIN_INTERVAL_S:g} s when the output is not a terminal" in section


def test_no_loss_and_burst_one_are_described_in_words_that_fit():
    clean = render.format_summary(
        _result(
            channel=GilbertElliott.no_loss(),
            link_source_lost=0,
            delivered=600,
            link_lost=0,
            rebuilt_delays=[],
            receiver_lost=0,
            receiver_recovered=0,
            receiver_unrecovered=0,
        )
    )
    assert "burst" not in clean and "lossy" not in clean and "scatter" not in clean
    assert "loses no packets" in clean and "0 of 600 (0 %)" in clean
    header = render.format_header(
        render.DemoOptions(loss=0.0),
        GilbertElliott.no_loss(),
        sender=("127.0.0.1", 1),
        relay=("127.0.0.1", 2),
        receiver=("127.0.0.1", 3),
        sink=("127.0.0.1", 4),
        metrics_text="off",
    )
    assert "lossy" not in header and "burst" not in header and "loses no packets" in header

    isolated = GilbertElliott.from_loss_burst(0.08, 1)
    text = render.describe_link(isolated)
    assert text.startswith("loses 8.00 % of packets, never two in a row") and "bursts" not in text
    summary = render.format_summary(_result(channel=isolated))
    assert "bursts" not in summary and "1 packets" not in summary
    assert "few losses, so measured losses scatter" in summary
    assert "mean burst 3 packets" in render.format_summary(_result())
    # An exact prediction far below 0.1 % keeps its significant digits instead of "0.000 %".
    assert render.fmt_percent(2.1e-6) == "0.00021 %" and render.fmt_percent(4.2e-8) == "4.2e-06 %"


def test_summary_names_no_endpoint_that_closed_with_the_run():
    text = render.format_summary(_result())
    assert "/metrics" not in text and "http://" not in text
    assert "receiver daemon's own counters at the end: lost 48, recovered 45, unrecovered 3" in text


# -- the link tap, with the real encoder and emulated link, no sockets --------------------------


def test_link_tap_counts_packets_blocks_and_which_datagrams_the_link_lost():
    settings = EncoderSettings(block_size=8, repair=4, flush_interval=0.05)
    encoder = BlockEncoder(settings, session=7)
    link = ImpairedLink(LinkImpairment(loss=GilbertElliott.from_loss_burst(0.2, 2)), seed=3)
    tap = LinkTap(link)
    now, delivered = 0.0, []
    for seq in range(100):
        now += 0.01
        packets = encoder.send(traffic.pack_datagram(traffic.STREAM_TELEMETRY, seq, now, b"x" * 50), 0, now)
        packets += encoder.on_timer(now)
        for data in packets:
            link.submit(data, now)  # the tap sees it through the link's on_air hook
        delivered += link.due(now)
    for data in encoder.close():
        link.submit(data, now)
    delivered += link.due(now)
    blocks = tap.finish()

    stats = link.stats()
    assert tap.packets == stats.sent and tap.lost == stats.lost > 0
    assert tap.source_packets == encoder.stats.source_packets == 100
    assert tap.repair_packets == encoder.stats.repair_packets
    assert sum(blocks.values()) == encoder.stats.blocks
    assert sum(k * n for (k, _), n in blocks.items()) == 100
    assert all(m == settings.repair_for(k) for k, m in blocks)
    arrived = {
        traffic.peek_id(data[wire.SOURCE_HEADER_BYTES :])
        for data in delivered
        if data[0] & 0x0F == wire.PacketType.SOURCE
    }
    assert tap.lost_ids == {(traffic.STREAM_TELEMETRY, seq) for seq in range(100)} - arrived
    assert tap.source_lost == len(tap.lost_ids)
