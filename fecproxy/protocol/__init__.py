"""The protocol core, sans-IO: wire format, events, block encoder and decoder, flow table, repair rule,
and packet authentication (keys, tag trailer, anti-replay window).

Bytes and a ``now`` timestamp in, packets, events and the next deadline out: no sockets, no
clocks, no trio (after aioquic's ``quic/`` package and h11's connection object).
"""
