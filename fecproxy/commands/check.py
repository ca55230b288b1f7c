"""``fecproxy check CONFIG.yaml``: validate a config and print the settings the daemon would use.

Run it before ``fecproxy run`` or before sending a running daemon SIGHUP: it reads the file
exactly as the daemon does, so a config it accepts is one the daemon accepts.

Exit status (fecproxy.commands, shared with ``run``): 0 = valid (effective settings on stdout, as
YAML with every default filled in); 1 = the file cannot be read; 2 = invalid config (every fault
on stderr, one per line).
"""

from __future__ import annotations

import argparse
import sys

import yaml

from fecproxy.commands import EXIT_INVALID, EXIT_OK, EXIT_UNREADABLE, exit_status_epilog, load_config_or_status

EXIT_VALID = EXIT_OK


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.epilog = exit_status_epilog(EXIT_OK, EXIT_UNREADABLE, EXIT_INVALID)
    parser.add_argument("config", metavar="CONFIG.yaml", help="the YAML config file to validate")
    parser.add_argument(
        "-q",
        "--quiet",
        action="store_true",
        help="print nothing when the config is valid; only the exit status tells",
    )


def render_effective(config, source: str) -> str:
    """The effective settings as YAML, in the config's own key order, with a header comment."""
    body = yaml.safe_dump(config.effective(), sort_keys=False, allow_unicode=True, default_flow_style=False)
    header = f"# {source}: valid; effective settings (defaults filled in, null = not set)\n"
    auth = config.auth
    if auth.key is not None:
        # Only the key ids (they travel in every packet): compare them with the peer's output.
        previous = f", previous key id 0x{auth.previous_key.key_id:02x}" if auth.previous_key is not None else ""
        header += f"# auth: key id 0x{auth.key.key_id:02x}{previous} (the keys themselves are never shown)\n"
    return header + body


def main(args: argparse.Namespace) -> int:
    config = load_config_or_status(args.config)
    if isinstance(config, int):
        return config
    if not args.quiet:
        sys.stdout.write(render_effective(config, args.config))
    return EXIT_VALID
