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
    return worst_of_sums(window.ranks, np.nansum(window.compute_s, axis=0), np.nansum(window.exchange_s, axis=0),
                         count)


def worst_of_sums(ranks: np.ndarray, compute: np.ndarray, exchange: np.ndarray, count: int = 5) -> WorstRanks:
    """``worst_ranks`` from each rank's compute and exchange [R, L] summed over the window (per-step summaries
    keep these sums running)."""
    total = compute + exchange
    with np.errstate(invalid="ignore", divide="ignore"):
        fraction = np.where(total > 0, exchange / total, np.nan)
    order = np.argsort(np.where(np.isnan(fraction), -np.inf, -fraction), axis=0, kind="stable")[:count]
    layers = np.arange(fraction.shape[1])[None, :]
    return WorstRanks(ranks[order], compute[order, layers], exchange[order, layers],
                      fraction[order, layers])
