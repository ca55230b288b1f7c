"""``fecproxy run CONFIG.yaml``: one daemon in the foreground, logs on stderr.

Exit status (fecproxy.commands, shared with ``check``): 0 after SIGTERM/SIGINT, 1 when the config
file cannot be read, 2 for an invalid config, 3 when a configured address cannot be opened (a
``cannot_start`` log event naming the config key).
"""

from __future__ import annotations

import argparse
import logging
import signal

import trio

from fecproxy.commands import (
    EXIT_CANNOT_START,
    EXIT_INVALID,
    EXIT_OK,
    EXIT_UNREADABLE,
    exit_status_epilog,
    load_config_or_status,
)
from fecproxy.shell.logs import log_event, setup_logging

log = logging.getLogger("fecproxy.run")


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.epilog = exit_status_epilog(EXIT_OK, EXIT_UNREADABLE, EXIT_INVALID, EXIT_CANNOT_START)
    parser.add_argument(
        "config",
        metavar="CONFIG.yaml",
        help="daemon configuration (examples: `fecproxy init`, or config/*.yaml in a checkout)",
    )
    parser.add_argument(
        "--log-level",
        choices=["debug", "info", "warning", "error"],
        default=None,
        help="override log.level from the config",
    )
    parser.add_argument(
        "--log-format",
        choices=["text", "json"],
        default=None,
        help="override log.format from the config (text = key=value lines)",
    )


def main(args: argparse.Namespace) -> int:
    config = load_config_or_status(args.config)
    if isinstance(config, int):
        return config
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
        # A log event (so --log-format json carries it too), e.g. "event=cannot_start
        # key=listen address=127.0.0.1:5000 error="Address already in use"".
        log_event(
            log,
            logging.ERROR,
            "cannot_start",
            config=args.config,
            key=error.key,
            address=str(error.address),
            error=error.reason,
            exit_status=EXIT_CANNOT_START,
        )
        return EXIT_CANNOT_START
    except OSError as error:
        log_event(
            log, logging.ERROR, "cannot_start", config=args.config, error=str(error), exit_status=EXIT_CANNOT_START
        )
        return EXIT_CANNOT_START
    except KeyboardInterrupt:
        pass
    # Flushed and closed: a SIGTERM/SIGINT repeated while the interpreter winds down must not
    # turn this clean exit into death by signal (status -15).
    signal.signal(signal.SIGTERM, signal.SIG_IGN)
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    return EXIT_OK
