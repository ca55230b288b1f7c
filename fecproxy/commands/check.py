"""``fecproxy check CONFIG.yaml [RECEIVER.yaml]``: validate a config, or a sender and receiver pair.

Run it before ``fecproxy run`` or before sending a running daemon SIGHUP: it reads the file
exactly as the daemon does, so a config it accepts is one the daemon accepts.  Given two files
(the sender's first), it also checks them against each other (``fecproxy.config.pair``): the
settings both sides must share, each side's hold time against the other's flush time, flow
tables and addresses.  Warnings (``fecproxy.config.advice``: a link open to other hosts without
a key, metrics on every address) are printed but do not fail the check.

Exit status (fecproxy.commands, shared with ``run``): 0 = valid (one file: effective settings on
stdout, as YAML with every default filled in); 1 = a file cannot be read; 2 = invalid config or
mismatched pair (every fault on stderr, one per line, naming the file and the key).
"""

from __future__ import annotations

import argparse
import sys

import yaml

from fecproxy.commands import EXIT_INVALID, EXIT_OK, EXIT_UNREADABLE, exit_status_epilog, load_config_or_status

EXIT_VALID = EXIT_OK
#: A delay spread above a minute is a typo, not a link (a geostationary hop is ~0.25 s one way,
#: from memory); the decoder's own hold limit is far below it anyway.
MAX_DELAY_SPREAD_MS = 60_000


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.epilog = (
        exit_status_epilog(EXIT_OK, EXIT_UNREADABLE, EXIT_INVALID)
        + f"; given two files, a pair that disagrees also exits {EXIT_INVALID} (a line per fault, naming file and key)"
    )
    parser.add_argument(
        "config",
        metavar="CONFIG.yaml",
        help="the YAML config file to validate; with a second file, the sender's config",
    )
    parser.add_argument(
        "receiver",
        metavar="RECEIVER.yaml",
        nargs="?",
        help="the receiver's config: check the two files as a pair (settings both sides must share, "
        "hold against flush, flow tables, key fingerprints)",
    )
    parser.add_argument(
        "--delay-spread-ms",
        type=_delay_spread,
        default=0,
        metavar="MS",
        help="pair check: how much later than a block's first packet its last may arrive over the link "
        "(jitter, queueing, retries), one way; each side's decoder.hold_ms must cover the peer's "
        "fec.flush_ms plus this (default 0)",
    )
    parser.add_argument(
        "-q",
        "--quiet",
        action="store_true",
        help="print nothing when the config is valid; only the exit status (and any fault or warning) tells",
    )


def _delay_spread(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number of milliseconds") from None
    if not 0 <= value <= MAX_DELAY_SPREAD_MS:
        raise argparse.ArgumentTypeError(f"{value} is out of range; expected 0..{MAX_DELAY_SPREAD_MS} ms")
    return value


def render_effective(config, source: str) -> str:
    """The effective settings as YAML, in the config's own key order, with a header comment."""
    body = yaml.safe_dump(config.effective(), sort_keys=False, allow_unicode=True, default_flow_style=False)
    header = f"# {source}: valid; effective settings (defaults filled in, null = not set)\n"
    auth = config.auth
    if auth.key is not None:
        header += f"# auth: {_key_text(auth)} (the keys themselves are never shown)\n"
    return header + body


def _key_text(auth) -> str:
    """Key id and fingerprint of each key: compare them with the peer's output."""
    text = f"key id 0x{auth.key.key_id:02x}, fingerprint {auth.key.fingerprint}"
    if auth.previous_key is not None:
        previous = auth.previous_key
        text += f"; previous key id 0x{previous.key_id:02x}, fingerprint {previous.fingerprint}"
    return text


def main(args: argparse.Namespace) -> int:
    from fecproxy.config.advice import mtu_report, warnings_for

    sources = [args.config] + ([args.receiver] if args.receiver else [])
    configs = [load_config_or_status(source) for source in sources]
    statuses = [config for config in configs if isinstance(config, int)]
    if statuses:
        return max(statuses)
    for config, source in zip(configs, sources, strict=True):
        for line in warnings_for(config, source):
            print(line, file=sys.stderr)
    if args.receiver is None:
        if not args.quiet:
            header, _, body = render_effective(configs[0], args.config).partition("\n")
            sys.stdout.write(header + "\n" + mtu_report(configs[0])[0] + body)
        return EXIT_VALID
    return _check_pair(configs, sources, args)


def _check_pair(configs, sources, args: argparse.Namespace) -> int:
    from fecproxy.config.pair import Side, check_pair

    sender, receiver = (Side(config, source) for config, source in zip(configs, sources, strict=True))
    findings = check_pair(sender, receiver, args.delay_spread_ms)
    for finding in findings:
        print(finding.line(), file=sys.stderr)
    errors = sum(finding.error for finding in findings)
    if errors:
        print(
            f"{sources[0]} + {sources[1]}: mismatched pair ({errors} error{'s' if errors != 1 else ''})",
            file=sys.stderr,
        )
        return EXIT_INVALID
    if not args.quiet:
        for config, source in zip(configs, sources, strict=True):
            auth = f"; auth: {_key_text(config.auth)}" if config.auth.key is not None else "; auth off"
            print(f"# {source}: valid {config.role}{auth}")
        print(f"# {sources[0]} + {sources[1]}: the pair agrees")
    return EXIT_VALID
