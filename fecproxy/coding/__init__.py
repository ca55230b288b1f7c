"""Field and code: GF(2^8) arithmetic and the RFC 5510 Reed–Solomon block code, numpy only.

Knows nothing of packets, time or sockets.  Public: :class:`~fecproxy.coding.codec.BlockCode`.
"""
