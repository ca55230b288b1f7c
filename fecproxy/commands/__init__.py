"""The ``fecproxy`` subcommands, one module (or small package) each, dispatched by :mod:`fecproxy.cli`.

Every command module exposes ``add_arguments(parser)`` and ``main(args) -> int``.
"""
