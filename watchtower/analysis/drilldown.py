"""Drill-down figures: which ranks make a layer communication-bound, and whom each of them waits on."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from watchtower.analysis.window import Window


@dataclass(frozen=True)
class WorstRanks:
    """Per layer, the ranks with the highest comm fraction, worst first (arrays [count, L]).

    ``waits_on`` is, for each of them, the sending rank whose transfers into it in that layer took the
    longest in all (waiting for the peer included): the peer that kept it blocked, −1 when it received
    nothing in the layer. Whether that peer was late (a straggler) or its path slow (a slow port) is read
    off the straggler and link verdicts.
    """

    rank: np.ndarray  # int, rank ids
    compute_s: np.ndarray
    exchange_s: np.ndarray
    comm_fraction: np.ndarray  # NaN when the rank spent no time in the layer
    steps: int  # steps with a report, to turn the window's sums into per-step figures
    waits_on: np.ndarray  # int, rank ids, −1: none


def worst_ranks(window: Window, count: int = 5) -> WorstRanks:
    """Rank each layer's ranks by exchange / (compute + exchange) summed over the window."""
    steps = int(np.count_nonzero(np.isfinite(np.asarray(window.step_s, np.float64)).any(axis=1)))
    return worst_of_sums(window.ranks, np.nansum(window.compute_s, axis=0), np.nansum(window.exchange_s, axis=0),
                         steps, count, waits_on=lambda order: _waits_on(window, order))


def worst_of_sums(ranks: np.ndarray, compute: np.ndarray, exchange: np.ndarray, steps: int, count: int = 5, *,
                  waits_on: Callable[[np.ndarray], np.ndarray] | None = None) -> WorstRanks:
    """``worst_ranks`` from each rank's compute and exchange [R, L] summed over ``steps`` steps (per-step
    summaries keep these sums running). ``waits_on`` maps the picked rows [count, L] to the ranks each waits
    on; without it (per-step summaries keep no per-peer times) every ``waits_on`` is −1."""
    total = compute + exchange
    with np.errstate(invalid="ignore", divide="ignore"):
        fraction = np.where(total > 0, exchange / total, np.nan)
    order = _first_sorted(np.where(np.isnan(fraction), -np.inf, -fraction), count)
    layers = np.arange(fraction.shape[1])[None, :]
    waits = np.full(order.shape, -1, np.int64) if waits_on is None else waits_on(order)
    return WorstRanks(ranks[order], compute[order, layers], exchange[order, layers], fraction[order, layers],
                      steps, waits)


def _waits_on(window: Window, order: np.ndarray) -> np.ndarray:
    """For each (picked rank row, layer) in ``order`` [count, L], the sender that took longest in all."""
    out = np.full(order.shape, -1, np.int64)
    tr = window.transfers
    n_ranks, n_layers = len(window.ranks), order.shape[1] if order.ndim == 2 else 0
    if len(tr) == 0 or n_ranks == 0 or n_layers == 0:
        return out
    picked = np.zeros((n_layers, n_ranks), bool)
    picked[np.broadcast_to(np.arange(n_layers), order.shape), order] = True
    di, dst_ok = window.rank_index(tr.dst)
    si, src_ok = window.rank_index(tr.src)
    layer = np.asarray(tr.layer, np.int64)
    ok = dst_ok & src_ok & (layer >= 0) & (layer < n_layers)
    ok[ok] = picked[layer[ok], di[ok]]
    if not ok.any():
        return out
    secs = np.nan_to_num(tr.end_s[ok] - tr.start_s[ok], nan=0.0).clip(min=0.0)
    key, inverse = np.unique((layer[ok] * n_ranks + di[ok]) * n_ranks + si[ok], return_inverse=True)
    took = np.bincount(inverse, weights=secs, minlength=len(key))
    cell, sender = key // n_ranks, key % n_ranks
    best = np.lexsort((-took, cell))  # per (layer, receiver) cell, the sender that took longest first
    first = best[np.r_[True, cell[best][1:] != cell[best][:-1]]]
    longest = dict(zip(cell[first].tolist(), sender[first].tolist(), strict=True))
    for row in range(order.shape[0]):
        for lay in range(n_layers):
            found = longest.get(lay * n_ranks + int(order[row, lay]))
            if found is not None:
                out[row, lay] = int(window.ranks[found])
    return out


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
