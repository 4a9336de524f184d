"""Drill-down figures: which ranks make a layer communication-bound."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from watchtower.analysis.window import Window


@dataclass(frozen=True)
class WorstRanks:
    """Per layer, the ranks with the highest comm fraction, worst first (arrays [count, L])."""

    rank: np.ndarray  # int, rank ids
    compute_s: np.ndarray
    exchange_s: np.ndarray
    comm_fraction: np.ndarray  # NaN when the rank spent no time in the layer


def worst_ranks(window: Window, count: int = 5) -> WorstRanks:
    """Rank each layer's ranks by exchange / (compute + exchange) summed over the window."""
    compute = np.nansum(window.compute_s, axis=0)  # [R, L]
    exchange = np.nansum(window.exchange_s, axis=0)
    total = compute + exchange
    with np.errstate(invalid="ignore", divide="ignore"):
        fraction = np.where(total > 0, exchange / total, np.nan)
    order = np.argsort(np.where(np.isnan(fraction), -np.inf, -fraction), axis=0, kind="stable")[:count]
    layers = np.arange(fraction.shape[1])[None, :]
    return WorstRanks(window.ranks[order], compute[order, layers], exchange[order, layers],
                      fraction[order, layers])
