"""Where the speedup goes: POP efficiencies (Wagner et al., 2017), their speedup split, stragglers, and the
Karp–Flatt serial fraction (Karp & Flatt, 1990)."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from watchtower.analysis.aggregate import WindowSums
from watchtower.analysis.robust import modified_z
from watchtower.analysis.window import Window

OUTLIER_Z = 3.5  # Iglewicz & Hoaglin (1993): |M| > 3.5 is a potential outlier
RELATIVE_JITTER = 0.02  # common practice, no source: spreads under ~2 % are timer and clock jitter
# Far below its peers: under a third of the median of its class is slow whatever the spread of the class,
# which a few noisy fast members can widen enough to hide a tenfold gap from the z-score. No source.
FAR_BELOW_PEERS = 1 / 3


@dataclass(frozen=True)
class Efficiency:
    """POP efficiencies of one window (Wagner et al., 2017), over the ranks that reported.

    U_r = compute of rank r; T = window wall time = Σ_steps max_r step time; T_ideal = the step time our
    model predicts with free transfers and the same per-layer synchronisation = Σ_steps Σ_layers max_r
    compute. LB = mean U / max U, CommE = max U / T = SerE × TE, SerE = max U / T_ideal, TE = T_ideal / T,
    PE = LB × CommE.
    """

    ranks: np.ndarray  # int [p] ids of the reporting ranks
    useful_s: np.ndarray  # float64 [p] U_r
    wall_s: float
    ideal_s: float
    load_balance: float
    communication: float
    parallel: float
    serialisation: float
    transfer: float

    @property
    def workers(self) -> int:
        return len(self.ranks)

    def speedup(self) -> Speedup:
        """Split the p workers into speedup achieved, lost to imbalance and lost to the interconnect."""
        p, lb, comm = self.workers, self.load_balance, self.communication
        return Speedup(float(p), p * lb * comm, p * lb * (1.0 - comm), p * (1.0 - lb))


@dataclass(frozen=True)
class Speedup:
    """S = p × PE against one ideal worker doing all the work (strong scaling); the three parts add to p:
    p = p·LB·CommE + p·LB·(1 − CommE) + p·(1 − LB)."""

    workers: float
    achieved: float
    lost_to_interconnect: float
    lost_to_imbalance: float

    def percent(self) -> Speedup:
        """The same split as percentages of the workers."""
        scale = 100.0 / self.workers if self.workers else float("nan")
        return Speedup(100.0, self.achieved * scale, self.lost_to_interconnect * scale,
                       self.lost_to_imbalance * scale)


def pop_efficiency(window: Window, sums: WindowSums) -> Efficiency:
    """POP efficiencies from the window's reductions (NaN figures when nothing was reported)."""
    useful = sums.compute_rl[sums.reporting].sum(axis=1)
    ranks = np.asarray(window.ranks)[sums.reporting]
    wall = float(np.nansum(sums.step_wall_s))
    ideal = float(np.nansum(sums.path_sl))
    if len(useful) == 0 or wall <= 0.0 or useful.max() <= 0.0:
        nan = float("nan")
        return Efficiency(ranks, useful, wall, ideal, nan, nan, nan, nan, nan)
    top = float(useful.max())
    # A window cannot take less than its compute path: reported step times shorter than that (clocks that
    # disagree, or compute timed around overlapping work) are raised to it, so each factor stays in [0, 1]
    # by construction and the speedup split stays non-negative.
    # Rounding of sums taken in different orders is clipped too.
    wall = max(wall, ideal, top)
    lb = min(1.0, float(useful.mean()) / top)
    comm = min(1.0, top / wall)
    ser = min(1.0, top / ideal) if ideal > 0 else float("nan")
    return Efficiency(ranks, useful, wall, ideal, lb, comm, lb * comm, ser, min(1.0, ideal / wall))


@dataclass(frozen=True)
class Straggler:
    """A rank whose compute is far above the fleet's (modified z-score of log compute > threshold)."""

    rank: int
    node: str
    compute_s: float
    score: float


def find_stragglers(window: Window, eff: Efficiency, threshold: float = OUTLIER_Z) -> tuple[Straggler, ...]:
    """Ranks with outlying high compute, worst first.

    Scored on log U_r so "twice as slow" weighs the same on any model size; the scale has a floor of
    ``RELATIVE_JITTER`` so a perfectly even fleet does not turn jitter into stragglers.
    """
    useful = eff.useful_s
    with np.errstate(divide="ignore"):
        score = modified_z(np.where(useful > 0, np.log(useful), np.nan), min_scale=RELATIVE_JITTER)
    hit = np.flatnonzero(np.nan_to_num(score, nan=0.0) > threshold)
    hit = hit[np.argsort(-score[hit])]
    rank_pos = np.searchsorted(window.ranks, eff.ranks[hit])
    return tuple(Straggler(int(eff.ranks[i]), window.nodes[window.rank_node[pos]], float(useful[i]),
                           float(score[i])) for i, pos in zip(hit, rank_pos, strict=True))


def karp_flatt(workers: float | np.ndarray, speedup: float | np.ndarray) -> float | np.ndarray:
    """Experimentally determined serial fraction e = (1/S − 1/p) / (1 − 1/p) (Karp & Flatt, 1990).

    A constant e over run sizes points at serial code; an e that grows with p points at overhead such as
    communication, which is what this tool watches.
    """
    p = np.asarray(workers, dtype=np.float64)
    s = np.asarray(speedup, dtype=np.float64)
    e = (1.0 / s - 1.0 / p) / (1.0 - 1.0 / p)
    return float(e) if e.ndim == 0 else e


@dataclass(frozen=True)
class SerialFraction:
    """Karp–Flatt e per run, runs sorted by worker count."""

    workers: np.ndarray
    speedup: np.ndarray
    serial_fraction: np.ndarray


def serial_fractions(runs: Sequence[tuple[int, float]]) -> SerialFraction:
    """Karp–Flatt e for runs at two or more sizes, given as (p, S) pairs; p must be at least 2."""
    if len({p for p, _ in runs}) < 2:
        raise ValueError("the serial fraction needs runs at two or more sizes")
    data = np.array(sorted(runs), dtype=np.float64)
    if (data[:, 0] < 2).any() or (data[:, 1] <= 0).any():
        raise ValueError("each run needs p >= 2 workers and a positive speedup")
    p, s = data[:, 0], data[:, 1]
    return SerialFraction(p.astype(np.int64), s, karp_flatt(p, s))
