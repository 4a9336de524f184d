"""Cost models and projections: collective costs, the halo-exchange model, what-if step times, the ETA.

Collective costs are the α–β (Hockney) costs of the classic algorithms (Thakur, Rabenseifner & Gropp,
IJHPCA 2005; Patarasuk & Yuan, JPDC 2009): n bytes per rank, α seconds per message, β bytes/s. Round
counts use ceil(log2 p), so a non-power-of-two p costs the rounds of the next power of two.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from agent.wire import MAX_WORLD, Op
from watchtower.analysis.efficiency import Efficiency
from watchtower.analysis.window import Window

ArrayLike = float | np.ndarray
_GROUP_BITS = MAX_WORLD.bit_length()


def _rounds(p: ArrayLike) -> ArrayLike:
    return np.ceil(np.log2(np.maximum(p, 1)))


def _share(p: ArrayLike) -> ArrayLike:
    p = np.asarray(p, dtype=np.float64)
    return (p - 1.0) / p


def ring_allreduce(p: ArrayLike, n: ArrayLike, alpha: ArrayLike, beta: ArrayLike) -> ArrayLike:
    """2(p−1)α + 2((p−1)/p)·n/β: reduce-scatter then allgather around a ring (Patarasuk & Yuan, 2009)."""
    p = np.asarray(p, dtype=np.float64)
    return 2.0 * (p - 1.0) * alpha + 2.0 * _share(p) * n / beta


def recursive_doubling_allreduce(p: ArrayLike, n: ArrayLike, alpha: ArrayLike, beta: ArrayLike) -> ArrayLike:
    """log2(p)(α + n/β): the whole vector exchanged in each of log2 p rounds (Thakur et al., 2005)."""
    return _rounds(p) * (alpha + n / beta)


def rabenseifner_allreduce(p: ArrayLike, n: ArrayLike, alpha: ArrayLike, beta: ArrayLike) -> ArrayLike:
    """2 log2(p) α + 2((p−1)/p)·n/β: reduce-scatter by recursive halving, allgather by doubling (Thakur)."""
    return 2.0 * _rounds(p) * alpha + 2.0 * _share(p) * n / beta


def binomial_tree(p: ArrayLike, n: ArrayLike, alpha: ArrayLike, beta: ArrayLike) -> ArrayLike:
    """ceil(log2 p)(α + n/β): broadcast or reduce down/up a binomial tree (Thakur et al., 2005)."""
    return _rounds(p) * (alpha + n / beta)


def ring_allgather(p: ArrayLike, n: ArrayLike, alpha: ArrayLike, beta: ArrayLike) -> ArrayLike:
    """(p−1)α + ((p−1)/p)·n/β, n the gathered total; also reduce-scatter and pairwise all-to-all (Thakur)."""
    p = np.asarray(p, dtype=np.float64)
    return (p - 1.0) * alpha + _share(p) * n / beta


def scatter_tree(p: ArrayLike, n: ArrayLike, alpha: ArrayLike, beta: ArrayLike) -> ArrayLike:
    """ceil(log2 p)α + ((p−1)/p)·n/β: binomial-tree scatter or gather of n bytes in total (Thakur)."""
    return _rounds(p) * alpha + _share(p) * n / beta


def allreduce(p: ArrayLike, n: ArrayLike, alpha: ArrayLike, beta: ArrayLike) -> ArrayLike:
    """The cheapest of the three allreduce algorithms: libraries switch algorithm by message size."""
    return np.minimum(np.minimum(ring_allreduce(p, n, alpha, beta), recursive_doubling_allreduce(p, n, alpha, beta)),
                      rabenseifner_allreduce(p, n, alpha, beta))


def collective_cost(op: np.ndarray, p: ArrayLike, n: ArrayLike, alpha: float, beta: float) -> np.ndarray:
    """Model cost of each collective call given its ``agent.wire.Op`` code (0 for p ≤ 1 and unknown ops)."""
    op = np.asarray(op)
    p = np.asarray(p, dtype=np.float64)
    n = np.asarray(n, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        cost = np.select(
            [op == Op.ALLREDUCE, np.isin(op, (Op.BROADCAST, Op.REDUCE)),
             np.isin(op, (Op.ALLGATHER, Op.REDUCE_SCATTER, Op.ALLTOALL)), np.isin(op, (Op.GATHER, Op.SCATTER)),
             op == Op.BARRIER],
            [allreduce(p, n, alpha, beta), binomial_tree(p, n, alpha, beta), ring_allgather(p, n, alpha, beta),
             scatter_tree(p, n, alpha, beta), _rounds(p) * alpha],
            0.0)
    return np.where(p > 1, cost, 0.0)


def halo_exchange(msgs: np.ndarray, nbytes: np.ndarray, alpha: float, beta: float) -> np.ndarray:
    """Per rank: its neighbour messages one after another, each α + n/β; the layer waits for the slowest
    rank, so callers take the max over ranks. ``msgs``/``nbytes`` are the rank's message count and bytes."""
    return msgs * alpha + nbytes / beta


@dataclass(frozen=True)
class StepModel:
    """A step time model of the window, for what-if questions about the fabric and the rank count.

    step(k, m, p') = path · p/p' + residual + comm(α/m, β·k, p'), where path is the compute critical
    path per step (T_ideal / steps), comm the mean rank's modelled collectives plus the per-layer halo
    exchange (max over ranks), and residual the measured step time not explained by either (waits, jitter),
    kept as it is. With k = m = 1 and p' = p the model returns the measured step time. Strong scaling:
    compute divides over p', collectives over the whole job grow to p', halo messages stay as measured.
    """

    workers: int
    work_s: float  # Σ U_r per step: what one ideal worker would take
    path_s: float
    measured_s: float
    alpha_s: float
    beta_Bps: float
    coll_op: np.ndarray
    coll_group: np.ndarray
    coll_nbytes: np.ndarray
    coll_per_step: np.ndarray  # calls per step of the mean participating rank
    halo_cell: np.ndarray  # int64 [G], (step, layer) cell of each (step, layer, rank) group
    halo_msgs: np.ndarray
    halo_bytes: np.ndarray
    n_steps: int
    # The same halo traffic split by directed node pair (code src node × nodes + dst node), for per-link
    # α and β: rows of (group, pair, messages, bytes); each group is one (step, layer, receiving rank) and
    # ``group_cell`` its (step, layer) cell, sorted.
    group_cell: np.ndarray
    row_group: np.ndarray
    row_pair: np.ndarray
    row_msgs: np.ndarray
    row_bytes: np.ndarray

    def comm_s(self, alpha: float, beta: float, workers: int) -> float:
        """Modelled communication per step with the given fabric and rank count."""
        group = np.where(self.coll_group == self.workers, workers, self.coll_group)
        coll = float(np.sum(self.coll_per_step * collective_cost(self.coll_op, group, self.coll_nbytes, alpha, beta)))
        if len(self.halo_cell) == 0 or self.n_steps == 0:
            return coll
        cost = halo_exchange(self.halo_msgs, self.halo_bytes, alpha, beta)
        starts = np.flatnonzero(np.r_[True, self.halo_cell[1:] != self.halo_cell[:-1]])
        return coll + float(np.maximum.reduceat(cost, starts).sum()) / self.n_steps

    def step_s(self, *, bandwidth_x: float = 1.0, latency_div: float = 1.0, workers: int | None = None) -> float:
        """Predicted step time with β × ``bandwidth_x``, α / ``latency_div`` and ``workers`` ranks."""
        p = self.workers if workers is None else workers
        path = self.path_s * self.workers / p
        residual = self.measured_s - self.path_s - self.comm_s(self.alpha_s, self.beta_Bps, self.workers)
        comm = self.comm_s(self.alpha_s / latency_div, self.beta_Bps * bandwidth_x, p)
        return max(path, path + residual + comm)

    def links_comm_s(self, alpha: np.ndarray, beta: np.ndarray) -> float:
        """Modelled communication per step with each node pair at its own α and β (indexed by pair code):
        the halo exchange as in ``comm_s``, each message at its pair's α + n/β, the layer waiting for the
        busiest rank counting both the messages it receives and those it sends (a way out shared by
        several messages sends them one after another at its rate); collectives at the fleet's α
        and the slowest pair's β, since a ring or tree over the whole job is paced by its slowest link
        (Patarasuk & Yuan, 2009)."""
        finite = beta[np.isfinite(beta) & (beta > 0)]
        coll_beta = float(finite.min()) if len(finite) else float("inf")
        group = self.coll_group
        coll = float(np.sum(self.coll_per_step * collective_cost(self.coll_op, group, self.coll_nbytes,
                                                                 self.alpha_s, coll_beta)))
        if len(self.group_cell) == 0 or self.n_steps == 0:
            return coll
        cost = self.row_msgs * alpha[self.row_pair] + self.row_bytes / beta[self.row_pair]
        per_group = np.bincount(self.row_group, weights=cost, minlength=len(self.group_cell))
        starts = np.flatnonzero(np.r_[True, self.group_cell[1:] != self.group_cell[:-1]])
        return coll + float(np.maximum.reduceat(per_group, starts).sum()) / self.n_steps

    def speedup(self, *, bandwidth_x: float = 1.0, latency_div: float = 1.0, workers: int | None = None) -> float:
        """Projected speedup over one ideal worker: work per step / predicted step time (NaN when steps
        take no time at all)."""
        step_s = self.step_s(bandwidth_x=bandwidth_x, latency_div=latency_div, workers=workers)
        return self.work_s / step_s if step_s > 0 else float("nan")


def step_model(window: Window, eff: Efficiency, alpha_s: float, beta_Bps: float) -> StepModel:
    """Build the what-if model from the window, its POP figures and the fleet's link parameters.

    Only network transfers (between nodes) enter the halo model; a NaN α is taken as 0, a NaN β as no
    network cost at all.
    """
    n_steps = max(1, int(np.count_nonzero(np.isfinite(window.step_s).any(axis=1))))
    return model_of(eff, n_steps, alpha_s, beta_Bps, _collective_signatures(window, n_steps), _halo_groups(window),
                    _halo_rows(window))


def model_of(eff: Efficiency, n_steps: int, alpha_s: float, beta_Bps: float,
             signatures: tuple[np.ndarray, ...], halo: tuple[np.ndarray, np.ndarray, np.ndarray],
             rows: tuple[np.ndarray, ...] | None = None) -> StepModel:
    """``step_model`` from its parts: (op, group, bytes, calls per step) of the collectives, (cell, messages,
    bytes) of the halo groups, sorted by cell, and the halo split by node pair as ``_halo_rows`` gives it
    (None: not known, as from per-step summaries: ``links_comm_s`` then models the collectives only)."""
    if rows is None:
        empty_i, empty_f = np.zeros(0, np.int64), np.zeros(0)
        rows = (empty_i, empty_i, empty_i, empty_f, empty_f)
    alpha = 0.0 if not np.isfinite(alpha_s) else float(alpha_s)
    beta = float(beta_Bps) if np.isfinite(beta_Bps) and beta_Bps > 0 else float("inf")
    return StepModel(eff.workers, float(eff.useful_s.sum()) / n_steps, eff.ideal_s / n_steps,
                     eff.wall_s / n_steps, alpha, beta, *signatures, *halo, n_steps, *rows)


def _collective_signatures(window: Window, n_steps: int) -> tuple[np.ndarray, ...]:
    """Distinct (op, group size, bytes) calls and how many of each the mean participating rank makes per step.

    Calls are counted per rank, not per group, because concurrent calls in disjoint groups (say one per
    tensor-parallel group) overlap in time: a rank's step contains only its own calls.
    """
    col = window.collectives
    ri, known = window.rank_index(col.rank)
    if not known.any():
        empty = np.zeros(0, np.int64)
        return empty, empty, empty, np.zeros(0)
    _, n_code = np.unique(np.asarray(col.nbytes, np.int64)[known], return_inverse=True)
    # Group sizes are capped by the wire (≤ MAX_WORLD), so (op, group, bytes code) packs into one int64.
    group = np.clip(np.asarray(col.group, np.int64)[known], 0, MAX_WORLD)
    packed = ((np.asarray(col.op, np.int64)[known] << _GROUP_BITS) | group) * (int(n_code.max()) + 1) + n_code
    first, sig = np.unique(packed, return_index=True, return_inverse=True)[1:]
    entries = np.bincount(sig, minlength=len(first))
    n_ranks = len(window.ranks)
    rank_pairs = np.unique(sig * n_ranks + ri[known])
    ranks_per_sig = np.bincount(rank_pairs // n_ranks, minlength=len(first))
    idx = np.flatnonzero(known)[first]
    return (np.asarray(col.op, np.int64)[idx], np.asarray(col.group, np.int64)[idx],
            np.asarray(col.nbytes, np.int64)[idx], entries / ranks_per_sig / n_steps)


def _halo_groups(window: Window) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Message count and bytes per (step, layer, receiving rank) over network transfers, sorted by cell."""
    tr = window.transfers
    if len(tr) == 0 or len(window.ranks) == 0:
        empty = np.zeros(0, np.int64)
        return empty, empty, empty
    si, src_ok = window.rank_index(tr.src)
    di, dst_ok = window.rank_index(tr.dst)
    step_idx, step_ok = window.step_index(tr.step)
    rank_node = np.asarray(window.rank_node)
    net = src_ok & dst_ok & step_ok & (rank_node[si] != rank_node[di])
    n_layers, n_ranks = max(1, len(window.layers)), len(window.ranks)
    # One int64 key per (step, layer, receiving rank); sorted, so each (step, layer) cell is a contiguous run.
    cell = step_idx[net] * n_layers + np.asarray(tr.layer, np.int64)[net]
    key, inv = np.unique(cell * n_ranks + di[net], return_inverse=True)
    msgs = np.bincount(inv, minlength=len(key)).astype(np.float64)
    nbytes = np.bincount(inv, weights=np.asarray(tr.nbytes, np.float64)[net], minlength=len(key))
    return key // n_ranks, msgs, nbytes


def _halo_rows(window: Window) -> tuple[np.ndarray, ...]:
    """Network transfers grouped by (step, layer, rank, receiving or sending) and, within a group, by node pair:
    (cell of each group, then per row its group, pair code, message count and bytes)."""
    tr = window.transfers
    empty_i, empty_f = np.zeros(0, np.int64), np.zeros(0)
    if len(tr) == 0 or len(window.ranks) == 0:
        return empty_i, empty_i, empty_i, empty_f, empty_f
    si, src_ok = window.rank_index(tr.src)
    di, dst_ok = window.rank_index(tr.dst)
    step_idx, step_ok = window.step_index(tr.step)
    rank_node = np.asarray(window.rank_node, np.int64)
    net = src_ok & dst_ok & step_ok & (rank_node[si] != rank_node[di])
    if not net.any():
        return empty_i, empty_i, empty_i, empty_f, empty_f
    n_layers, n_ranks, n_pairs = max(1, len(window.layers)), len(window.ranks), len(window.nodes) ** 2
    cell = step_idx[net] * n_layers + np.asarray(tr.layer, np.int64)[net]
    pair = rank_node[si[net]] * len(window.nodes) + rank_node[di[net]]
    # Each message counts at both ends: a receiver takes its messages one after another, and so does a
    # sender whose way out carries several at once (side 0: receiving rank, 1: sending rank).
    cell2 = np.concatenate([cell, cell])
    rank2 = np.concatenate([di[net], si[net]])
    side = np.repeat([0, 1], len(cell))
    groups, group = np.unique((cell2 * n_ranks + rank2) * 2 + side, return_inverse=True)
    rows, row = np.unique(group * n_pairs + np.concatenate([pair, pair]), return_inverse=True)
    msgs = np.bincount(row, minlength=len(rows)).astype(np.float64)
    weights = np.asarray(tr.nbytes, np.float64)[net]
    nbytes = np.bincount(row, weights=np.concatenate([weights, weights]), minlength=len(rows))
    return groups // 2 // n_ranks, rows // n_pairs, rows % n_pairs, msgs, nbytes


def remaining_steps(total_steps: int | None, last_step: int) -> int | None:
    """Steps left after ``last_step`` (steps count from 0); None without a configured total."""
    return None if total_steps is None else max(0, total_steps - (last_step + 1))


def eta_s(remaining: int | None, recent_step_s: float) -> float | None:
    """Time to finish: remaining steps × the recent mean step time."""
    if remaining is None or not np.isfinite(recent_step_s):
        return None
    return remaining * recent_step_s
