"""When interventions act, and the price policy they set.

An intervention (a ``propensim.interventions`` plugin) acts from round ``start`` (default 0)
until round ``until`` (default: the end of the run, exclusive). The schedule begins each one at
the start of its first round and ends it (undoing what it did, where that has a meaning) at the
start of round ``until``; several due in the same round act in spec order. Each intervention
draws only from its own random stream.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np


@dataclass
class PricePolicy:
    """The price controls and per-unit taxes in force (set by interventions, read by stages).

    Attributes
    ----------
    floor, ceiling : float
        No trade below ``floor`` or above ``ceiling`` (price units; ``-inf`` and ``inf``: none).
    buyer_tax, seller_tax : float
        Per-unit tax paid by the buyer on top of the price, and taken from the seller's
        receipts (price units; negative for a subsidy).
    """

    floor: float = -math.inf
    ceiling: float = math.inf
    buyer_tax: float = 0.0
    seller_tax: float = 0.0


def window(intervention) -> tuple[int, int | None]:
    """``(start, until)`` of an intervention: the rounds it acts in, ``until`` exclusive."""
    start = getattr(intervention, "start", 0)
    until = getattr(intervention, "until", None)
    return int(start or 0), (None if until is None else int(until))


class Schedule:
    """Interventions in spec order, each with its own generator.

    Parameters
    ----------
    interventions : sequence
        Intervention plugin instances.
    streams : sequence of numpy.random.Generator
        One generator per intervention (see :func:`propensim.markets.build.intervention_streams`).
    """

    def __init__(self, interventions=(), streams=()) -> None:
        self.interventions = list(interventions)
        self.streams = list(streams)
        if len(self.streams) != len(self.interventions):
            raise ValueError(
                f"{len(self.interventions)} interventions need as many random streams, "
                f"got {len(self.streams)}"
            )
        self._active: list[bool] = [False] * len(self.interventions)

    def __len__(self) -> int:
        return len(self.interventions)

    def validate(self, market) -> None:
        """Let each intervention check itself against the market before the first round."""
        for i, item in enumerate(self.interventions):
            start, until = window(item)
            name = getattr(item, "plugin_name", type(item).__name__)
            if start < 0:
                raise ValueError(f"interventions[{i}] ({name}).start must be >= 0, got {start}")
            if until is not None and until <= start:
                raise ValueError(
                    f"interventions[{i}] ({name}).until must be after start ({start}), got {until}"
                )
            check = getattr(item, "validate", None)
            if callable(check):
                try:
                    check(market)
                except ValueError as exc:
                    raise ValueError(f"interventions[{i}] ({name}): {exc}") from None

    def act(self, market, round_: int) -> bool:
        """Begin and end what is due at ``round_``; True if anything acted."""
        acted = False
        for i, item in enumerate(self.interventions):
            start, until = window(item)
            if self._active[i] and until is not None and round_ >= until:
                end = getattr(item, "end", None)
                if callable(end):
                    end(market, self.streams[i])
                self._active[i] = False
                acted = True
            elif not self._active[i] and round_ == start and (until is None or round_ < until):
                item.begin(market, self.streams[i])
                self._active[i] = True
                acted = True
        return acted

    def active(self) -> list:
        """The interventions in force now."""
        return [item for item, on in zip(self.interventions, self._active, strict=True) if on]


class TraderRemoval:
    """Taking traders out and bringing them back, for any market with ``replace_network``.

    A removed trader keeps its row (so it can be followed as "left") and loses every trading
    edge; ``present`` marks who is still in the market. Round and event markets share it.
    """

    def remove_traders(self, rows) -> None:
        """Take traders out of the market: they lose every trading edge (their rows stay)."""
        rows = np.asarray(rows, dtype=np.int64).reshape(-1)
        gone = np.zeros(len(self.population), dtype=bool)
        gone[rows] = True
        self.present &= ~gone
        net = self.network
        self.replace_network(net.keep_edges(~(gone[net.buyer] | gone[net.seller])))

    def restore_traders(self, rows, network) -> None:
        """Bring traders back with the network they return to."""
        self.present[np.asarray(rows, dtype=np.int64)] = True
        self.replace_network(network)
