"""Warnings about a valid config: settings the daemon accepts but an operator should reconsider.

Errors stop a daemon (``schema``); these only speak.  ``fecproxy check`` prints them on stderr,
one line each, naming the file and the key, and still exits 0: a bench on a closed network may
well run without a key.  The rules here are the ones README's "Caution" and "Link security"
state in prose.
"""

from __future__ import annotations

from fecproxy.config.schema import Config, Role


def warnings_for(config: Config, source: str) -> list[str]:
    """Every warning for one side's config, as ``SOURCE: KEY: text`` lines."""
    found: list[str] = []
    keyless = not config.auth.enabled
    bind = config.link.bind
    if keyless and not bind.is_loopback:
        found.append(
            f"{source}: link.bind: warning: {bind} is reachable from other hosts but auth.key_file is not set; "
            f"anyone who can send to it can inject datagrams towards "
            f"{'the applications' if config.role is Role.SENDER else 'forward'}: make a key "
            f"(`fecproxy keygen link.key`) and set auth.key_file on both sides"
        )
    if keyless and config.role is Role.RECEIVER and config.link.peer is None and not bind.is_loopback:
        found.append(
            f"{source}: link.peer: warning: not set, so the peer is learned from traffic, and auth.key_file is not "
            f"set: whoever sends a well-formed packet first receives the replies; set link.peer or auth.key_file"
        )
    metrics = config.metrics.listen
    if metrics is not None and metrics.is_unspecified:
        found.append(
            f"{source}: metrics.listen: warning: {metrics} listens on every address of this host; the metrics and "
            f"the status page are readable by anyone who can reach it: bind a loopback or management address"
        )
    return found
