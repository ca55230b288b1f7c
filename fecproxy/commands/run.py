"""``fecproxy run CONFIG.yaml``: one daemon in the foreground, logs on stderr.

Exit status: 0 after SIGTERM/SIGINT, 2 for an invalid config, 1 when a socket cannot be opened.
"""

from __future__ import annotations

import argparse
import signal
import sys

import trio

from fecproxy.config import ConfigError, load_config
from fecproxy.shell.logs import setup_logging


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
        for message in error.messages:
            print(message, file=sys.stderr)
        return 2
    setup_logging(args.log_level or str(config.log.level), args.log_format or str(config.log.format))
    from fecproxy.shell.daemon import Daemon, SocketOpenError

    daemon = Daemon(config, config_path=args.config)

    def on_stop_signal(signum, frame) -> None:
        """Beneath the daemon's own signal receiver: reached only before it is open (stop at
        once, nothing sent yet) or after it closed (already stopping: ignore, exit 0 follows)."""
        if not daemon.stopping:
            raise KeyboardInterrupt

    try:
        signal.signal(signal.SIGTERM, on_stop_signal)
        signal.signal(signal.SIGINT, on_stop_signal)
        trio.run(daemon.run)
    except SocketOpenError as error:
        # Reads "CONFIG: cannot open listen 127.0.0.1:5000: Address already in use".
        print(f"{args.config}: cannot open {error}", file=sys.stderr)
        return 1
    except OSError as error:
        print(f"{args.config}: socket error: {error}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        pass
    # Flushed and closed: a SIGTERM/SIGINT repeated while the interpreter winds down must not
    # turn this clean exit into death by signal (status -15).
    signal.signal(signal.SIGTERM, signal.SIG_IGN)
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    return 0
