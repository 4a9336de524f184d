"""The input of every analysis: a window of steps as dense numpy arrays.

The store (live) and the recording reader (report, replay) both build a ``Window``; the analysis never
sees frames, sockets or widgets. Times are seconds (float64). A rank that did not report a step has NaN
in that step's cells.
"""

from __future__ import annotations

from dataclasses import dataclass, field, fields, replace

import numpy as np


@dataclass(frozen=True)
class Transfers:
    """Point-to-point transfers, one entry per received message (columnar, all arrays of length E).

    ``src``/``dst`` are rank ids. ``start_s``/``end_s`` are on the collector's clock (offsets applied).
    ``wait_s`` is when the peer became ready, relative to ``start_s`` (NaN when unknown): positive, the
    receiver waited that long; negative, the peer started first and its bytes were already moving. Either
    way the transfer proper took ``end_s - start_s - wait_s``.
    """

    step: np.ndarray  # int64
    layer: np.ndarray  # int32, index into Window.layers
    src: np.ndarray  # int32 rank
    dst: np.ndarray  # int32 rank
    nbytes: np.ndarray  # int64
    start_s: np.ndarray  # float64
    end_s: np.ndarray  # float64
    wait_s: np.ndarray  # float64, NaN = unknown

    @classmethod
    def empty(cls) -> Transfers:
        i64, i32, f64 = np.int64, np.int32, np.float64
        return cls(np.empty(0, i64), np.empty(0, i32), np.empty(0, i32), np.empty(0, i32), np.empty(0, i64),
                   np.empty(0, f64), np.empty(0, f64), np.empty(0, f64))

    def __len__(self) -> int:
        return len(self.step)

    @property
    def transfer_s(self) -> np.ndarray:
        """Time moving bytes: the exchange less the known wait (all of it when the wait is unknown)."""
        return self.end_s - self.start_s - np.nan_to_num(self.wait_s, nan=0.0)


@dataclass(frozen=True)
class Collectives:
    """Collective operations (allreduce and friends), one entry per call per rank (columnar, length K)."""

    step: np.ndarray  # int64
    layer: np.ndarray  # int32
    rank: np.ndarray  # int32
    op: np.ndarray  # int16, agent.wire.Op value
    group: np.ndarray  # int32, group size
    nbytes: np.ndarray  # int64
    seconds: np.ndarray  # float64, time blocked in the call

    @classmethod
    def empty(cls) -> Collectives:
        return cls(np.empty(0, np.int64), np.empty(0, np.int32), np.empty(0, np.int32), np.empty(0, np.int16),
                   np.empty(0, np.int32), np.empty(0, np.int64), np.empty(0, np.float64))

    def __len__(self) -> int:
        return len(self.step)


@dataclass(frozen=True)
class Window:
    """A window of S steps from R ranks over L layers, on N nodes."""

    layers: tuple[str, ...]  # L layer names
    nodes: tuple[str, ...]  # N node names
    ranks: np.ndarray  # int32 [R] rank ids, ascending
    rank_node: np.ndarray  # int32 [R] index into nodes
    steps: np.ndarray  # int64 [S] step indices, ascending
    compute_s: np.ndarray  # float64 [S, R, L]
    exchange_s: np.ndarray  # float64 [S, R, L]
    step_s: np.ndarray  # float64 [S, R] wall time of each rank's step
    transfers: Transfers = field(default_factory=Transfers.empty)
    collectives: Collectives = field(default_factory=Collectives.empty)

    @property
    def shape(self) -> tuple[int, int, int]:
        return self.compute_s.shape  # type: ignore[return-value]

    def last(self, steps: int) -> Window:
        """The newest ``steps`` steps of this window (views of its cubes; the transfers of those steps)."""
        cut = len(self.steps) - steps
        if cut <= 0:
            return self
        first = self.steps[cut]
        keep_t, keep_c = self.transfers.step >= first, self.collectives.step >= first
        return replace(self, steps=self.steps[cut:], compute_s=self.compute_s[cut:],
                       exchange_s=self.exchange_s[cut:], step_s=self.step_s[cut:],
                       transfers=Transfers(*(a[keep_t] for a in _columns(self.transfers))),
                       collectives=Collectives(*(a[keep_c] for a in _columns(self.collectives))))

    def rank_index(self, rank_ids: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Positions of rank ids in ``ranks`` (int64) and a mask of the ids this window knows."""
        return _index_in(np.asarray(self.ranks), rank_ids)

    def step_index(self, step_ids: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Positions of step indices in ``steps`` (int64) and a mask of the steps in this window."""
        return _index_in(np.asarray(self.steps), step_ids)


def _index_in(sorted_ids: np.ndarray, ids: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    n = len(sorted_ids)
    if n == 0:
        return np.zeros(len(ids), np.int64), np.zeros(len(ids), bool)
    first = int(sorted_ids[0])
    if int(sorted_ids[-1]) - first == n - 1:  # consecutive ids, the usual case: no search needed
        pos = np.asarray(ids, np.int64) - first
        known = (pos >= 0) & (pos < n)
        return np.where(known, pos, 0), known
    pos = np.clip(np.searchsorted(sorted_ids, ids), 0, n - 1).astype(np.int64)
    return pos, sorted_ids[pos] == ids


@dataclass(frozen=True)
class RunSeries:
    """Whole-run per-step series for trends and degradation alerts (the store may downsample them).

    ``links`` lists the directed node pairs (src node index, dst node index) of the columns;
    ``link_transfer_s`` is the summed transfer time (waits excluded) of that pair in that step.
    """

    steps: np.ndarray  # int64 [S]
    step_s: np.ndarray  # float64 [S], the step's wall time (slowest rank)
    links: tuple[tuple[int, int], ...]  # P pairs of node indices
    link_bytes: np.ndarray  # float64 [S, P]
    link_transfer_s: np.ndarray  # float64 [S, P]
    # float64 [S, P]: the rate degradation alerts watch, less sensitive than throughput to flows that happen
    # to share a port: the store keeps each step's fastest transfer, the analysis the median rate with the
    # sharing taken out (links.link_rate_series) where it still holds the transfers.
    link_watch_Bps: np.ndarray | None = None

    def link_rate(self) -> np.ndarray:
        """Per step and pair, the rate to watch for degradation (NaN where the pair moved nothing);
        throughput (bytes / transfer time) when no better rate is known."""
        if self.link_watch_Bps is not None:
            return self.link_watch_Bps
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where((self.link_bytes > 0) & (self.link_transfer_s > 0),
                            self.link_bytes / self.link_transfer_s, np.nan)


def _columns(columns: Transfers | Collectives) -> tuple[np.ndarray, ...]:
    """A columnar table's arrays in field order (``dataclasses.astuple`` would deep-copy them)."""
    return tuple(getattr(columns, f.name) for f in fields(columns))
