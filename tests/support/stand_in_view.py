"""A stand-in for what the metrics collector reads of a daemon (``shell.metrics.DaemonView``).

It has exactly the members the view declares, with the figures a test sets and nothing more: a
collector that reached for anything else would fail against it.  Tests change the figures
between scrapes by assigning ``estimate`` or the stats' counters.
"""

from __future__ import annotations

from collections.abc import Mapping

from fecproxy.linkmodel.feedback import Feedback
from fecproxy.protocol.decoder import BlockDecoder, DecoderStats
from fecproxy.protocol.encoder import BlockEncoder, EncoderSettings, EncoderStats


class StandInView:
    def __init__(
        self,
        *,
        role: str = "receiver",
        encoder_stats: EncoderStats | None = None,
        decoder_stats: DecoderStats | None = None,
        block_shape: tuple[int, int] = (8, 2),
        interleave: int = 1,
        size_class_names: tuple[str, ...] = ("le256", "gt256"),
        reloads: Mapping[str, int] | None = None,
        drops: Mapping[str, int] | None = None,
        flows: int = 1,
        estimate: tuple[float, float] | None = (0.05, 2.0),
        received_code: tuple[int | None, int | None] = (16, 4),
    ) -> None:
        self.role = role
        self.encoder_stats = EncoderStats() if encoder_stats is None else encoder_stats
        self.decoder_stats = DecoderStats() if decoder_stats is None else decoder_stats
        self.block_shape = block_shape
        self.interleave = interleave
        self.size_class_names = size_class_names
        self.reloads = {"applied": 0, "rejected": 0} if reloads is None else dict(reloads)
        self.drops = dict(drops or {})
        self.flows = flows
        self.estimate = estimate
        self.received_code = received_code
        self.feedback = Feedback(BlockEncoder(EncoderSettings(), 1), BlockDecoder())  # no reports yet

    def drop_counts(self) -> dict[str, int]:
        return dict(self.drops)

    def send_errors(self) -> int:
        return 0

    def flow_count(self) -> int:
        return self.flows

    def flows_evicted(self) -> int:
        return 0

    def loss_estimate(self) -> tuple[float, float] | None:
        return self.estimate

    def link_figures(self) -> None:
        return None  # not paced


def a_receiver() -> StandInView:
    """A receiver that rebuilt 3 datagrams, dropped 2 late packets and took one reload."""
    view = StandInView(reloads={"applied": 1, "rejected": 0}, drops={"late": 2})
    view.decoder_stats.recovered = 3
    return view
