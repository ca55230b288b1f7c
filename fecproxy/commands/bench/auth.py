"""``fecproxy bench auth``: what protecting a packet costs, beside parsing it.

Microseconds per 1200-byte packet of each step a keyed link adds (tag, AEAD, replay check), and
of two keyed hashes we considered instead of HMAC-SHA-256, each printed as a ratio to
``wire.parse`` of the same packet measured in the same run: the machine is shared, so only the
ratios are worth comparing between runs.  Best of ``--rounds`` rounds of ``--calls`` calls each.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import time
from collections.abc import Callable

from fecproxy.commands.bench.options import positive
from fecproxy.protocol import auth, keys, wire
from fecproxy.protocol.replay import ReplayWindow

#: A typical link packet: a 1200-byte datagram fits a 1500-byte MTU with every header and tag.
PACKET_BYTES = 1200
#: Rounds per figure; the best one is kept (the others met a busy machine).
DEFAULT_ROUNDS = 5
#: Calls per round: 2000 calls of a few µs is ~10 ms, long against the clock's resolution.
DEFAULT_CALLS = 2000
#: The name of the row every other is divided by.
BASELINE = "baseline: wire.parse"


def _best_micros(function: Callable[[], object], rounds: int, calls: int) -> float:
    """Best per-call time in µs over ``rounds`` rounds of ``calls`` calls."""
    best = float("inf")
    for _ in range(rounds):
        start = time.perf_counter()
        for _ in range(calls):
            function()
        best = min(best, (time.perf_counter() - start) / calls)
    return best * 1e6


def measure(rounds: int = DEFAULT_ROUNDS, calls: int = DEFAULT_CALLS) -> dict[str, float]:
    """µs per packet for each step, the baseline first; the AEAD rows only with cryptography."""
    master = keys.MasterKey(os.urandom(keys.KEY_BYTES))
    packet = wire.encode_source(0x1234, 1, 0, 0, os.urandom(PACKET_BYTES))
    mac_ring = auth.Keyring(master)
    rows = {BASELINE: _best_micros(lambda: wire.parse(packet, max_datagram=1400), rounds, calls)}
    protected = auth.protect(packet, mac_ring.current, 1)
    rows["HMAC-SHA-256 protect"] = _best_micros(lambda: auth.protect(packet, mac_ring.current, 1), rounds, calls)
    rows["HMAC-SHA-256 verify"] = _best_micros(lambda: auth.verify(protected, mac_ring), rounds, calls)
    mac_key = keys.mac_key(master)
    rows["keyed BLAKE2b-128 tag (alternative)"] = _best_micros(
        lambda: hashlib.blake2b(packet, key=mac_key, digest_size=16).digest(), rounds, calls
    )
    rows["keyed BLAKE2s-128 tag (alternative)"] = _best_micros(
        lambda: hashlib.blake2s(packet, key=mac_key, digest_size=16).digest(), rounds, calls
    )
    try:
        aead_ring = auth.Keyring(master, encrypt=True)
    except RuntimeError:  # cryptography not installed: the MAC rows still mean something
        aead_ring = None
    if aead_ring is not None:
        current = aead_ring.current
        sealed = auth.protect(packet, current, 1)
        rows["ChaCha20-Poly1305 protect"] = _best_micros(lambda: auth.protect(packet, current, 1), rounds, calls)
        rows["ChaCha20-Poly1305 verify"] = _best_micros(lambda: auth.verify(sealed, aead_ring), rounds, calls)
    window = ReplayWindow()
    sequence = iter(range(10**12))

    def check_and_commit() -> None:
        number = next(sequence)
        if window.check(number).accepted:
            window.commit(number)

    rows["replay check + commit"] = _best_micros(check_and_commit, rounds, calls)
    return rows


def format_table(rows: dict[str, float], rounds: int) -> str:
    baseline = rows[BASELINE]
    lines = [f"per {PACKET_BYTES}-byte packet, best of {rounds} rounds:"]
    lines += [f"  {name:40s} {micros:7.2f} µs  ({micros / baseline:5.2f}× wire.parse)" for name, micros in rows.items()]
    return "\n".join(lines)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--rounds", type=positive(int), default=DEFAULT_ROUNDS, help="rounds per figure (best kept)")
    parser.add_argument("--calls", type=positive(int), default=DEFAULT_CALLS, help="calls per round")
    parser.add_argument("--json", action="store_true", help="print the figures (µs per packet) as JSON")


def main(args: argparse.Namespace) -> int:
    rows = measure(args.rounds, args.calls)
    print(json.dumps(rows, indent=2) if args.json else format_table(rows, args.rounds))
    return 0
