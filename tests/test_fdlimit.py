"""The open-file limit raised to what the flow table may need, within the hard limit
(fecproxy.shell.fdlimit), with stand-in getrlimit/setrlimit."""

from __future__ import annotations


def test_open_file_limit_is_raised_to_the_need_within_the_hard_limit():
    import resource

    from fecproxy.shell.fdlimit import FD_RESERVE, ensure_open_files, files_needed

    assert files_needed(4096, holds_flow_sockets=True) == 4096 + FD_RESERVE
    assert files_needed(4096, holds_flow_sockets=False) == FD_RESERVE
    calls = []

    def limits(soft, hard):
        return dict(getrlimit=lambda which: (soft, hard), setrlimit=lambda which, value: calls.append(value))

    assert ensure_open_files(500, **limits(1024, 4096)).raised_from is None and calls == []
    raised = ensure_open_files(4160, **limits(1024, 524288))
    assert (raised.soft, raised.raised_from, raised.enough) == (4160, 1024, True) and calls == [(4160, 524288)]
    short = ensure_open_files(4160, **limits(1024, 2048))
    assert (short.soft, short.enough, short.flows_that_fit) == (2048, False, 2048 - FD_RESERVE)
    assert ensure_open_files(4160, **limits(1024, resource.RLIM_INFINITY)).soft == 4160

    def refuse(which, value):
        raise ValueError("not permitted")

    kept = ensure_open_files(4160, getrlimit=lambda which: (1024, 8192), setrlimit=refuse)
    assert (kept.soft, kept.raised_from, kept.enough) == (1024, None, False)
