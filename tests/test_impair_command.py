"""The impairment relay on real loopback sockets (127.0.0.1 only; every loop bounded in count and time)."""

from __future__ import annotations

import signal
import socket
import subprocess
import sys
import time
import urllib.request

import pytest
import trio

from fecproxy import cli
from fecproxy.linkmodel.loss_models import GilbertElliott
from fecproxy.commands.impair import config_from_args, parse_address
from fecproxy.shell.relay import RelayConfig, run_relay
from fecproxy.linkmodel.impairment import Blackout, ImpairmentConfigError, LinkImpairment

LOOPBACK = "127.0.0.1"
TIMEOUT = 10.0  # seconds: generous upper bound for a shared 2-core machine


async def udp_socket():
    sock = trio.socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    await sock.bind((LOOPBACK, 0))
    return sock


async def echo_server(sock, *, task_status=trio.TASK_STATUS_IGNORED):
    """Replies 're:' + datagram to whoever sent it (the relay), forever."""
    task_status.started()
    while True:
        data, address = await sock.recvfrom(65535)
        await sock.sendto(b"re:" + data, address)


async def start_pair(nursery, forward=LinkImpairment(), back=None, seed=1):
    server = await udp_socket()
    await nursery.start(echo_server, server)
    config = RelayConfig(listen=(LOOPBACK, 0), to=server.getsockname(), forward=forward, back=back or forward, seed=seed)
    relay = await nursery.start(run_relay, config)
    return relay, server


async def test_relay_carries_datagrams_and_replies():
    async with trio.open_nursery() as nursery:
        relay, _server = await start_pair(nursery)
        client = await udp_socket()
        replies = set()
        with trio.fail_after(TIMEOUT):
            for i in range(50):
                await client.sendto(b"m%d" % i, relay.listen_address)
                replies.add(await client.recv(65535))
        assert replies == {b"re:m%d" % i for i in range(50)}
        stats = relay.stats()
        assert stats["forward"].delivered == stats["return"].delivered == 50
        assert "forward: submitted 50" in relay.summary()
        nursery.cancel_scope.cancel()


async def test_replies_go_to_whoever_sent_last():
    async with trio.open_nursery() as nursery:
        relay, _server = await start_pair(nursery)
        first, second = await udp_socket(), await udp_socket()
        with trio.fail_after(TIMEOUT):
            await first.sendto(b"a", relay.listen_address)
            assert await first.recv(100) == b"re:a"
            await second.sendto(b"b", relay.listen_address)
            assert await second.recv(100) == b"re:b"
        with trio.move_on_after(0.2):
            await first.recv(100)
            pytest.fail("the earlier client got a reply meant for the later one")
        nursery.cancel_scope.cancel()


async def test_forward_loss_is_applied_and_counted():
    lossy = LinkImpairment(loss=GilbertElliott.from_loss_burst(0.3, 2))
    async with trio.open_nursery() as nursery:
        relay, _server = await start_pair(nursery, forward=lossy, back=LinkImpairment(), seed=7)
        client = await udp_socket()
        got = 0

        async def count_replies():
            nonlocal got
            while True:
                await client.recv(100)
                got += 1

        nursery.start_soon(count_replies)  # read as we go: a loopback receive buffer holds only ~250 datagrams
        with trio.fail_after(TIMEOUT):
            for i in range(400):
                await client.sendto(b"%d" % i, relay.listen_address)
                if i % 20 == 19:
                    await trio.sleep(0.005)
            while relay.stats()["forward"].lost + got < 400:  # each datagram is either lost or came back
                await trio.sleep(0.01)
        stats = relay.stats()
        assert stats["forward"].lost > 0 and stats["return"].lost == 0
        assert stats["forward"].delivered == got == stats["return"].delivered
        assert 0.15 < stats["forward"].measured_loss < 0.45  # wide: 400 packets of a bursty channel
        nursery.cancel_scope.cancel()


async def test_delay_applies_in_each_direction():
    slow = LinkImpairment(delay=0.05)
    async with trio.open_nursery() as nursery:
        relay, _server = await start_pair(nursery, forward=slow)
        client = await udp_socket()
        with trio.fail_after(TIMEOUT):
            start = trio.current_time()
            await client.sendto(b"t", relay.listen_address)
            assert await client.recv(100) == b"re:t"
            assert trio.current_time() - start >= 0.1 - 0.005  # 50 ms out and 50 ms back (clock granularity)
        nursery.cancel_scope.cancel()


async def test_blackout_and_rate_cap_through_the_relay():
    config = LinkImpairment(rate_pps=1000, queue_packets=4, blackout=Blackout(10.0, 100.0, 0.0))
    async with trio.open_nursery() as nursery:
        relay, _server = await start_pair(nursery, forward=config, back=LinkImpairment())
        client = await udp_socket()
        for i in range(10):
            await client.sendto(b"%d" % i, relay.listen_address)
        with trio.fail_after(TIMEOUT):
            while relay.stats()["forward"].submitted < 10:
                await trio.sleep(0.01)
        stats = relay.stats()["forward"]
        assert stats.delivered == 0 and stats.queue_drops + stats.blackout_drops == 10
        nursery.cancel_scope.cancel()


async def test_reply_without_a_client_is_counted():
    async with trio.open_nursery() as nursery:
        relay, server = await start_pair(nursery)
        await server.sendto(b"unsolicited", relay.out_address)
        with trio.fail_after(TIMEOUT):
            while relay.shell_drops[("return", "no_client")] == 0:
                await trio.sleep(0.01)
        nursery.cancel_scope.cancel()


# -- options --------------------------------------------------------------------------------------------


def parse(*argv):
    return cli.build_parser({"impair"}).parse_args(["impair", "--listen", "127.0.0.1:0", "--to", "127.0.0.1:9", *argv])


def test_return_direction_inherits_then_overrides():
    config = config_from_args(parse("--loss", "0.1", "--burst", "3", "--delay-ms", "40", "--rate-kbps", "64", "--reorder"))
    assert config.back == config.forward
    assert config.forward.loss == GilbertElliott.from_loss_burst(0.1, 3)
    assert config.forward.delay == pytest.approx(0.04) and config.forward.rate_bps == 64_000
    config = config_from_args(
        parse("--loss", "0.1", "--burst", "3", "--delay-ms", "40", "--reorder", "--return-loss", "0", "--return-delay-ms", "5", "--no-return-reorder")
    )
    assert config.back.loss.average_loss == 0 and config.back.delay == pytest.approx(0.005) and not config.back.reorder
    config = config_from_args(parse("--ge-p", "0.01", "--ge-r", "0.2", "--ge-loss-bad", "0.8", "--blackout", "3s/60s", "--return-blackout", "none"))
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
        code = cli.main(["impair", "--listen", f"{LOOPBACK}:{taken.getsockname()[1]}", "--to", "127.0.0.1:9", "--seconds", "1"])
    finally:
        taken.close()
    assert code == 2 and "cannot bind" in capsys.readouterr().err


def test_timed_run_prints_summary(capsys):
    assert cli.main(["impair", "--listen", "127.0.0.1:0", "--to", "127.0.0.1:9", "--seconds", "0.2", "--loss", "0.05"]) == 0
    out = capsys.readouterr().out
    assert "listening on 127.0.0.1:" in out
    assert "forward: submitted 0" in out and "return: submitted 0" in out and "measured loss" in out


def test_help_states_the_convention(capsys):
    with pytest.raises(SystemExit):
        cli.main(["impair", "--help"])
    out = " ".join(capsys.readouterr().out.split())
    assert "Gilbert 1960" in out and "Elliott 1963" in out and "P(good→bad)" in out
    assert "--return-loss" in out and "--blackout" in out


# -- the process ---------------------------------------------------------------------------------------


def read_line_starting(stream, prefix: str, deadline: float) -> str:
    while time.monotonic() < deadline:
        line = stream.readline()
        if not line:
            break
        if line.startswith(prefix):
            return line.strip()
    raise AssertionError(f"no line starting with {prefix!r}")


def test_command_relays_serves_metrics_and_summarises_on_sigterm():
    server = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    server.bind((LOOPBACK, 0))
    server.settimeout(TIMEOUT)
    client = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    client.bind((LOOPBACK, 0))
    client.settimeout(TIMEOUT)
    proc = subprocess.Popen(
        [sys.executable, "-m", "fecproxy", "impair", "--listen", f"{LOOPBACK}:0", "--to", f"{LOOPBACK}:{server.getsockname()[1]}",
         "--metrics", f"{LOOPBACK}:0", "--seconds", "60", "--delay-ms", "2"],
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
