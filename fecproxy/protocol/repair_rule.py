"""How many repair packets a block gets — one rule shared by the encoder, config and planner.

A full block of k datagrams gets m.  A short block (closed by its flush timer with k' < k) gets,
by the configured rule (:class:`ShortBlockRepair`, the one owner of the rule names):

* ``proportional`` (default): ceil(m·k'/k), which is ≥ 1 whenever m > 0 — keeps the overhead
  ratio, so sparse telemetry is neither left bare nor flooded with repair;
* ``full``: m — the strongest protection for short blocks, at up to m/k' overhead.

m = 0 always gives 0.  Pure integer arithmetic, no imports beyond the standard library: config
and planner use it cheaply.
"""

from enum import StrEnum


class ShortBlockRepair(StrEnum):
    """How many repair packets a block closed early by its flush timer gets."""

    PROPORTIONAL = "proportional"  # ceil(m·k'/k), at least 1 when m > 0: keeps the overhead ratio
    FULL = "full"  # always m: strongest protection for sparse traffic, at up to m/k' overhead


SHORT_BLOCK_RULES = tuple(rule.value for rule in ShortBlockRepair)
#: The sender's default: the overhead stays m/k whatever the traffic's rhythm.
DEFAULT_SHORT_BLOCK_REPAIR = ShortBlockRepair.PROPORTIONAL


def repair_count(block_size: int, repair: int, k_actual: int, rule: str = DEFAULT_SHORT_BLOCK_REPAIR) -> int:
    if not 1 <= k_actual <= block_size:
        raise ValueError(f"k_actual must be 1..{block_size}, got {k_actual!r}")
    if rule not in SHORT_BLOCK_RULES:
        raise ValueError(f"short-block rule {rule!r} not one of {SHORT_BLOCK_RULES}")
    if repair == 0 or k_actual == block_size or rule == ShortBlockRepair.FULL:
        return repair
    return -(-repair * k_actual // block_size)  # exact integer ceil(m·k'/k)
