"""What the metrics and the status page read of a running daemon: one view object over its parts.

The collector (:mod:`fecproxy.shell.metrics`) reads a :class:`~fecproxy.shell.metrics.DaemonView`;
this is the daemon's.  It holds the daemon's parts, not the daemon: the cores' counters, the
feedback, the application side and the shell's own few counts, each read when Prometheus scrapes.
"""

from __future__ import annotations

from collections.abc import Callable

from fecproxy.config.addresses import format_sockaddr
from fecproxy.linkmodel.feedback import Feedback
from fecproxy.protocol.decoder import BlockDecoder, DecoderStats
from fecproxy.protocol.encoder import BlockEncoder, EncoderStats
from fecproxy.protocol.ordering import InOrderDelivery, OrderStats
from fecproxy.protocol.sliding_encoder import SlidingEncoder
from fecproxy.shell.app_side import AppSide
from fecproxy.shell.link_output import LinkFigures, LinkOutput


class ShellCounts:
    """What the shell itself counts: drops no core sees, link send errors, reloads."""

    def __init__(self) -> None:
        self.drops: dict[str, int] = {}
        self.reloads: dict[str, int] = {"applied": 0, "rejected": 0}
        #: Link send errors so far (the link writer's count, once its socket is open).
        self.link_send_errors: Callable[[], int] = lambda: 0

    def drop(self, reason: str, count: int = 1) -> None:
        self.drops[reason] = self.drops.get(reason, 0) + count


class DaemonStatsView:
    """A running daemon as the collector sees it (metrics.DaemonView)."""

    def __init__(
        self,
        role: str,
        encoder: BlockEncoder | SlidingEncoder,
        decoder: BlockDecoder,
        feedback: Feedback,
        app: AppSide,
        counts: ShellCounts,
        order: InOrderDelivery | None = None,
        link: LinkOutput | None = None,
    ):
        self.role = role
        self._encoder, self._decoder = encoder, decoder
        self._order = order
        self.feedback = feedback
        self._app = app
        self._counts = counts
        self._link = link

    def status_facts(self) -> dict[str, str | None]:
        """What /status.json says beside the metrics (a peer address is never a metric label):
        where this side sends its link packets, and whether that address was configured
        (``link.peer``) or learned from the peer's packets."""
        peer = self._decoder.peer
        return {
            "role": self.role,
            "peer": format_sockaddr(peer) if peer else None,
            "peer_from": "learned" if self._decoder.learn_peer else "link.peer",
        }

    def link_figures(self) -> LinkFigures | None:
        """The link output's air budget and queue; None for a view without one."""
        return None if self._link is None else self._link.figures()

    @property
    def encoder_stats(self) -> EncoderStats:
        return self._encoder.stats

    @property
    def decoder_stats(self) -> DecoderStats:
        return self._decoder.stats

    @property
    def order_stats(self) -> OrderStats | None:
        """In-order delivery's counters; None when this daemon delivers as available."""
        return None if self._order is None else self._order.stats

    @property
    def block_shape(self) -> tuple[int, int]:
        """(k, m) of the blocks being sent now."""
        settings = self._encoder.settings
        return settings.block_size, settings.repair

    @property
    def sliding_shape(self) -> tuple[int, int, float] | None:
        """(window, repair interval, window age in s) with fec.code: sliding; None with blocks."""
        sliding = getattr(self._encoder, "sliding_settings", None)
        if sliding is None:
            return None
        return sliding.window, sliding.repair_interval, sliding.window_age

    @property
    def interleave(self) -> int:
        return self._encoder.settings.interleave

    @property
    def size_class_names(self) -> tuple[str, ...]:
        return self._encoder.settings.class_names

    @property
    def reloads(self) -> dict[str, int]:
        """SIGHUP reloads by result, "applied" and "rejected" (a copy)."""
        return dict(self._counts.reloads)

    def drop_counts(self) -> dict[str, int]:
        totals = dict(self._counts.drops)
        sources = (
            self._encoder.stats.dropped,
            self._decoder.stats.dropped,
            self.feedback.stats.dropped,
            self._app.drops,
            {} if self._order is None else self._order.stats.dropped,
        )
        for source in sources:
            for reason, count in list(source.items()):
                totals[reason] = totals.get(reason, 0) + count
        return totals

    def send_errors(self) -> int:
        return self._counts.link_send_errors() + self._app.send_errors()

    def flow_count(self) -> int:
        return len(self._app.flows)

    def flows_evicted(self) -> int:
        return self._app.flows.stats.evicted

    @property
    def received_code(self) -> tuple[int | None, int | None]:
        """(k, m) of the peer's code as seen in its repair packets; (None, None) before any."""
        code = self._decoder.received_code
        if code.configured is not None:  # the largest full block's: the code as configured
            return code.configured
        return code.k, code.m

    @property
    def received_code_full(self) -> bool | None:
        """True once a full block's code is known; False while only short blocks came; None before any."""
        code = self._decoder.received_code
        return None if code.k is None else code.configured is not None

    def loss_estimate(self) -> tuple[float, float] | None:
        estimate = self.feedback.loss_estimate()
        if estimate.samples == 0:
            return None
        return estimate.average_loss, estimate.mean_burst
