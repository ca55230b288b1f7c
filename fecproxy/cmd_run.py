"""``fecproxy run CONFIG.yaml``: one daemon in the foreground, logs on stderr.

Exit status: 0 after SIGTERM/SIGINT, 2 for an invalid config, 1 when a socket cannot be opened.
"""

from __future__ import annotations

import argparse
import sys

import trio

from .config import ConfigError, load_config
from .logs import setup_logging


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("config", metavar="CONFIG.yaml", help="daemon configuration (see config/*.yaml)")
    parser.add_argument("--log-level", choices=["debug", "info", "warning", "error"], default=None,
                        help="override log.level from the config")
    parser.add_argument("--log-format", choices=["text", "json"], default=None,
                        help="override log.format from the config (text = key=value lines)")


def main(args: argparse.Namespace) -> int:
    try:
        config = load_config(args.config)
    except ConfigError as error:
        for message in getattr(error, "messages", [str(error)]):
            print(message, file=sys.stderr)
        return 2
    setup_logging(args.log_level or str(config.log.level), args.log_format or str(config.log.format))
    from .daemon import Daemon

    daemon = Daemon(config, config_path=args.config)
    try:
        trio.run(daemon.run)
    except OSError as error:
        print(f"{args.config}: cannot open sockets: {error}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        pass
    return 0
