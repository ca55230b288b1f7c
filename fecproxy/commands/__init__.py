"""The ``fecproxy`` subcommands, one module (or small package) each, dispatched by :mod:`fecproxy.cli`.

Every command module exposes ``add_arguments(parser)`` and ``main(args) -> int``.

The exit statuses of the commands that read a daemon config (``check``, ``run``) are defined
here once, so the same fault gives the same status whichever command meets it.
"""

#: Success (for ``run``: stopped by SIGTERM/SIGINT after flushing).
EXIT_OK = 0
#: The config file cannot be read: missing, a directory, no permission, too large, not UTF-8.
EXIT_UNREADABLE = 1
#: The config is invalid (every fault is listed on stderr); also argparse's status for a bad
#: command line.
EXIT_INVALID = 2
#: The daemon cannot start: a configured address cannot be opened (in use, permission denied,
#: not resolvable); the log names the config key and the address.
EXIT_CANNOT_START = 3

#: What each status means, for the ``--help`` epilogs (and the README's table).
EXIT_MEANINGS = {
    EXIT_OK: "success",
    EXIT_UNREADABLE: "the config file cannot be read",
    EXIT_INVALID: "invalid config or command line (every fault on stderr)",
    EXIT_CANNOT_START: "an address cannot be opened (in use, permission denied, not resolvable)",
}


def exit_status_epilog(*codes: int) -> str:
    """The ``--help`` epilog listing the statuses a command can return."""
    return "exit status: " + ", ".join(f"{code} = {EXIT_MEANINGS[code]}" for code in codes)


def load_config_or_status(path: str):
    """The config at ``path``, or the exit status after printing every fault on stderr: one
    reading of a config file for ``check`` and ``run`` alike."""
    import sys

    from fecproxy.config import ConfigError, ConfigUnreadable, load_config

    try:
        return load_config(path)
    except ConfigUnreadable as error:
        print(*error.messages, sep="\n", file=sys.stderr)
        return EXIT_UNREADABLE
    except ConfigError as error:
        print(*error.messages, sep="\n", file=sys.stderr)
        count = len(error.messages)
        print(f"{path}: invalid config ({count} error{'s' if count != 1 else ''})", file=sys.stderr)
        return EXIT_INVALID
