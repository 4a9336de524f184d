"""One pass over the window's ranks × layers cube, and the per-layer figures built from it.

The cube can be large (4096 ranks × 256 layers × 100 steps is 840 MB of float64), so it is read once, a
few steps at a time, and everything later works on the small reductions kept here.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from watchtower.analysis.window import Window

COMM_BOUND_THRESHOLD = 0.5  # common practice, no source
_CHUNK_CELLS = 1 << 22  # cells per chunk: bounds the temporary copy that NaN-aware sums need


@dataclass(frozen=True)
class WindowSums:
    """Reductions of the window's cubes. NaN cells (rank did not report) count as zero time.

    ``reporting`` marks ranks that reported at least one step; the others are left out of every figure
    rather than counted as ranks that did no work.
    """

    compute_rl: np.ndarray  # float64 [R, L], compute summed over the window's steps
    exchange_rl: np.ndarray  # float64 [R, L], exchange summed over the window's steps
    path_sl: np.ndarray  # float64 [S, L], max over ranks of compute (NaN: no rank reported)
    step_wall_s: np.ndarray  # float64 [S], max over ranks of step_s (NaN: no rank reported)
    reporting: np.ndarray  # bool [R]


def reduce_window(window: Window) -> WindowSums:
    """Read the cubes once, in chunks of steps, and keep the sums every figure needs."""
    n_steps, n_ranks, n_layers = window.shape
    compute_rl = np.zeros((n_ranks, n_layers))
    exchange_rl = np.zeros((n_ranks, n_layers))
    path_sl = np.full((n_steps, n_layers), np.nan)
    chunk = max(1, _CHUNK_CELLS // max(1, n_ranks * n_layers))
    for lo in range(0, n_steps if n_ranks else 0, chunk):
        c = window.compute_s[lo:lo + chunk]
        path_sl[lo:lo + chunk] = np.fmax.reduce(c, axis=1)  # fmax ignores NaN unless all are NaN
        compute_rl += _nansum0(c)
        exchange_rl += _nansum0(window.exchange_s[lo:lo + chunk])
    step_s = np.asarray(window.step_s, dtype=np.float64)
    if n_steps and n_ranks:
        step_wall_s = np.fmax.reduce(step_s, axis=1)
        reporting = np.isfinite(step_s).any(axis=0)
    else:
        step_wall_s, reporting = np.full(n_steps, np.nan), np.zeros(n_ranks, bool)
    return WindowSums(compute_rl, exchange_rl, path_sl, step_wall_s, reporting)


def _nansum0(a: np.ndarray) -> np.ndarray:
    """Sum over axis 0 treating NaN as 0.

    Missing reports are rare, so a plain sum is taken first and only the cells it turned into NaN are
    summed again with NaN skipped: several times cheaper than ``np.nansum``'s masked copy of the cube.
    """
    total = a.sum(axis=0)
    bad = np.isnan(total)
    if bad.any():
        total[bad] = np.nansum(a[:, bad], axis=0)
    return total


@dataclass(frozen=True)
class LayerStats:
    """Per-layer figures over the window (arrays of length L).

    ``compute_s``/``exchange_s`` are the mean reporting rank's time in that layer, summed over the window.
    ``comm_fraction`` is E/(C+E) of that mean rank; ``comm_fraction_worst`` the highest E/(C+E) of any
    single rank, ``worst_rank`` its rank id (−1 when no rank reported). ``step_*`` are the same times per
    step (sums / the window's steps with a report), for the mean rank and for the rank with the most of each:
    what a reader of one step's timeline expects to see.
    """

    names: tuple[str, ...]
    compute_s: np.ndarray
    exchange_s: np.ndarray
    comm_fraction: np.ndarray
    comm_fraction_worst: np.ndarray
    worst_rank: np.ndarray  # int64
    comm_bound: np.ndarray  # bool
    threshold: float
    step_compute_s: np.ndarray
    step_exchange_s: np.ndarray
    step_compute_worst_s: np.ndarray
    step_exchange_worst_s: np.ndarray


def layer_stats(window: Window, sums: WindowSums, threshold: float = COMM_BOUND_THRESHOLD) -> LayerStats:
    """Communication fraction per layer for the mean and the worst rank; flag layers above ``threshold``."""
    c, e = sums.compute_rl[sums.reporting], sums.exchange_rl[sums.reporting]
    ranks = np.asarray(window.ranks)[sums.reporting]
    n_layers = len(window.layers)
    if len(c) == 0:
        nan = np.full(n_layers, np.nan)
        return LayerStats(window.layers, nan, nan, nan, nan, np.full(n_layers, -1), np.zeros(n_layers, bool),
                          threshold, nan, nan, nan, nan)
    mean_c, mean_e = c.mean(axis=0), e.mean(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        fraction = mean_e / (mean_c + mean_e)
        per_rank = e / (c + e)
    has = np.isfinite(per_rank).any(axis=0)
    worst_idx = np.argmax(np.where(np.isfinite(per_rank), per_rank, -1.0), axis=0)
    worst = np.where(has, per_rank[worst_idx, np.arange(n_layers)], np.nan)
    worst_rank = np.where(has, ranks[worst_idx], -1).astype(np.int64)
    steps = int(np.count_nonzero(np.isfinite(sums.step_wall_s))) or np.nan
    return LayerStats(window.layers, mean_c, mean_e, fraction, worst, worst_rank,
                      np.nan_to_num(fraction, nan=0.0) > threshold, threshold, mean_c / steps, mean_e / steps,
                      c.max(axis=0) / steps, e.max(axis=0) / steps)
