"""``fecproxy impair``: its options, and the command as a process (127.0.0.1 only; every loop bounded).

The relay inside it is tested in-process in test_relay.py.
"""

from __future__ import annotations

import signal
import socket
import subprocess
import sys
import time
import urllib.request

import pytest
import trio
from support.processes import read_line_starting

from fecproxy import cli
from fecproxy.commands.impair import config_from_args, parse_address
from fecproxy.linkmodel.impairment import Blackout, ImpairmentConfigError, LinkImpairment
from fecproxy.linkmodel.loss_models import GilbertElliott
from fecproxy.shell.relay import RelayConfig, run_relay

LOOPBACK = "127.0.0.1"
TIMEOUT = 10.0  # seconds: generous upper bound for a shared 2-core machine


# -- options --------------------------------------------------------------------------------------------


def parse(*argv):
    return cli.build_parser({"impair"}).parse_args(["impair", "--listen", "127.0.0.1:0", "--to", "127.0.0.1:9", *argv])


def test_return_direction_inherits_then_overrides():
    config = config_from_args(
        parse("--loss", "0.1", "--burst", "3", "--delay-ms", "40", "--rate-kbps", "64", "--reorder")
    )
    assert config.back == config.forward
    assert config.forward.loss == GilbertElliott.from_loss_burst(0.1, 3)
    assert config.forward.delay == pytest.approx(0.04) and config.forward.rate_bps == 64_000
    config = config_from_args(
        parse(
            "--loss",
            "0.1",
            "--burst",
            "3",
            "--delay-ms",
            "40",
            "--reorder",
            "--return-loss",
            "0",
            "--return-delay-ms",
            "5",
            "--no-return-reorder",
        )
    )
    assert config.back.loss.average_loss == 0 and config.back.delay == pytest.approx(0.005) and not config.back.reorder
    config = config_from_args(
        parse(
            "--ge-p",
            "0.01",
            "--ge-r",
            "0.2",
            "--ge-loss-bad",
            "0.8",
            "--blackout",
            "3s/60s",
            "--return-blackout",
            "none",
        )
    )
    assert config.forward.loss == GilbertElliott(0.01, 0.2, 0.0, 0.8)
    assert config.forward.blackout == Blackout(3.0, 60.0) and config.back.blackout is None


def test_addresses():
    assert parse_address("127.0.0.1:9000") == ("127.0.0.1", 9000)
    assert parse_address("[::1]:53") == ("::1", 53)
    for bad in ("nohost", ":80", "127.0.0.1:x", "127.0.0.1:70000"):
        with pytest.raises(ImpairmentConfigError):
            parse_address(bad)


@pytest.mark.parametrize(
    "argv,message",
    [
        (["--listen", "bad"], "HOST:PORT"),
        (["--loss", "0.9", "--burst", "1"], "mean burst must be at least"),
        (["--blackout", "5s/1s"], "blackout"),
        (["--delay-ms", "-3"], "delay"),
        (["--seconds", "0"], "--seconds"),
    ],
)
def test_bad_options_exit_2(capsys, argv, message):
    base = ["impair", "--listen", "127.0.0.1:0", "--to", "127.0.0.1:9"]
    assert cli.main(base + argv) == 2
    assert message in capsys.readouterr().err


def test_bind_failure_exits_2(capsys):
    taken = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    taken.bind((LOOPBACK, 0))
    try:
        code = cli.main(
            ["impair", "--listen", f"{LOOPBACK}:{taken.getsockname()[1]}", "--to", "127.0.0.1:9", "--seconds", "1"]
        )
    finally:
        taken.close()
    assert code == 2 and "cannot bind" in capsys.readouterr().err


def test_timed_run_prints_summary(capsys):
    assert (
        cli.main(["impair", "--listen", "127.0.0.1:0", "--to", "127.0.0.1:9", "--seconds", "0.2", "--loss", "0.05"])
        == 0
    )
    out = capsys.readouterr().out
    assert "listening on 127.0.0.1:" in out
    assert (
        "forward: submitted 0" in out
        and "return: submitted 0" in out
        and "no traffic went on the air, nothing measured" in out
    )


def test_help_states_the_convention(capsys):
    with pytest.raises(SystemExit):
        cli.main(["impair", "--help"])
    out = " ".join(capsys.readouterr().out.split())
    assert "Gilbert 1960" in out and "Elliott 1963" in out and "P(good→bad)" in out
    assert "--return-loss" in out and "--blackout" in out


# -- the process ---------------------------------------------------------------------------------------


def test_command_relays_serves_metrics_and_summarises_on_sigterm():
    server = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    server.bind((LOOPBACK, 0))
    server.settimeout(TIMEOUT)
    client = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    client.bind((LOOPBACK, 0))
    client.settimeout(TIMEOUT)
    proc = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "fecproxy",
            "impair",
            "--listen",
            f"{LOOPBACK}:0",
            "--to",
            f"{LOOPBACK}:{server.getsockname()[1]}",
            "--metrics",
            f"{LOOPBACK}:0",
            "--seconds",
            "60",
            "--delay-ms",
            "2",
        ],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        deadline = time.monotonic() + 30
        listening = read_line_starting(proc.stdout, "fecproxy impair: listening on", deadline)
        relay_port = int(listening.split("listening on ")[1].split(",")[0].rsplit(":", 1)[1])
        metrics_url = read_line_starting(proc.stdout, "metrics:", deadline).split()[1]
        for i in range(20):
            client.sendto(b"q%d" % i, (LOOPBACK, relay_port))
            data, relay_out = server.recvfrom(100)
            assert data == b"q%d" % i
            server.sendto(b"a%d" % i, relay_out)
            assert client.recv(100) == b"a%d" % i
        page = urllib.request.urlopen(metrics_url, timeout=TIMEOUT).read().decode()
        assert 'fecproxy_impair_datagrams_delivered_total{direction="forward"} 20.0' in page
        assert 'fecproxy_impair_datagrams_dropped_total{direction="return",reason="queue"} 0.0' in page
        assert "fecproxy_impair_loss_ratio" in page and "fecproxy_impair_mean_burst_packets" in page
        proc.send_signal(signal.SIGTERM)
        out, err = proc.communicate(timeout=TIMEOUT)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()
        server.close()
        client.close()
    assert proc.returncode == 0, err
    assert "forward: submitted 20, on the air 20, delivered 20" in out
    assert "return: submitted 20, on the air 20, delivered 20" in out
    assert "drops: queue 0, blackout 0" in out


def test_no_traffic_prints_no_nan_and_progress_lines(capsys):
    argv = ["impair", "--listen", "127.0.0.1:0", "--to", "127.0.0.1:9", "--seconds", "0.35", "--interval", "0.1"]
    assert cli.main(argv) == 0
    out = capsys.readouterr().out
    assert "nan" not in out
    assert "no traffic went on the air" in out
    assert out.count("t=0s") + out.count("t=1s") >= 2  # progress lines while it ran


def test_jitter_above_delay_is_explained(capsys):
    argv = [
        "impair",
        "--listen",
        "127.0.0.1:0",
        "--to",
        "127.0.0.1:9",
        "--seconds",
        "0.1",
        "--delay-ms",
        "5",
        "--jitter-ms",
        "20",
    ]
    assert cli.main(argv) == 0
    assert "jitter above the delay is cut at 0 ms" in capsys.readouterr().out


def test_return_loss_help_says_what_stays_on_the_return_path(capsys):
    with pytest.raises(SystemExit):
        cli.main(["impair", "--help"])
    help_text = " ".join(capsys.readouterr().out.split())
    assert "--return-loss 0 removes only the loss model on the return path" in help_text


def test_ipv6_relay_counts_ipv6_headers_against_the_rate_cap():
    config = RelayConfig(listen=("::1", 0), to=("::1", 9), forward=LinkImpairment(rate_bps=64_000))

    async def start():
        async with trio.open_nursery() as nursery:
            relay = await nursery.start(run_relay, config)
            headers = {direction: link.header_bytes for direction, link in relay.links.items()}
            nursery.cancel_scope.cancel()
        return headers

    if not socket.has_ipv6:
        pytest.skip("this machine has no IPv6 loopback")
    try:
        headers = trio.run(start)
    except OSError as error:  # ::1 configured off on this host
        pytest.skip(f"IPv6 loopback unusable here: {error}")
    assert headers == {"forward": 48, "return": 48}  # RFC 8200 §3 (40) + RFC 768 (8)


def test_progress_lines_show_buffer_and_blackout_drops_beside_the_loss_model():
    """A narrow link's buffer can lose more than its loss model: the progress line says so."""
    from fecproxy.commands.impair import format_progress
    from fecproxy.linkmodel.impairment import Blackout, ImpairedLink, LinkImpairment

    link = ImpairedLink(LinkImpairment(rate_bps=64_000, queue_packets=4, blackout=Blackout(1.0, 10.0, 0.0)), seed=3)
    for i in range(20):
        link.submit(b"x" * 1000, i * 0.01)

    class Relay:
        def stats(self):
            return {"forward": link.stats()}

    line = format_progress(10.0, Relay(), {})
    stats = link.stats()
    assert stats.queue_drops > 0
    assert f"buffer full {stats.queue_drops}, blackout {stats.blackout_drops}" in line
