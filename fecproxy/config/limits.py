"""The configuration's limits and defaults, each named with the reason for its value.

Re-exported by :mod:`fecproxy.config.schema` (and so by :mod:`fecproxy.config`).  Defaults that a
core owns (the encoder's k and m, the decoder's hold time and budgets) are taken from it, so the
two cannot drift apart.
"""

from __future__ import annotations

from fecproxy.protocol import decoder as _decoder
from fecproxy.protocol import encoder as _encoder
from fecproxy.protocol import ordering as _ordering
from fecproxy.protocol import pacer as _pacer
from fecproxy.protocol import sliding_encoder as _sliding
from fecproxy.protocol import wire
from fecproxy.protocol.flows import FLOW_SLOTS

# --------------------------------------------------------------------------------------------
# Limits and defaults.  Each is named, with the reason for its value.
# --------------------------------------------------------------------------------------------

#: RFC 5510 §8.2: with GF(2^8) a block has n = k + m ≤ 255 encoding symbols.
MAX_ENCODING_SYMBOLS = wire.MAX_K

#: The sender's block shape and flush interval: the protocol core owns the defaults and their
#: reasons (fecproxy.protocol.encoder); the config keys show them in their own units.
DEFAULT_BLOCK_SIZE = _encoder.DEFAULT_BLOCK_SIZE
DEFAULT_REPAIR = _encoder.DEFAULT_REPAIR
DEFAULT_FLUSH_MS = round(_encoder.DEFAULT_FLUSH_INTERVAL * 1000)
#: Interleave depth and size classes: the encoder owns their defaults, bounds and reasons.
DEFAULT_INTERLEAVE = _encoder.DEFAULT_INTERLEAVE
MAX_INTERLEAVE = _encoder.MAX_INTERLEAVE
DEFAULT_SIZE_CLASSES = _encoder.DEFAULT_SIZE_CLASSES
MAX_SIZE_BOUNDARIES = _encoder.MAX_SIZE_BOUNDARIES
#: The sliding-window code (fec.code: sliding): the encoder owns its defaults, bounds and reasons.
DEFAULT_WINDOW = _sliding.DEFAULT_WINDOW
MAX_WINDOW = _sliding.MAX_WINDOW
DEFAULT_WINDOW_MS = round(_sliding.DEFAULT_WINDOW_AGE * 1000)
#: A window older than a minute protects nothing interactive; the same bound as flush_ms.
MAX_WINDOW_MS = 60_000
DEFAULT_REPAIR_INTERVAL = _sliding.DEFAULT_REPAIR_INTERVAL


#: A block held open for more than a minute protects nothing in time for any real-time use, and
#: keeps memory busy; beyond that the setting is surely a unit mistake (seconds for ms).
MAX_FLUSH_MS = 60_000

#: The wire format owns the default and its reason (fecproxy.protocol.wire.DEFAULT_MAX_DATAGRAM).
DEFAULT_MAX_DATAGRAM_BYTES = wire.DEFAULT_MAX_DATAGRAM
#: Room reserved for the authentication trailer (the wire format owns the figure and its reason).
AUTH_TAG_RESERVE_BYTES = wire.AUTH_TAG_RESERVE_BYTES
#: The largest UDP payload over IPv4: 65535 − 20 (IPv4 header, RFC 791) − 8 (UDP, RFC 768).
MAX_UDP_PAYLOAD_BYTES = 65_507
#: The largest datagram whose repair packet (with the tag reserve) still fits one UDP datagram.
MAX_DATAGRAM_BYTES_LIMIT = (
    MAX_UDP_PAYLOAD_BYTES - wire.REPAIR_HEADER_BYTES - wire.SYMBOL_PREFIX_BYTES - AUTH_TAG_RESERVE_BYTES
)

#: The decoder owns the hold time and its reason (fecproxy.protocol.decoder.DEFAULT_HOLD_TIME).
DEFAULT_HOLD_MS = round(_decoder.DEFAULT_HOLD_TIME * 1000)
#: An hour-long hold is never useful; a minute is already generous and bounds the memory held.
MAX_HOLD_MS = 60_000

#: In-order delivery owns its bound and its reason (fecproxy.protocol.ordering.DEFAULT_MAX_WAIT).
DEFAULT_MAX_WAIT_MS = round(_ordering.DEFAULT_MAX_WAIT * 1000)
MAX_MAX_WAIT_MS = round(_ordering.MAX_MAX_WAIT * 1000)

#: The decoder owns the open-block bound and its reason (decoder.DEFAULT_MAX_OPEN_BLOCKS).
DEFAULT_MAX_OPEN_BLOCKS = _decoder.DEFAULT_MAX_OPEN_BLOCKS
#: Worst case 65536 × 255 × 1403 bytes would be ~23 GiB; this cap stops a typo, the operator
#: still has to size memory for what they choose.
MAX_OPEN_BLOCKS_LIMIT = 65_536
#: The decoder owns its byte budget, its floor and their reasons (decoder.DEFAULT_MAX_MEMORY_BYTES).
DEFAULT_MAX_MEMORY_BYTES = _decoder.DEFAULT_MAX_MEMORY_BYTES
MIN_MEMORY_BYTES = _decoder.MIN_MEMORY_BYTES
#: 64 GiB: far above any machine this runs on; stops a typo, not a choice.
MAX_MEMORY_BYTES_LIMIT = 64 * 1024**3
#: A million rebuilds a second is far above what one core can do (~50 µs each): the cap stops a
#: typo; null (the default) means no cap.
MAX_REBUILDS_PER_S_LIMIT = 1_000_000

#: Flow ids are a 16-bit slot and an 8-bit generation (protocol.flows, planned wire format).
#: Half the slot space: free slots are handed out least recently freed first, so with at most
#: half of them in use a slot rests for at least 32 768 hand-outs before its next client.
MAX_FLOWS_LIMIT = FLOW_SLOTS // 2
#: Thousands of clients, each request from a fresh port (a resolver, a poller): 4096 flows hold
#: ~136 new clients a second for the 30 s first-exchange timeout before the oldest are recycled.
#: A receiver keeps one socket per flow, so 4096 needs the file-descriptor limit raised above
#: the usual soft limit of 1024 (from memory); the systemd unit sets it.
DEFAULT_MAX_FLOWS = 4096
#: Linux nf_conntrack forgets a UDP "stream" (traffic seen both ways) after 120 s (from memory);
#: a proxy that keeps a flow as long as a NAT on the path would is unsurprising to operators.
#: This is the timeout of established flows.
DEFAULT_FLOW_IDLE_TIMEOUT_S = 120
#: A flow still in its first exchange (no reply yet, or replies to its first request only) is
#: forgotten after 30 s idle, as stateful firewalls time out unreplied UDP (nf_conntrack: 30 s,
#: from memory): a one-off query is long answered by then.  Capped by idle_timeout_s.
DEFAULT_FLOW_FIRST_EXCHANGE_TIMEOUT_S = 30
#: A day: an idle flow kept longer than this is a leak, not a setting.
MAX_FLOW_IDLE_TIMEOUT_S = 86_400
#: A flow active within the last 2 s may still wait for its reply: a geostationary round trip
#: (~0.6 s, from memory) plus the default decoder hold on both sides (2 × 0.5 s) fits inside it,
#: so a full table refuses a new client rather than cut a live exchange (common practice, no
#: source).  0 = always evict the least recently active flow, never refuse.
DEFAULT_FLOW_PROTECT_S = 2
#: Protection beyond the longest idle timeout would mean never evicting at all.
MAX_FLOW_PROTECT_S = MAX_FLOW_IDLE_TIMEOUT_S

#: 4 MiB of socket buffer absorbs ~30 ms of 1400-byte datagrams at 100 000/s, enough to ride out
#: a scheduling hiccup of the event loop on a busy 2-core box.  Linux caps the request at
#: net.core.rmem_max / wmem_max unless raised, so the daemon should log what it actually got.
#: 0 keeps the operating system's default.
DEFAULT_SOCKET_BUFFER_BYTES = 4 * 1024 * 1024
#: SO_RCVBUF/SO_SNDBUF take a C int and Linux doubles the request (socket(7)), so the largest
#: value that cannot overflow is INT_MAX // 2.
MAX_SOCKET_BUFFER_BYTES = (2**31 - 1) // 2

#: log.stats_interval_s: one stats line a minute shows a quiet daemon is alive and what the link
#: did, at 1440 lines a day (a journal keeps that for months); common practice, no source.
DEFAULT_STATS_INTERVAL_S = 60
#: A day: beyond that a periodic line tells nothing a restart would not.
MAX_STATS_INTERVAL_S = 86_400

#: fec.adapt.target_residual: one datagram in a thousand left unrecovered, ten times under the
#: ~1 % loss that voice and video codecs conceal well (from memory; common practice, no source).
DEFAULT_TARGET_RESIDUAL = 1e-3
#: fec.adapt.min_repair: one repair packet per block even on a clean link, so the first loss after
#: a quiet spell is repaired while the report that shows it is still on its way.  Common practice,
#: no source.
DEFAULT_MIN_REPAIR = 1
#: fec.adapt.max_overhead: RFC 6363 §8.2 — the repair rate never above the source rate (packets and
#: bytes); an operator narrows it to what the link budget affords.
DEFAULT_MAX_OVERHEAD = 1.0
#: reports.interval_ms: one loss report a second.  A 66-byte packet per second (528 bit/s) costs
#: nothing even on a narrow radio link, and lets the sender follow a fading link within a few
#: seconds.  0 turns reports off.
DEFAULT_REPORT_INTERVAL_MS = 1000
#: A report period above a minute cannot follow a link; it also keeps the value inside the report's
#: 16-bit interval field (fecproxy.protocol.loss_report.MAX_INTERVAL_MS).
MAX_REPORT_INTERVAL_MS = 60_000


#: link.queue_ms: one second of air time.  It holds a 60 kB burst at 512 kbit/s; narrower links
#: need more (the trial configs set it), and more also means longer waits behind a burst.  CoDel's
#: 100 ms interval (RFC 8289 §4.2) is sized for the Internet, not a radio.  Common practice, no source.
DEFAULT_LINK_QUEUE_MS = 1000
#: A minute of air time is a store-and-forward buffer, not a queue.
MAX_LINK_QUEUE_MS = 60_000
#: link.mtu: Ethernet's 1500 bytes (RFC 894).  Bounds: IPv4's 576-byte minimum datagram every host
#: must accept (RFC 791 §3.1) and the largest IPv4 total length.
DEFAULT_LINK_MTU = 1500
MIN_LINK_MTU = 576
MAX_LINK_MTU = 65_535
#: link.rate bounds: the pacer's floor (no IP radio below 1200 bit/s, from memory) to 10 Gbit/s.
MIN_LINK_RATE_BPS = _pacer.MIN_RATE_BPS
MAX_LINK_RATE_BPS = 10e9
