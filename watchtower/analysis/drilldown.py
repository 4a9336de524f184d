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
    order = _first_sorted(np.where(np.isnan(fraction), -np.inf, -fraction), count)
    layers = np.arange(fraction.shape[1])[None, :]
    return WorstRanks(ranks[order], compute[order, layers], exchange[order, layers],
                      fraction[order, layers])


def _first_sorted(key: np.ndarray, count: int) -> np.ndarray:
    """``np.argsort(key, axis=0, kind="stable")[:count]`` without sorting whole columns: only the values up to
    each column's count-th smallest (ties included) are sorted, so 4096 ranks × 256 layers cost milliseconds."""
    n_rows, n_cols = key.shape
    if count >= n_rows or n_cols == 0:
        return np.argsort(key, axis=0, kind="stable")[:count]
    kth = np.partition(key, count - 1, axis=0)[count - 1]
    col, row = np.nonzero((key <= kth).T)  # by column, then row
    order = np.lexsort((row, key[row, col], col))
    col, row = col[order], row[order]
    position = np.arange(len(col)) - np.searchsorted(col, np.arange(n_cols))[col]
    keep = position < count
    out = np.empty((count, n_cols), np.int64)
    out[position[keep], col[keep]] = row[keep]
    return out
