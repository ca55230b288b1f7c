"""``fecproxy manual``: the manual page, fecproxy(1), in roff, built from the argument parser.

The page is made by argparse-manpage (a maintained library: ``pip install 'fecproxy[manual]'``)
from the very parser ``fecproxy`` runs, every subcommand included, so it cannot drift from
``--help``.  Install it with::

    fecproxy manual > /usr/local/share/man/man1/fecproxy.1

Exit status: 0 = written; 1 = the library is missing.
"""

from __future__ import annotations

import argparse
import sys

EXIT_WRITTEN = 0
EXIT_MISSING_LIBRARY = 1
INSTALL_HINT = "pip install 'fecproxy[manual]'"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.epilog = (
        f"exit status: {EXIT_WRITTEN} = written, {EXIT_MISSING_LIBRARY} = argparse-manpage missing ({INSTALL_HINT})"
    )


def render(full_parser: argparse.ArgumentParser) -> str:
    from build_manpages.manpage import Manpage

    return str(Manpage(full_parser))


def main(args: argparse.Namespace) -> int:
    try:
        text = render(args._full_parser())
    except ImportError:
        print(f"fecproxy manual needs the argparse-manpage package: {INSTALL_HINT}", file=sys.stderr)
        return EXIT_MISSING_LIBRARY
    sys.stdout.write(text if text.endswith("\n") else text + "\n")
    return EXIT_WRITTEN
