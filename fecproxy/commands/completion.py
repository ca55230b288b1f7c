"""``fecproxy completion SHELL``: a tab-completion script for bash, zsh or tcsh.

Made by shtab (a maintained library: ``pip install 'fecproxy[manual]'``) from the parser
``fecproxy`` runs, every subcommand included, so completion knows exactly the options ``--help``
shows.  Install it with, e.g.::

    fecproxy completion bash > /etc/bash_completion.d/fecproxy

Exit status: 0 = written; 1 = the library is missing.
"""

from __future__ import annotations

import argparse
import sys

EXIT_WRITTEN = 0
EXIT_MISSING_LIBRARY = 1
SHELLS = ("bash", "zsh", "tcsh")
INSTALL_HINT = "pip install 'fecproxy[manual]'"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.epilog = f"exit status: {EXIT_WRITTEN} = written, {EXIT_MISSING_LIBRARY} = shtab missing ({INSTALL_HINT})"
    parser.add_argument("shell", choices=SHELLS, help="the shell to complete for")


def main(args: argparse.Namespace) -> int:
    try:
        import shtab
    except ImportError:
        print(f"fecproxy completion needs the shtab package: {INSTALL_HINT}", file=sys.stderr)
        return EXIT_MISSING_LIBRARY
    sys.stdout.write(shtab.complete(args._full_parser(), shell=args.shell))
    return EXIT_WRITTEN
