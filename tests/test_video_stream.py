"""A real video stream through the pair: ffmpeg sends H.264 in MPEG-TS, ffmpeg decodes what arrives.

The application here is one no one in this project wrote: Debian's ffmpeg.  It encodes its own
test pattern (lavfi ``testsrc``) with libx264 at 1 Mbit/s into MPEG-TS, sends it as UDP datagrams
of 7 TS packets (``pkt_size=1316``: 7 × 188 bytes, ISO/IEC 13818-1) and, on the far side, decodes
what arrived.  The decoder's own warnings ("Packet corrupt", "error while decoding MB",
concealment, "out of order" time stamps) are the measure: raw TS checks each PID's 4-bit
continuity counter (ISO/IEC 13818-1 §2.4.3.3), so a lost datagram costs a few messages and a late
one costs as many again.

Three paths run side by side over ``fecproxy impair --loss 0.03 --burst 2`` (same seed): directly,
through a pair delivering in order, and through a pair delivering as available.  Acceptance (issue
21): in order, the decoder's messages are at most 10 % of the direct path's; the as-available
figure is printed beside it.  Without ffmpeg the test skips with the reason (``.ci/run`` installs
it; under CI=true it fails instead).
"""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest
from support.daemon_pair import LOOPBACK, DaemonProcess, write_config
from support.processes import read_line_starting

#: The stream: 15 s of testsrc at 640×360, 25 frames/s, one key frame a second, 1 Mbit/s mux rate
#: (about 1 400 datagrams per path, some 40 of them lost on the link).
STREAM_SECONDS = 15
TS_DATAGRAM_BYTES = 1316
#: The issue's link: 3 % loss in bursts of 2 (Gilbert model, `fecproxy impair`).
LOSS, BURST, SEED = "0.03", "2", "21"
#: The video example's code (config/video-sender.yaml) and its receiver's bound.
VIDEO_FEC = {"block_size": 16, "repair": 8, "flush_ms": 200, "size_classes": []}
MAX_WAIT_MS = 300
#: Seconds after the stream ends for the last blocks (flush 200 ms, hold, max wait) to settle.
SETTLE_S = 1.5

pytestmark = pytest.mark.slow


def require_ffmpeg() -> str:
    path = shutil.which("ffmpeg")
    if path is None:
        reason = "ffmpeg not found: install Debian's ffmpeg package (apt-get install -y ffmpeg)"
        if os.environ.get("CI") == "true":
            pytest.fail(reason + " — CI must run this test")
        pytest.skip(reason)
    return path


class Capture:
    """A UDP socket that keeps every datagram it receives, in arrival order (the decoder's input)."""

    def __init__(self) -> None:
        self.sock = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        self.sock.bind((LOOPBACK, 0))
        self.sock.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4 * 1024 * 1024)
        self.sock.settimeout(0.2)
        self.datagrams: list[bytes] = []
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()

    @property
    def address(self) -> tuple[str, int]:
        return self.sock.getsockname()

    def _run(self) -> None:
        while not self._stop.is_set():
            try:
                self.datagrams.append(self.sock.recv(65535))
            except TimeoutError:
                continue
            except OSError:
                return

    def close(self) -> None:
        self._stop.set()
        self._thread.join(timeout=2)
        self.sock.close()


def start_impair(to: tuple[str, int]) -> tuple[subprocess.Popen, tuple[str, int]]:
    proc = subprocess.Popen(
        [sys.executable, "-m", "fecproxy", "impair", "--listen", f"{LOOPBACK}:0", "--to", f"{to[0]}:{to[1]}"]
        + ["--loss", LOSS, "--burst", BURST, "--seed", SEED, "--interval", "0", "--seconds", "120"],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    line = read_line_starting(proc.stdout, "fecproxy impair: listening on", time.monotonic() + 30)
    port = int(line.split("listening on ")[1].split(",")[0].rsplit(":", 1)[1])
    return proc, (LOOPBACK, port)


class Path_:
    """One way from the camera's ffmpeg to the capture: direct, or through a pair in a mode."""

    def __init__(self, name: str, tmp: Path, order: str | None):
        self.name = name
        self.capture = Capture()
        self.daemons: list[DaemonProcess] = []
        if order is None:
            self.impair, self.entry = start_impair(self.capture.address)
            return
        receiver = DaemonProcess(
            write_config(
                tmp / f"{name}-receiver.yaml",
                {
                    "role": "receiver",
                    "forward": f"{LOOPBACK}:{self.capture.address[1]}",
                    "link": {"bind": f"{LOOPBACK}:0"},
                    "decoder": {"hold_ms": 500},
                    "delivery": {"order": order, "max_wait_ms": MAX_WAIT_MS},
                    "metrics": {"listen": f"{LOOPBACK}:0"},
                    "log": {"level": "info", "format": "text"},
                },
            )
        )
        self.daemons.append(receiver)
        receiver.wait_started()
        self.impair, relay = start_impair(receiver.link_address)
        sender = DaemonProcess(
            write_config(
                tmp / f"{name}-sender.yaml",
                {
                    "role": "sender",
                    "listen": f"{LOOPBACK}:0",
                    "link": {"bind": f"{LOOPBACK}:0", "peer": f"{relay[0]}:{relay[1]}"},
                    "fec": VIDEO_FEC,
                    "metrics": {"listen": f"{LOOPBACK}:0"},
                    "log": {"level": "info", "format": "text"},
                },
            )
        )
        self.daemons.append(sender)
        sender.wait_started()
        self.entry = sender.listen_address

    @property
    def receiver(self) -> DaemonProcess:
        return self.daemons[0]

    def close(self) -> None:
        for daemon in reversed(self.daemons):
            daemon.terminate()
        if self.impair.poll() is None:
            self.impair.terminate()
        self.impair.communicate(timeout=10)
        self.capture.close()


def decoder_messages(ffmpeg: str, stream: bytes, path: Path) -> list[str]:
    """The warnings and errors ffmpeg's demuxer and decoder print for a received stream."""
    path.write_bytes(stream)
    result = subprocess.run(
        [ffmpeg, "-hide_banner", "-nostdin", "-v", "warning", "-i", str(path), "-f", "null", "-"],
        capture_output=True,
        text=True,
        timeout=120,
    )
    return [line for line in result.stderr.splitlines() if line.strip()]


@pytest.fixture(scope="module")
def source_stream(tmp_path_factory) -> Path:
    ffmpeg = require_ffmpeg()
    path = tmp_path_factory.mktemp("video") / "source.ts"
    subprocess.run(
        [ffmpeg, "-hide_banner", "-nostdin", "-loglevel", "error", "-y"]
        + ["-f", "lavfi", "-i", "testsrc=size=640x360:rate=25", "-t", str(STREAM_SECONDS)]
        + ["-c:v", "libx264", "-preset", "veryfast", "-tune", "zerolatency", "-pix_fmt", "yuv420p"]
        + ["-b:v", "900k", "-maxrate", "900k", "-bufsize", "450k", "-g", "25"]
        + ["-f", "mpegts", "-muxrate", "1000k", str(path)],
        check=True,
        timeout=120,
    )
    return path


def test_in_order_delivery_keeps_a_ts_decoder_quiet_over_a_lossy_link(source_stream, tmp_path):
    ffmpeg = require_ffmpeg()
    assert not decoder_messages(ffmpeg, source_stream.read_bytes(), tmp_path / "clean.ts"), "the source is clean"
    paths = [Path_("direct", tmp_path, None), Path_("in_order", tmp_path, "in_order")]
    paths.append(Path_("as_available", tmp_path, "as_available"))
    senders: list[subprocess.Popen] = []
    try:
        # One ffmpeg per path, each sending the same stream at its own pace (-re), 7 TS packets per
        # datagram.
        for way in paths:
            url = f"udp://{way.entry[0]}:{way.entry[1]}?pkt_size={TS_DATAGRAM_BYTES}"
            senders.append(
                subprocess.Popen(
                    [ffmpeg, "-hide_banner", "-nostdin", "-loglevel", "error", "-re", "-i", str(source_stream)]
                    + ["-c", "copy", "-f", "mpegts", "-muxrate", "1000k", url],
                    stdout=subprocess.DEVNULL,
                    stderr=subprocess.PIPE,
                )
            )
        for sender in senders:
            assert sender.wait(timeout=STREAM_SECONDS + 30) == 0, sender.stderr.read()
        time.sleep(SETTLE_S)
        in_order = paths[1].receiver
        wait_samples = {
            (name, labels): value
            for (name, labels), value in in_order.metrics().items()
            if name.startswith("fecproxy_delivery_wait_seconds")
        }
        figures = {
            way.name: {
                "unrecovered": way.receiver.metric("fecproxy_datagrams_unrecovered_total"),
                "recovered": way.receiver.metric("fecproxy_datagrams_recovered_total"),
                "lost": way.receiver.metric("fecproxy_source_packets_lost_total"),
            }
            for way in paths[1:]
        }
        skipped = sum(
            value for (name, _), value in in_order.metrics().items() if name == "fecproxy_delivery_gaps_skipped_total"
        )
    finally:
        for sender in senders:
            if sender.poll() is None:
                sender.kill()
                sender.wait()
        for way in paths:
            way.close()

    messages = {
        way.name: decoder_messages(ffmpeg, b"".join(way.capture.datagrams), tmp_path / f"{way.name}.ts")
        for way in paths
    }
    received = {way.name: len(way.capture.datagrams) for way in paths}
    direct, ordered, available = (len(messages[name]) for name in ("direct", "in_order", "as_available"))
    print(f"\nvideo over 3 % loss in bursts of 2, datagrams of {TS_DATAGRAM_BYTES} bytes:")
    print(f"  decoder messages: direct {direct}, in order {ordered}, as available {available}")
    print(f"  datagrams received: {received}")
    print(f"  pair figures: {figures}; in order: gaps skipped {skipped:g}")
    buckets = {
        dict(labels)["le"]: value
        for (name, labels), value in wait_samples.items()
        if name == "fecproxy_delivery_wait_seconds_bucket"
    }
    total = wait_samples[("fecproxy_delivery_wait_seconds_count", ())]
    print(f"  in-order added wait: {int(total)} datagrams, by bucket (cumulative): {buckets}")
    assert direct >= 20, f"the lossy link should hurt the direct path: {messages['direct'][:5]}"
    assert ordered <= 0.1 * direct, messages["in_order"][:20]
    # Never more than the bound (300 ms), with room for a late timer on a shared 2-core machine.
    assert buckets["0.5"] == total
