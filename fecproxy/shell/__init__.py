"""The trio shell: sockets, clocks, signals, nurseries, metrics exposition and logs.

It moves bytes between sockets and the sans-IO cores of :mod:`fecproxy.protocol` and fires their
timers; it does no coding arithmetic of its own.
"""
