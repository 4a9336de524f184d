"""Pair checks on the head side: the node daemons' own timed messages, as link figures and as advice on
what to check next. Pure numpy.

A check record is one message of ``nbytes`` a node's daemon sent to another daemon and the time until its
acknowledgement came back: t(n) = α + n/β with α a round trip (``docs/wire.md``). The checks run one per
port at a time, so no sharing correction applies: each is fitted as it was measured, through the same
Hockney fit as job transfers, over the newest ``RECENT_PER_PAIR`` results of each pair (a changed link
shows within a few cycles). The links that come out are judged with the job's links (``links.link_stats``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from agent.checkplan import SUSPECT_WEIGHT
from watchtower.analysis.efficiency import FAR_BELOW_PEERS
from watchtower.analysis.robust import HockneyFit, fit_hockney
from watchtower.analysis.window import RunSeries

RECENT_PER_PAIR = 32  # newest results per pair fitted: 4 cycles of (small, large) × 2 messages; no source
CHECK_QUANTILE = 0.25  # checks can meet the job's bursts (one-sided delay): the lower quartile, as for waits
UNCERTAIN_SPREAD = 0.1  # interquartile spread of large-message rates / median above which a pair is uncertain
MIN_LARGE = 4  # large-message results below which a pair's estimate counts as uncertain


@dataclass(frozen=True)
class Checks:
    """Check results held by the store (columnar, length K), oldest first."""

    src: np.ndarray  # int32 node index (the daemon that timed it)
    dst: np.ndarray  # int32 node index
    nbytes: np.ndarray  # int64
    seconds: np.ndarray  # float64, request sent until acknowledged
    step: np.ndarray  # int64, the job's newest step when the result arrived (-1: none yet)
    period_s: float = float("nan")  # the longest period a daemon stated
    budget: float = float("nan")
    deferred: int = 0  # checks put off because the job was busy, summed over daemons

    @classmethod
    def empty(cls) -> Checks:
        return cls(np.empty(0, np.int32), np.empty(0, np.int32), np.empty(0, np.int64), np.empty(0),
                   np.empty(0, np.int64))

    def __len__(self) -> int:
        return len(self.src)

    def recent(self, per_pair: int = RECENT_PER_PAIR) -> Checks:
        """The newest ``per_pair`` results of each directed pair."""
        if len(self) == 0:
            return self
        key = self.src.astype(np.int64) * (1 << 31) + self.dst
        order = np.lexsort((-np.arange(len(self)), key))  # by pair, newest first
        sorted_key = key[order]
        starts = np.flatnonzero(np.r_[True, sorted_key[1:] != sorted_key[:-1]])
        rank = np.arange(len(order)) - np.repeat(starts, np.diff(np.r_[starts, len(order)]))
        keep = np.sort(order[rank < per_pair])
        return Checks(self.src[keep], self.dst[keep], self.nbytes[keep], self.seconds[keep], self.step[keep],
                      self.period_s, self.budget, self.deferred)


@dataclass(frozen=True)
class CheckFits:
    """Per directed pair measured by checks (``pairs`` = src node × N + dst node, ascending)."""

    pairs: np.ndarray
    fit: HockneyFit
    bytes: np.ndarray
    count: np.ndarray
    busy_s: np.ndarray


def fit_checks(checks: Checks, n_nodes: int) -> CheckFits:
    """The Hockney fit of every pair's recent checks (pairs within one node are ignored)."""
    recent = checks.recent()
    network = recent.src != recent.dst
    src, dst = recent.src[network].astype(np.int64), recent.dst[network].astype(np.int64)
    pairs, link = np.unique(src * n_nodes + dst, return_inverse=True)
    nbytes, secs = recent.nbytes[network].astype(np.float64), recent.seconds[network]
    fit = fit_hockney(link, nbytes, secs, len(pairs), quantile=CHECK_QUANTILE)
    return CheckFits(pairs, fit, np.bincount(link, weights=nbytes, minlength=len(pairs)),
                     np.bincount(link, minlength=len(pairs)),
                     np.bincount(link, weights=secs, minlength=len(pairs)))


def check_weights(checks: Checks, nodes: tuple[str, ...],
                  suspects: frozenset[tuple[str, str]] = frozenset()) -> tuple[tuple[str, str, float], ...]:
    """What the schedule should favour: (src, dst, weight > 1) for uncertain and suspected pairs.

    Uncertain: fewer than ``MIN_LARGE`` large-message results, or their rates' interquartile range over
    the median above ``UNCERTAIN_SPREAD`` (weight 1 + spread / that, at most 3). Suspected: the pair's
    fitted β under a third of the median pair's, or named in ``suspects`` (the job's own figures): weight
    ``SUSPECT_WEIGHT``, so its rotation runs first.
    """
    n = len(nodes)
    recent = checks.recent()
    weights: dict[tuple[int, int], float] = {}
    if len(recent):
        large = recent.nbytes >= np.max(recent.nbytes) / 4
        for pair in set(zip(recent.src.tolist(), recent.dst.tolist(), strict=True)):
            if pair[0] == pair[1]:
                continue
            mine = large & (recent.src == pair[0]) & (recent.dst == pair[1])
            rates = recent.nbytes[mine] / recent.seconds[mine]
            if len(rates) < MIN_LARGE:
                weights[pair] = 2.0
                continue
            q1, med, q3 = np.percentile(rates, [25, 50, 75])
            spread = (q3 - q1) / med if med > 0 else np.inf
            if spread > UNCERTAIN_SPREAD:
                weights[pair] = float(min(3.0, 1.0 + spread / UNCERTAIN_SPREAD))
        fits = fit_checks(checks, n)
        beta = fits.fit.beta_Bps
        if np.isfinite(beta).sum() >= 3:
            slow = beta < FAR_BELOW_PEERS * np.nanmedian(beta)
            for p in fits.pairs[slow].tolist():
                weights[(p // n, p % n)] = SUSPECT_WEIGHT
    index = {name: i for i, name in enumerate(nodes)}
    for a, b in suspects:
        if a in index and b in index and a != b:
            weights[(index[a], index[b])] = SUSPECT_WEIGHT
    return tuple((nodes[s], nodes[d], w) for (s, d), w in sorted(weights.items()) if w > 1.0)


def job_suspects(rates: dict[tuple[str, str], float]) -> frozenset[tuple[str, str]]:
    """Pairs the job's own recent throughput puts under a third of the median pair's (at least 3 pairs)."""
    if len(rates) < 3:
        return frozenset()
    median = float(np.median(list(rates.values())))
    return frozenset(pair for pair, rate in rates.items() if rate < FAR_BELOW_PEERS * median)


def check_rate_series(checks: Checks) -> RunSeries:
    """Per job step and directed pair, the median rate of the large check messages that arrived in that step:
    what degradation alerts watch for links only checks measure (step time is left to the job's series)."""
    large = (checks.nbytes >= np.max(checks.nbytes, initial=0) / 4) & (checks.src != checks.dst) & \
        (checks.step >= 0) & (checks.seconds > 0)
    if not large.any():
        return RunSeries(np.empty(0, np.int64), np.empty(0), (), np.zeros((0, 0)), np.zeros((0, 0)))
    steps, row = np.unique(checks.step[large], return_inverse=True)
    pair_keys = checks.src[large].astype(np.int64) * (1 << 31) + checks.dst[large]
    pairs, column = np.unique(pair_keys, return_inverse=True)
    rate = checks.nbytes[large] / checks.seconds[large]
    grid = np.full((len(steps), len(pairs)), np.nan)
    cell = row * len(pairs) + column
    order = np.lexsort((rate, cell))
    cell, rate = cell[order], rate[order]
    starts = np.flatnonzero(np.r_[True, cell[1:] != cell[:-1]])
    ends = np.r_[starts[1:], len(cell)]
    grid.flat[cell[starts]] = (rate[(starts + ends - 1) // 2] + rate[(starts + ends) // 2]) / 2
    sums = np.zeros((len(steps) * len(pairs), 2))
    np.add.at(sums, row * len(pairs) + column,
              np.column_stack([checks.nbytes[large], checks.seconds[large]]))
    links = tuple((int(k >> 31), int(k & ((1 << 31) - 1))) for k in pairs.tolist())
    return RunSeries(steps, np.full(len(steps), np.nan), links, sums[:, 0].reshape(grid.shape),
                     sums[:, 1].reshape(grid.shape), link_watch_Bps=grid)
