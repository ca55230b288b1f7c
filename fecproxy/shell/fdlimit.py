"""The process's open-file limit against what the flow table may need, checked once at start.

A receiver holds one socket per conversation (``flows.max`` of them at most) besides a fixed few;
Linux's usual soft limit of 1024 (from memory) is below the default table.  At start the daemon
raises its soft limit up to the hard limit when it needs more (an unprivileged process may, see
setrlimit(2)); when even the hard limit is too low it warns with the value to set and runs on: a
flow whose socket cannot be created is a counted drop (``no_socket``), never a crash, and the
flows that fit keep working.  Exiting instead would turn a capacity limit into an outage.
"""

from __future__ import annotations

import resource
from collections.abc import Callable
from dataclasses import dataclass

#: Descriptors a daemon uses besides the per-flow sockets: stdin/stdout/stderr, the link and
#: listen sockets, trio's epoll and wake-up descriptors, the metrics listener and its connections
#: (at most http_server.MAX_CONNECTIONS = 32), a log file and imports reading files: about 15 at
#: once in practice plus the metrics connections; 64 covers both (common practice, no source).
#: Reserved both ways: the flow sockets never take these (:func:`flow_socket_budget`), and the
#: metrics port never holds more than its cap.
FD_RESERVE = 64


@dataclass(frozen=True)
class FileLimit:
    """The outcome of the check: ``soft``/``hard`` as they are now, ``raised_from`` the soft limit
    before it was raised (None if untouched)."""

    need: int
    soft: int
    hard: int
    raised_from: int | None = None

    @property
    def enough(self) -> bool:
        return _at_least(self.soft, self.need)

    @property
    def flows_that_fit(self) -> int:
        """Per-flow sockets the soft limit leaves room for beside the reserve."""
        if self.soft == resource.RLIM_INFINITY:
            return self.need - FD_RESERVE
        return max(0, self.soft - FD_RESERVE)


def files_needed(max_flows: int, *, holds_flow_sockets: bool) -> int:
    """Descriptors this daemon may hold: the reserve, plus one per flow on a receiver."""
    return FD_RESERVE + (max_flows if holds_flow_sockets else 0)


def flow_socket_budget(getrlimit: Callable[[int], tuple[int, int]] = resource.getrlimit) -> int | None:
    """Per-flow sockets that may be open at once under the soft limit as it is now, leaving
    :data:`FD_RESERVE` for everything else; None when the limit is infinite."""
    soft, _ = getrlimit(resource.RLIMIT_NOFILE)
    if soft == resource.RLIM_INFINITY:
        return None
    return max(0, soft - FD_RESERVE)


def _at_least(limit: int, need: int) -> bool:
    return limit == resource.RLIM_INFINITY or limit >= need


def ensure_open_files(
    need: int,
    *,
    getrlimit: Callable[[int], tuple[int, int]] = resource.getrlimit,
    setrlimit: Callable[[int, tuple[int, int]], None] = resource.setrlimit,
) -> FileLimit:
    """Raise the soft RLIMIT_NOFILE towards ``need`` (never above the hard limit, never lower
    it); returns what it is now.  A refused setrlimit leaves the limit as it was."""
    soft, hard = getrlimit(resource.RLIMIT_NOFILE)
    if _at_least(soft, need):
        return FileLimit(need, soft, hard)
    target = need if _at_least(hard, need) else hard
    try:
        setrlimit(resource.RLIMIT_NOFILE, (target, hard))
    except (OSError, ValueError):
        return FileLimit(need, soft, hard)
    return FileLimit(need, target, hard, raised_from=soft)
