"""The ``fecproxy`` command: a table of subcommands, each living in its own module.

Every subcommand module exposes ``add_arguments(parser)`` and ``main(args) -> int``; it is
imported only when chosen, so ``fecproxy plan`` never pays for trio or the daemon.
"""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Set

from fecproxy import __version__

#: name -> (module, one-line summary shown in --help)
COMMANDS: dict[str, tuple[str, str]] = {
    "run": ("fecproxy.commands.run", "run one daemon (sender or receiver) in the foreground from a YAML config"),
    "check": (
        "fecproxy.commands.check",
        "validate a config file, or a sender and receiver pair, and print the effective settings",
    ),
    "demo": ("fecproxy.commands.demo", "run a sender, a lossy link and a receiver on loopback and show what FEC saves"),
    "impair": ("fecproxy.commands.impair", "relay UDP between two addresses through an emulated lossy link"),
    "plan": ("fecproxy.commands.plan", "choose k, m and interleaving for a link from its loss and burst figures"),
    "watch": (
        "fecproxy.commands.watch",
        "show a pair's loss, recovery, overhead and code from their metrics endpoints, once a second",
    ),
    "bench": (
        "fecproxy.commands.bench",
        "measure codec, pipeline, flood and key costs against a baseline run side by side",
    ),
    "keygen": ("fecproxy.commands.keygen", "write a new pre-shared link key file (mode 0600) for auth.key_file"),
    "manual": ("fecproxy.commands.manual", "print the manual page fecproxy(1), built from this command line's parser"),
    "completion": ("fecproxy.commands.completion", "print a tab-completion script for bash, zsh or tcsh"),
    "init": (
        "fecproxy.commands.init",
        "write a commented, checked config pair and key for a kind of link, or the shipped examples",
    ),
}


class _HelpFormatter(argparse.ArgumentDefaultsHelpFormatter):
    """Shows a default only where it tells the reader something: not for flags (False), unset
    options (None), empty lists, or help text that already names its default."""

    def _get_help_string(self, action: argparse.Action) -> str:
        text = action.help or ""
        if "default" in text or action.default in (None, False, [], argparse.SUPPRESS):
            return text
        return super()._get_help_string(action) or ""


def build_parser(chosen: Set[str] = frozenset()) -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="fecproxy",
        description="Reed–Solomon forward error correction for UDP over lossy links.",
    )
    parser.add_argument("--version", action="version", version=f"fecproxy {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name, (module_name, summary) in COMMANDS.items():
        command = sub.add_parser(
            name,
            help=summary,
            description=summary,
            formatter_class=_HelpFormatter,
        )
        command.set_defaults(_module=module_name)
        if name in chosen:
            importlib.import_module(module_name).add_arguments(command)
    return parser


def _chosen(argv: list[str]) -> set[str]:
    """The subcommand named on the command line, so only its module is imported."""
    return {word for word in argv if word in COMMANDS}


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    parser = build_parser(_chosen(argv))
    args = parser.parse_args(argv)
    if not getattr(args, "_module", None):
        parser.print_help()
        return 2
    module = importlib.import_module(args._module)
    # The manual page and completion describe every subcommand: they get the whole parser
    # (commands never import cli).
    args._full_parser = lambda: build_parser(set(COMMANDS))
    return int(module.main(args) or 0)
