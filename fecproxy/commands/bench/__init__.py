"""``fecproxy bench``: measure speed side by side with a baseline, never as a pass/fail test.

``bench codec`` (module :mod:`.codec`) times the Reed–Solomon codec beside zfec;
``bench pipeline`` (module :mod:`.pipeline`) searches the highest datagram rate the daemon pair
carries; ``bench flood`` (module :mod:`.flood`) floods a pair's receiver while real traffic
flows and prints what got through; ``bench auth`` (module :mod:`.auth`) prices a packet's tag,
encryption and replay check beside parsing it.  This module only builds the argument parser and dispatches.
"""

from __future__ import annotations

import argparse

from fecproxy.commands.bench import auth, codec, flood, pipeline


def add_arguments(parser: argparse.ArgumentParser) -> None:
    targets = parser.add_subparsers(dest="bench_target", metavar="TARGET", required=True)
    codec.add_arguments(
        targets.add_parser(
            "codec",
            help="encode/decode throughput of the Reed–Solomon codec, beside zfec when installed",
            description="Encode and decode throughput in MB/s of source data; decode loses a fresh "
            "random pattern per block.  With zfec installed, zfec's figures are measured in the same "
            "run on the same blocks and the ratios printed.",
            formatter_class=parser.formatter_class,  # the CLI's: defaults shown only where they tell something
        )
    )
    pipeline.add_arguments(
        targets.add_parser(
            "pipeline",
            help="highest datagram rate through the daemon pair, clean or over an impaired link",
            formatter_class=parser.formatter_class,  # the CLI's: defaults shown only where they tell something
        )
    )

    flood.add_arguments(
        targets.add_parser(
            "flood",
            help="real traffic through a pair while the receiver's link port is flooded; figures vs targets",
            description="Real datagrams through a fecproxy pair on loopback while hostile packets (random "
            "bytes and mutated copies of real link packets) flood the receiver's link port: the share "
            "delivered, corrupted datagrams delivered, the receiver's memory growth and whether both "
            'daemons lived, beside the targets (README, "Benchmarks").',
            formatter_class=parser.formatter_class,  # the CLI's: defaults shown only where they tell something
        )
    )
    auth.add_arguments(
        targets.add_parser(
            "auth",
            help="µs per packet of the tag, encryption and replay check, beside parsing the packet",
            description="Microseconds per 1200-byte packet of each step a keyed link adds (tag, encryption, "
            "replay check) and of two keyed hashes considered instead of HMAC-SHA-256, each as a ratio to "
            "parsing the same packet in the same run: only the ratios compare between runs.",
            formatter_class=parser.formatter_class,  # the CLI's: defaults shown only where they tell something
        )
    )


def main(args: argparse.Namespace) -> int:
    if args.bench_target == "auth":
        return auth.main(args)
    if args.bench_target == "flood":
        return flood.main(args)
    if args.bench_target == "pipeline":
        return int(pipeline.main(args) or 0)
    return codec.main(args)
