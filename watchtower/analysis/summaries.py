"""Per-step summaries: fold each completed step's raw records once, build a window's figures from summaries.

Why: a snapshot that re-analyses every raw transfer of its window costs O(transfers) each time (0.8 s at
4096 ranks × 256 layers × 120 steps). Folded once per step into the sums and sketches below, a window's
figures cost O(ranks × layers + links) whatever the number of transfers, and summaries of disjoint rank sets
(shard collectors) merge into the summary of their union. The figures are the full analysis's (the same
functions of ``aggregate``, ``efficiency``, ``links`` and ``ports`` run on the folded values); docs/snapshot.md
says which are exact and which are sketched, with what error.

``fold`` turns a ``Window`` into one ``StepSummary`` per step; ``merge_ranks`` joins summaries of one step
from disjoint rank sets; ``SummaryWindow`` keeps the newest steps' summaries with running sums and builds
``Figures`` from them.

The link fit needs two window-level values before a step can be folded: each link's raw latency α and each
port's busy level (``sharing``). A step is folded against a ``Reference`` holding them; ``Figures`` carries
the window's own reference and lists the fitted steps folded against another one (``stale_steps``): the
collector folds each step against its newest snapshot's reference and refolds stale steps while it still
holds their raw transfers. Folded against the window's reference, β equals the full analysis's within the
sketches' error bound.
"""

from __future__ import annotations

from collections import deque
from collections.abc import Sequence
from dataclasses import dataclass, field, replace

import numpy as np

from watchtower.analysis.aggregate import COMM_BOUND_THRESHOLD, LayerStats, WindowSums, layer_stats
from watchtower.analysis.cusum import Alert, degradation_alerts
from watchtower.analysis.drilldown import WorstRanks, worst_of_sums
from watchtower.analysis.efficiency import Efficiency, Speedup, Straggler, find_stragglers, pop_efficiency
from watchtower.analysis.links import (
    MAX_FIT_TRANSFERS,
    SLOW_FRACTION,
    WAITS_KNOWN_QUANTILE,
    WAITS_UNKNOWN_QUANTILE,
    LinkStats,
    judge_links,
    moving_transfers,
    unshare,
)
from watchtower.analysis.models import StepModel, eta_s, model_of
from watchtower.analysis.models import remaining_steps as _remaining
from watchtower.analysis.ports import PortStats, name_alert_ports, port_stats
from watchtower.analysis.robust import fit_bins, fit_hockney
from watchtower.analysis.sharing import PortFlows, busy_bins, level_of_bins, port_flows, shares
from watchtower.analysis.sketch import RELATIVE_ACCURACY, Sketches, merge
from watchtower.analysis.summary import RECENT_STEPS, SCENARIOS, Analysis, WhatIf, what_ifs
from watchtower.analysis.window import RunSeries, Window
from watchtower.cluster import Cluster

NODE_BITS = 16  # a link is (src node << 16) | dst node: up to 65,536 nodes
SIZE_BITS = 9  # a (link, size bin) group is link << 9 | bin, bin = ⌊8 log2 bytes⌋ (fit_hockney's bins) < 512
SIZE_BINS_PER_OCTAVE = 8  # fit_hockney's default
NS_PER_S = 1e9
# A transfer shares its ports with flows of the steps either side (ranks drift apart by up to a step), so a
# step's port loads are worked out with this many steps on each side present. No source: measured on a run
# between network namespaces, where one step either side made the loads those of the whole window.
CONTEXT_STEPS = 1


@dataclass(frozen=True)
class Reference:
    """What the link fit of a step is folded against: each link's raw α and each port's busy level."""

    links: np.ndarray  # int64 link codes, sorted
    alpha_s: np.ndarray  # float64 per link (0 where unknown)
    level_Bps: np.ndarray  # float64 [2 N]: node's way out at node, way in at N + node (NaN: unknown)

    def same(self, other: Reference | None) -> bool:
        return other is not None and all(np.array_equal(a, b, equal_nan=True) for a, b in (
            (self.links, other.links), (self.alpha_s, other.alpha_s), (self.level_Bps, other.level_Bps)))


@dataclass(frozen=True)
class Sparse:
    """Sums by int64 key (sorted, unique): mergeable by concatenating and adding equal keys."""

    key: np.ndarray
    value: np.ndarray

    @classmethod
    def of(cls, key: np.ndarray, value: np.ndarray) -> Sparse:
        if len(key) == 0:
            return cls(np.empty(0, np.int64), np.empty(0, np.float64))
        keys, where = np.unique(key, return_inverse=True)
        return cls(keys, np.bincount(where, weights=value, minlength=len(keys)))

    @staticmethod
    def merged(parts: Sequence[Sparse]) -> Sparse:
        return Sparse.of(np.concatenate([p.key for p in parts]), np.concatenate([p.value for p in parts]))


@dataclass(frozen=True)
class LinkSums:
    """Per directed node pair (``link`` codes sorted), this step's traffic as received by its ranks."""

    link: np.ndarray  # int64 (src node << NODE_BITS) | dst node
    bytes: np.ndarray  # int64
    transfers: np.ndarray  # int64, transfers between ranks known to the summary
    busy_s: np.ndarray  # Σ max(t, 0): time spent transferring, known waits excluded
    hockney: np.ndarray  # float64 [P, 5]: Σn, Σt, Σn², Σnt, Σt² over transfers with n > 0, t > 0
    fit_count: np.ndarray  # int64: those transfers
    t_min_s: np.ndarray
    t_max_s: np.ndarray
    fastest_Bps: np.ndarray  # the highest n / t of one transfer
    waits_known: np.ndarray  # int64: transfers whose peer's readiness was known
    worst_receiver_s: np.ndarray  # the highest Σ max(t, 0) of one receiving rank (hours at stake)

    @staticmethod
    def merged(parts: Sequence[LinkSums]) -> LinkSums:
        """One row per link over ``parts`` (steps or shards): sums add, extremes combine."""
        links, at = np.unique(np.concatenate([p.link for p in parts]), return_inverse=True)
        n = len(links)

        def column(name: str) -> np.ndarray:
            return np.concatenate([getattr(p, name) for p in parts])

        def total(name: str, dtype: type = np.float64) -> np.ndarray:
            return np.bincount(at, weights=column(name), minlength=n).astype(dtype)

        order = np.argsort(at, kind="stable")
        starts = np.searchsorted(at[order], np.arange(n))

        def extreme(name: str, ufunc: np.ufunc, start: float) -> np.ndarray:
            return ufunc(ufunc.reduceat(column(name)[order], starts), start) if n else np.zeros(0)

        stacked = np.concatenate([p.hockney for p in parts])
        hockney = np.column_stack([np.bincount(at, weights=stacked[:, k], minlength=n) for k in range(5)]) \
            if n else np.zeros((0, 5))
        return LinkSums(links, total("bytes", np.int64), total("transfers", np.int64), total("busy_s"), hockney,
                        total("fit_count", np.int64), extreme("t_min_s", np.fmin, np.inf),
                        extreme("t_max_s", np.fmax, -np.inf), extreme("fastest_Bps", np.fmax, 0.0),
                        total("waits_known", np.int64), extreme("worst_receiver_s", np.fmax, 0.0))

    def plain_fit(self) -> tuple[np.ndarray, np.ndarray]:
        """Per link, the textbook least-squares line t = α + n/β from the sufficient statistics (α, β):
        ``robust.hockney_lstsq`` without the points. Not robust to waiting; for comparison and drill-downs."""
        count, (sn, st, snn, snt, _stt) = self.fit_count, self.hockney.T
        with np.errstate(invalid="ignore", divide="ignore"):
            sxx = snn - sn * sn / count
            slope = np.where(sxx > 0, (snt - sn * st / count) / sxx, np.nan)
            return st / count - slope * sn / count, np.where(slope > 0, 1.0 / slope, np.nan)


@dataclass(frozen=True)
class StepSummary:
    """One step of one set of ranks, folded. Exact except the two sketches (relative ``sketch.accuracy``)."""

    step: int
    layers: tuple[str, ...]
    nodes: tuple[str, ...]
    ranks: np.ndarray  # int32 [R], ascending
    rank_node: np.ndarray  # int32 [R]
    compute_ns: np.ndarray  # int32 or int64 [R, L], whole nanoseconds (a rank that did not report: 0)
    exchange_ns: np.ndarray  # the same
    step_s: np.ndarray  # float64 [R], NaN: did not report
    path_s: np.ndarray  # float64 [L], max over ranks of compute (NaN: none reported)
    links: LinkSums
    bin_bytes: Sparse  # Σ bytes per (link, size bin) group, over the transfers the sketches hold
    raw_s: Sketches  # per (link, size bin): transfer times as measured (for the raw α)
    unshared_s: Sketches  # per (link, size bin): the same with port sharing taken out (for β)
    busy: Sparse  # per (port << 20 | busy bin + 2^19): seconds the port's flows ran at that aggregate rate
    watch: np.ndarray  # float64 [P, 3] per row of ``links``: median rate with sharing out, its bytes, its time
    halo: np.ndarray  # float64 [H, 3]: distinct (layer, messages, bytes) of a receiving rank's network transfers
    collectives: np.ndarray  # int64 [K, 3]: distinct (op, group size, bytes) calls
    collective_calls: np.ndarray  # int64 [K]: calls of each, all ranks together
    collective_ranks: np.ndarray  # int64 [C, 2]: distinct (row in collectives, rank id) that made such a call
    reference: Reference | None  # what the link fit was folded against (None: this step's own)

    @property
    def transfers(self) -> int:
        return int(self.links.transfers.sum())


def fold(window: Window, cluster: Cluster, reference: Reference | None = None,
         accuracy: float = RELATIVE_ACCURACY, peers: tuple[np.ndarray, np.ndarray] | None = None) -> list[StepSummary]:
    """One summary per step of ``window``: its records, with the flows of ``CONTEXT_STEPS`` steps either side
    loading the ports its transfers crossed (live, a step is folded once the next one is complete).

    ``peers`` (rank ids ascending, their node indices) places the senders of received transfers when the
    window holds only some ranks (a shard collector's); by default the window's own ranks."""
    tr = window.transfers
    peer_ranks, peer_node = (np.asarray(window.ranks), np.asarray(window.rank_node)) if peers is None else peers
    si, src_ok = _positions(np.asarray(peer_ranks), np.asarray(tr.src))
    di, dst_ok = window.rank_index(tr.dst)
    pos, step_ok = window.step_index(tr.step)
    known = np.flatnonzero(src_ok & dst_ok & step_ok)
    known = known[np.argsort(pos[known], kind="stable")]
    bounds = np.searchsorted(pos[known], np.arange(len(window.steps) + 1))
    nominal = np.array([np.nan if (v := cluster.nominal_Bps(name)) is None else v for name in window.nodes])
    src_node = np.asarray(peer_node, np.int64)[si[known]]
    dst_node = np.asarray(window.rank_node, np.int64)[di[known]]
    columns = (src_node, dst_node, di[known], np.asarray(tr.nbytes[known], np.float64), tr.transfer_s[known],
               (tr.start_s + np.nan_to_num(tr.wait_s, nan=0.0))[known], np.isfinite(tr.wait_s[known]))
    layer = np.asarray(tr.layer, np.int64)[known]
    col = window.collectives
    _, c_ok = window.rank_index(col.rank)
    c_pos, c_step_ok = window.step_index(col.step)
    c_known = np.flatnonzero(c_ok & c_step_ok)
    c_known = c_known[np.argsort(c_pos[c_known], kind="stable")]
    c_bounds = np.searchsorted(c_pos[c_known], np.arange(len(window.steps) + 1))
    calls = np.column_stack([np.asarray(col.op, np.int64), np.asarray(col.group, np.int64),
                             np.asarray(col.nbytes, np.int64)])[c_known]
    callers = np.asarray(col.rank, np.int64)[c_known]
    out = []
    for i, step in enumerate(window.steps.tolist()):
        sel = slice(bounds[i], bounds[i + 1])
        c_sel = slice(c_bounds[i], c_bounds[i + 1])
        around = np.r_[bounds[max(0, i - CONTEXT_STEPS)]:bounds[i], bounds[i + 1]:bounds[min(len(bounds) - 1,
                                                                                            i + 1 + CONTEXT_STEPS)]]
        compute, exchange = window.compute_s[i], window.exchange_s[i]
        out.append(StepSummary(
            step=int(step), layers=window.layers, nodes=window.nodes, ranks=np.asarray(window.ranks),
            rank_node=np.asarray(window.rank_node), compute_ns=_ns(compute), exchange_ns=_ns(exchange),
            step_s=np.asarray(window.step_s[i], np.float64),
            path_s=np.fmax.reduce(compute, axis=0) if len(window.ranks) else np.full(len(window.layers), np.nan),
            **_fold_transfers(len(window.nodes), len(window.ranks), *(c[sel] for c in columns), nominal, reference,
                              accuracy, tuple(c[around] for c in (src_node, dst_node, columns[5], columns[3],
                                                                  columns[4]))),
            halo=_halo(src_node[sel], dst_node[sel], layer[sel], columns[2][sel], columns[3][sel], len(window.ranks)),
            **_collectives(calls[c_sel], callers[c_sel]), reference=reference))
    return out


def _positions(sorted_ids: np.ndarray, ids: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Positions of ``ids`` in ``sorted_ids`` and a mask of those present."""
    at = np.clip(np.searchsorted(sorted_ids, ids), 0, max(0, len(sorted_ids) - 1))
    return at, (sorted_ids[at] == ids) if len(sorted_ids) else np.zeros(len(ids), bool)


def _ns(seconds: np.ndarray) -> np.ndarray:
    """Seconds to whole nanoseconds (the wire's unit, so exact for recorded data); NaN to 0. int32 when every
    cell fits (a layer under 2.1 s: half the memory), else int64; the window's running sums are int64."""
    ns = np.rint(np.nan_to_num(np.asarray(seconds, np.float64), nan=0.0) * NS_PER_S)
    small = ns.size == 0 or (ns.min() >= -(2**31) and ns.max() < 2**31)
    return ns.astype(np.int32 if small else np.int64)


def _fold_transfers(n_nodes: int, n_ranks: int, src: np.ndarray, dst: np.ndarray, di: np.ndarray, n: np.ndarray,
                    t: np.ndarray, lo: np.ndarray, wait_known: np.ndarray, nominal: np.ndarray,
                    reference: Reference | None, accuracy: float,
                    context: tuple[np.ndarray, ...] = ()) -> dict:
    """One step's transfers (between known ranks; ``di`` the receiver's row) folded. ``context`` holds the
    neighbouring steps' (src, dst, lo, n, t): their flows share ports with this step's, though they are
    folded with their own step."""
    code = (src << NODE_BITS) | dst
    links, link = np.unique(code, return_inverse=True)
    n_links = len(links)
    busy_t = np.where(t > 0, t, 0.0)
    eligible = (n > 0) & np.isfinite(t) & (t > 0)  # what fit_hockney keeps
    le, ne, te = link[eligible], n[eligible], t[eligible]
    hockney = np.column_stack([np.bincount(le, weights=w, minlength=n_links)
                               for w in (ne, te, ne * ne, ne * te, te * te)]) if n_links else np.zeros((0, 5))
    t_min, t_max, fastest = np.full(n_links, np.inf), np.full(n_links, -np.inf), np.zeros(n_links)
    np.fmin.at(t_min, le, te)
    np.fmax.at(t_max, le, te)
    np.fmax.at(fastest, le, ne / te)
    receiver, where = np.unique(link * max(1, n_ranks) + di, return_inverse=True)
    worst = np.zeros(n_links)
    np.fmax.at(worst, receiver // max(1, n_ranks), np.bincount(where, weights=busy_t))
    sums = LinkSums(
        links, np.bincount(link, weights=n, minlength=n_links).astype(np.int64), np.bincount(link, minlength=n_links),
        np.bincount(link, weights=busy_t, minlength=n_links), hockney, np.bincount(le, minlength=n_links),
        t_min, t_max, fastest, np.bincount(link, weights=wait_known, minlength=n_links).astype(np.int64), worst)

    group = (code << SIZE_BITS) | np.where(n > 0, np.floor(np.log2(np.where(n > 0, n, 1.0)) *
                                                            SIZE_BINS_PER_OCTAVE), 0).astype(np.int64)
    moving = moving_transfers(src, dst, lo, n, t)
    flows = _own_flows(n_nodes, [(src, dst, lo, n, t), *([context] if context else [])])
    rate, seconds = flows.aggregate, flows.seconds
    ok = (rate > 0) & np.isfinite(rate) & (seconds > 0)
    busy = Sparse.of((flows.port[ok] << 20) | (busy_bins(rate[ok]) + (1 << 19)), seconds[ok])
    if reference is None:
        level = level_of_bins(*_busy_items(busy), 2 * n_nodes)
        alpha = np.nan_to_num(fit_hockney(link, n, t, n_links).alpha_s, nan=0.0)
    else:
        level = np.full(2 * n_nodes, np.nan)
        have = min(n_nodes, len(reference.level_Bps) // 2)
        level[:have] = reference.level_Bps[:have]
        level[n_nodes:n_nodes + have] = reference.level_Bps[len(reference.level_Bps) // 2:][:have]
        alpha = _lookup(reference.links, reference.alpha_s, links)
    unshared = unshare(t, moving, alpha[link[moving]], shares(flows, level, nominal))
    return {"links": sums, "watch": _watch(link, n_links, src != dst, n, t, unshared),
            "bin_bytes": Sparse.of(group[eligible], ne),
            "raw_s": Sketches.of(group[eligible], te, accuracy),
            "unshared_s": Sketches.of(group[eligible], unshared[eligible], accuracy), "busy": busy}


def _own_flows(n_nodes: int, steps: list[tuple[np.ndarray, ...]]) -> PortFlows:
    """``port_flows`` of the first step's moving transfers, with the others' flows loading the ports too."""
    parts = [tuple(c[moving_transfers(*cols)] for c in cols) for cols in steps]
    src, dst, lo, n, t = (np.concatenate(c) for c in zip(*parts, strict=True))
    flows = port_flows(src, dst, lo, lo + t, n, n_nodes)
    m, total = len(parts[0][0]), len(src)
    own = np.r_[0:m, total:total + m]
    return PortFlows(flows.port[own], flows.nbytes[own], flows.seconds[own], flows.during[own], flows.flow_s[own])


def _watch(link: np.ndarray, n_links: int, network: np.ndarray, n: np.ndarray, t: np.ndarray,
           unshared: np.ndarray) -> np.ndarray:
    """Per link, what degradation alerts watch in this step (``links.link_rate_series``): the median of its
    network transfers' rates with sharing taken out, and the bytes and measured time of those transfers."""
    out = np.full((n_links, 3), np.nan)
    keep = network & (unshared > 0)
    if not keep.any():
        return out
    rate = n[keep] / unshared[keep]
    order = np.lexsort((rate, link[keep]))
    cell, rate = link[keep][order], rate[order]
    starts = np.flatnonzero(np.r_[True, cell[1:] != cell[:-1]])
    ends = np.r_[starts[1:], len(cell)]
    out[cell[starts], 0] = (rate[(starts + ends - 1) // 2] + rate[(starts + ends) // 2]) / 2.0
    out[cell[starts], 1] = np.bincount(link[keep], weights=n[keep], minlength=n_links)[cell[starts]]
    out[cell[starts], 2] = np.bincount(link[keep], weights=t[keep], minlength=n_links)[cell[starts]]
    return out


def _halo(src: np.ndarray, dst: np.ndarray, layer: np.ndarray, receiver: np.ndarray, n: np.ndarray,
          n_ranks: int) -> np.ndarray:
    """Distinct (layer, messages, bytes) over the receiving ranks' network transfers, as the step model groups
    them (``models._halo_groups``): the model takes the max over ranks of a cost linear in both."""
    net = src != dst
    key, where = np.unique(layer[net] * max(1, n_ranks) + receiver[net], return_inverse=True)
    rows = np.column_stack([key // max(1, n_ranks), np.bincount(where, minlength=len(key)),
                            np.bincount(where, weights=n[net], minlength=len(key))]).astype(np.float64)
    return np.unique(rows, axis=0) if len(rows) else np.zeros((0, 3))


def _collectives(calls: np.ndarray, callers: np.ndarray) -> dict[str, np.ndarray]:
    """Distinct collective calls of the step, how many of each, and which ranks made them."""
    if len(calls) == 0:
        return {"collectives": np.zeros((0, 3), np.int64), "collective_calls": np.zeros(0, np.int64),
                "collective_ranks": np.zeros((0, 2), np.int64)}
    kinds, which = np.unique(calls, axis=0, return_inverse=True)
    which = which.reshape(-1)
    return {"collectives": kinds, "collective_calls": np.bincount(which, minlength=len(kinds)),
            "collective_ranks": _pairs(which, callers)}


def _pairs(row: np.ndarray, rank: np.ndarray) -> np.ndarray:
    """Distinct (row, rank) pairs, sorted (one int64 key each: ranks are below 2^31)."""
    key = np.unique((np.asarray(row, np.int64) << 32) | np.asarray(rank, np.int64))
    return np.column_stack([key >> 32, key & ((1 << 32) - 1)])


def _busy_items(busy: Sparse) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(port, busy bin, seconds) of a busy-level histogram."""
    return busy.key >> 20, (busy.key & ((1 << 20) - 1)) - (1 << 19), busy.value


def _lookup(keys: np.ndarray, values: np.ndarray, want: np.ndarray, default: float = 0.0) -> np.ndarray:
    at = np.clip(np.searchsorted(keys, want), 0, max(0, len(keys) - 1))
    hit = (at < len(keys)) & (keys[at] == want) if len(keys) else np.zeros(len(want), bool)
    return np.where(hit, values[at] if len(keys) else default, default)


def merge_ranks(parts: Sequence[StepSummary]) -> StepSummary:
    """One step's summaries from disjoint rank sets (shard collectors) as one summary of all their ranks.

    Everything but the sharing-corrected sketch (``unshared_s``) and the busy histogram merges to exactly
    the summary of the union: a port's way out also carries flows that other shards' ranks receive, so a
    shard sees only part of its load. ``SummaryWindow.figures`` therefore takes the busy levels and the
    sharing from the shards as they are; docs/snapshot.md says what that leaves open.
    """
    first = parts[0]
    if any(p.step != first.step or p.layers != first.layers or p.nodes != first.nodes for p in parts):
        raise ValueError("only summaries of one step, one layer list and one node list merge")
    ranks = np.concatenate([p.ranks for p in parts])
    order = np.argsort(ranks, kind="stable")
    if len(np.unique(ranks)) != len(ranks):
        raise ValueError("the rank sets overlap")

    def rows(name: str) -> np.ndarray:
        return np.concatenate([getattr(p, name) for p in parts])[order]

    return replace(first, ranks=ranks[order], rank_node=rows("rank_node"), compute_ns=rows("compute_ns"),
                   exchange_ns=rows("exchange_ns"), step_s=rows("step_s"),
                   path_s=np.fmax.reduce(np.stack([p.path_s for p in parts]), axis=0),
                   links=LinkSums.merged([p.links for p in parts]), watch=_merged_watch(parts),
                   bin_bytes=Sparse.merged([p.bin_bytes for p in parts]),
                   raw_s=merge([p.raw_s for p in parts]), unshared_s=merge([p.unshared_s for p in parts]),
                   busy=Sparse.merged([p.busy for p in parts]),
                   halo=np.unique(np.concatenate([p.halo for p in parts]), axis=0),
                   **_merged_collectives(parts))


def _merged_watch(parts: Sequence[StepSummary]) -> np.ndarray:
    """The shards' watched rates. A link's transfers are received on its destination node, so by one shard
    when shards split ranks by node; a link seen by two shards has no exact median here and is refused."""
    links = np.unique(np.concatenate([p.links.link for p in parts]))
    out = np.full((len(links), 3), np.nan)
    for p in parts:
        at = np.searchsorted(links, p.links.link)
        has = np.isfinite(p.watch[:, 0])
        seen = np.isfinite(out[at[has], 0])
        if seen.any():
            raise ValueError("a link's transfers are received in one shard: shards split ranks by node")
        out[at[has]] = p.watch[has]
    return out


def _merged_collectives(parts: Sequence[StepSummary]) -> dict[str, np.ndarray]:
    """The collectives of several summaries as one table (calls add; callers unite)."""
    kinds, which = _unified(parts)
    calls = np.bincount(which, weights=np.concatenate([p.collective_calls for p in parts]),
                        minlength=len(kinds)).astype(np.int64)
    return {"collectives": kinds, "collective_calls": calls, "collective_ranks": _callers(parts, which)}


def _unified(parts: Sequence[StepSummary]) -> tuple[np.ndarray, np.ndarray]:
    """One table of the parts' distinct calls, and each part row's place in it."""
    stacked = np.concatenate([p.collectives for p in parts])
    if len(stacked) == 0:
        return np.zeros((0, 3), np.int64), np.zeros(0, np.int64)
    kinds, which = np.unique(stacked, axis=0, return_inverse=True)
    return kinds, which.reshape(-1)


def _callers(parts: Sequence[StepSummary], which: np.ndarray) -> np.ndarray:
    offsets = np.cumsum([0] + [len(p.collectives) for p in parts])
    keys = [(which[offsets[i]:offsets[i + 1]][p.collective_ranks[:, 0]] << 32) | p.collective_ranks[:, 1]
            for i, p in enumerate(parts)]
    same = all(np.array_equal(k, keys[0]) for k in keys[1:])  # the usual case: every step, the same callers
    key = keys[0] if same else np.unique(np.concatenate(keys))
    return np.column_stack([key >> 32, key & ((1 << 32) - 1)])


@dataclass(frozen=True)
class FitError:
    """How far a link's α and β from sketches may be from the full analysis's (first order, see ``_fit_error``)
    when every fitted step was folded against the window's reference."""

    latency_s: float
    bandwidth_rel: float


@dataclass(frozen=True)
class Figures:
    """A window's figures from summaries: the full analysis's types, so every reader treats them alike."""

    first_step: int
    last_step: int
    steps: int
    nodes: tuple[str, ...]
    efficiency: Efficiency
    speedup: Speedup
    layers: LayerStats
    worst: WorstRanks
    links: tuple[LinkStats, ...]
    ports: tuple[PortStats, ...]
    stragglers: tuple[Straggler, ...]
    step_s: float
    step_wall_s: np.ndarray  # [S] each step's wall time (the slowest rank's), NaN: nobody reported
    model: StepModel
    whatif: tuple[WhatIf, ...]
    alerts: tuple[Alert, ...]  # empty unless the run's series was given
    link_sums: LinkSums  # over the window, rows in ``links``' link codes
    fit_error: dict[tuple[str, str], FitError]  # by (src, dst) node names: how far α and β may be from exact
    reference: Reference  # the window's α and busy levels: fold new steps against it
    stale_steps: tuple[int, ...]  # fitted steps folded against another reference (β may be off)
    fit_steps: tuple[int, ...]


@dataclass
class SummaryWindow:
    """The newest ``capacity`` steps' summaries, with running exact sums over them (O(R × L) to read).

    Steps arrive in order; a step already held is replaced. Ranks and layers may grow as they appear."""

    capacity: int
    summaries: deque[StepSummary] = field(default_factory=deque)
    _rank_row: dict[int, int] = field(default_factory=dict)
    _compute: np.ndarray = field(default_factory=lambda: np.zeros((0, 0), np.int64))
    _exchange: np.ndarray = field(default_factory=lambda: np.zeros((0, 0), np.int64))
    _reported: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    _node: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int32))  # each row's node, newest known

    def push(self, summary: StepSummary) -> None:
        if self.summaries and summary.step <= self.summaries[-1].step:
            if summary.step != self.summaries[-1].step:
                raise ValueError("steps arrive in order")
            self._add(self.summaries.pop(), -1)
        self.summaries.append(summary)
        self._add(summary, +1)
        while len(self.summaries) > self.capacity:
            self._add(self.summaries.popleft(), -1)

    def _add(self, s: StepSummary, sign: int) -> None:
        for r in s.ranks.tolist():
            self._rank_row.setdefault(r, len(self._rank_row))
        shape = (len(self._rank_row), len(s.layers))
        if self._compute.shape[0] < shape[0] or self._compute.shape[1] < shape[1]:
            self._compute, self._exchange = _grown(self._compute, shape), _grown(self._exchange, shape)
            self._reported = _grown(self._reported[:, None], (shape[0], 1))[:, 0]
            self._node = _grown(self._node[:, None], (shape[0], 1))[:, 0]
        rows = np.array([self._rank_row[r] for r in s.ranks.tolist()], np.int64)
        if sign > 0:
            self._node[rows] = s.rank_node
        cols = slice(0, len(s.layers))
        self._compute[rows, cols] += sign * s.compute_ns
        self._exchange[rows, cols] += sign * s.exchange_ns
        self._reported[rows] += sign * np.isfinite(s.step_s)

    def figures(self, cluster: Cluster, *, threshold: float = COMM_BOUND_THRESHOLD,
                slow_fraction: float = SLOW_FRACTION, nic_Bps: np.ndarray | None = None,
                worst_count: int = 5, series: RunSeries | None = None) -> Figures:
        """The window's figures (see ``analysis.summary.analyse`` for each one's definition). With the run's
        ``series``, degradation alerts too, links watched over the window's fitted steps as ``analyse`` does
        with ``history`` = this window."""
        steps = list(self.summaries)
        newest = steps[-1]
        layers, nodes = newest.layers, newest.nodes
        ranks = np.array(sorted(self._rank_row), np.int32)
        rows: np.ndarray | slice = np.array([self._rank_row[r] for r in ranks.tolist()], np.int64)
        if np.array_equal(rows, np.arange(len(rows))):
            rows = slice(0, len(ranks))  # ranks joined in id order, the usual case: views, no copies
        frame = Window(layers, nodes, ranks, self._node[rows],
                       np.array([s.step for s in steps], np.int64), np.empty((0, len(ranks), len(layers))),
                       np.empty((0, len(ranks), len(layers))), np.empty((0, len(ranks))))
        n_layers = len(layers)
        compute = self._compute[rows, :n_layers] / NS_PER_S
        exchange = self._exchange[rows, :n_layers] / NS_PER_S
        path = np.stack([_padded(s.path_s, n_layers) for s in steps])
        wall = np.array([np.fmax.reduce(s.step_s) if len(s.step_s) else np.nan for s in steps])
        sums = WindowSums(compute, exchange, path, wall, self._reported[rows] > 0)
        eff = pop_efficiency(frame, sums)
        n_finite = int(np.count_nonzero(np.isfinite(wall)))
        last_step = steps[-1].step
        remaining = _remaining(cluster.total_steps, last_step)
        links, link_sums, reference, fit_steps, fit_error = _links(steps, nodes, cluster, eff.wall_s, remaining,
                                                                   slow_fraction)
        ports, links = port_stats(links, nodes, cluster, nic_Bps, slow_fraction=slow_fraction)
        alerts = () if series is None else name_alert_ports(
            degradation_alerts(series, nodes, links=_rate_series(steps, fit_steps, n_nodes=len(nodes))), links)
        net = [lk for lk in links if not lk.local]
        model = model_of(eff, max(1, n_finite), _nanmedian([lk.latency_s for lk in net]),
                         _nanmedian([lk.bandwidth_Bps for lk in net]), _signatures(steps, max(1, n_finite)),
                         _halo_groups(steps, n_layers))
        return Figures(
            first_step=steps[0].step, last_step=last_step, steps=len(steps), nodes=nodes, efficiency=eff,
            speedup=eff.speedup(), layers=layer_stats(frame, sums, threshold),
            worst=worst_of_sums(ranks, compute, exchange, worst_count), links=links, ports=ports,
            stragglers=find_stragglers(frame, eff), step_s=eff.wall_s / n_finite if n_finite else np.nan,
            step_wall_s=wall,
            model=model, whatif=what_ifs(model, eff.workers, SCENARIOS), alerts=alerts,
            link_sums=link_sums, fit_error=fit_error, reference=reference,
            stale_steps=tuple(s.step for s in fit_steps if not reference.same(s.reference)),
            fit_steps=tuple(s.step for s in fit_steps))


def as_analysis(figures: Figures, cluster: Cluster, series: RunSeries | None = None,
                recent: int = RECENT_STEPS) -> Analysis:
    """The figures as the full analysis's ``Analysis`` (what ``analysis_to_json`` and the snapshot take), with
    the run-level figures ``analyse`` adds: recent step time, ETA and hours at stake."""
    last_step = figures.last_step
    if series is not None and len(series.steps):
        last_step = max(last_step, int(series.steps[-1]))
        recent_s = np.asarray(series.step_s[-recent:], np.float64)
    else:
        recent_s = figures.step_wall_s[-recent:]
    recent_s = recent_s[np.isfinite(recent_s)]
    recent_step_s = float(recent_s.mean()) if len(recent_s) else float("nan")
    remaining = _remaining(cluster.total_steps, last_step)
    at_stake = None if remaining is None else sum(lk.hours_at_stake or 0.0 for lk in figures.links
                                                  if lk.slow and not lk.local)
    return Analysis(job=cluster.name, first_step=figures.first_step, last_step=figures.last_step,
                    steps=figures.steps, nodes=figures.nodes, efficiency=figures.efficiency, speedup=figures.speedup,
                    layers=figures.layers, links=figures.links, ports=figures.ports, stragglers=figures.stragglers,
                    alerts=figures.alerts, step_s=figures.step_s, recent_step_s=recent_step_s,
                    remaining_steps=remaining, eta_s=eta_s(remaining, recent_step_s), hours_at_stake=at_stake,
                    model=figures.model, whatif=figures.whatif, serial_fraction=None)


def _rate_series(steps: Sequence[StepSummary], fit_steps: Sequence[StepSummary], n_nodes: int) -> RunSeries:
    """``links.link_rate_series`` of the window from the fitted steps' watched rates (other steps: none)."""
    step_s = np.array([np.max(np.nan_to_num(s.step_s, nan=0.0), initial=0.0) for s in steps])
    fitted = {s.step for s in fit_steps}
    kept = [(i, s) for i, s in enumerate(steps) if s.step in fitted]
    codes = np.concatenate([s.links.link[np.isfinite(s.watch[:, 0])] for _, s in kept] + [np.zeros(0, np.int64)])
    columns = np.unique(codes)
    grid = np.full((len(steps), len(columns)), np.nan)
    sums = np.zeros((len(steps), len(columns), 2))
    for i, s in kept:
        has = np.isfinite(s.watch[:, 0])
        at = np.searchsorted(columns, s.links.link[has])
        grid[i, at] = s.watch[has, 0]
        sums[i, at] = s.watch[has, 1:]
    pairs = tuple((int(c >> NODE_BITS), int(c & ((1 << NODE_BITS) - 1))) for c in columns)
    return RunSeries(np.array([s.step for s in steps], np.int64), step_s, pairs, sums[:, :, 0], sums[:, :, 1],
                     link_watch_Bps=grid)


def _links(steps: list[StepSummary], nodes: tuple[str, ...], cluster: Cluster, wall_s: float,
           remaining: int | None, slow_fraction: float
           ) -> tuple[tuple[LinkStats, ...], LinkSums, Reference, list[StepSummary], dict[tuple[str, str], FitError]]:
    """Link figures as ``links.link_stats`` computes them, from the steps' link sums and sketches."""
    n_nodes = len(nodes)
    sums = LinkSums.merged([s.links for s in steps])
    fit_steps = _newest_steps(steps, MAX_FIT_TRANSFERS)
    n_links = len(sums.link)
    raw = merge([s.raw_s for s in fit_steps])
    unshared = merge([s.unshared_s for s in fit_steps])
    bin_bytes = Sparse.merged([s.bin_bytes for s in fit_steps])
    accuracy = raw.accuracy
    raw_bins = _bins(raw, bin_bytes, sums.link, WAITS_UNKNOWN_QUANTILE)
    alpha = np.nan_to_num(fit_bins(*raw_bins, n_links).alpha_s, nan=0.0)
    alpha_error, _ = _fit_error(raw_bins, n_links, accuracy)
    busy = Sparse.merged([s.busy for s in fit_steps])
    port, bins, seconds = _busy_items(busy)
    reference = Reference(sums.link, alpha, level_of_bins(port, bins, seconds, 2 * n_nodes))
    fit_sums = LinkSums.merged([s.links for s in fit_steps])
    waits_known = np.zeros(n_links, bool)
    waits_known[np.searchsorted(sums.link, fit_sums.link)] = fit_sums.waits_known >= 0.5 * fit_sums.transfers
    fit, error = None, None
    for quantile, chosen in ((WAITS_UNKNOWN_QUANTILE, ~waits_known), (WAITS_KNOWN_QUANTILE, waits_known)):
        if chosen.any() or fit is None:
            bins_q = _bins(unshared, bin_bytes, sums.link, quantile)
            # A bin's time is off by the sketch's accuracy, plus whatever the raw α's own error moved it by
            # (the time less α is what sharing scales: at most |Δα|).
            rel = accuracy + alpha_error[bins_q[0]] / bins_q[2]
            fit_q, error_q = fit_bins(*bins_q, n_links), _fit_error(bins_q, n_links, rel)
            fit = fit_q if fit is None else fit.where(chosen, fit_q)
            error = error_q if error is None else tuple(np.where(chosen, q, e) for q, e in zip(error_q, error,
                                                                                              strict=True))
    pairs = (sums.link >> NODE_BITS) * n_nodes + (sums.link & ((1 << NODE_BITS) - 1))
    # Σ over steps of each step's slowest receiver (merged sums keep only the max over all steps)
    worst = np.bincount(np.searchsorted(sums.link, np.concatenate([s.links.link for s in steps])),
                        weights=np.concatenate([s.links.worst_receiver_s for s in steps]), minlength=n_links)
    links = judge_links(pairs, nodes, cluster, fit, sums.bytes.astype(np.float64), sums.busy_s, sums.transfers,
                        wall_s, remaining, lambda shrink: worst * shrink / len(steps), slow_fraction=slow_fraction)
    src, dst = sums.link >> NODE_BITS, sums.link & ((1 << NODE_BITS) - 1)
    bounds = {(nodes[a], nodes[b]): FitError(float(ea), float(eb))
              for a, b, ea, eb in zip(src.tolist(), dst.tolist(), *error, strict=True)}
    return links, sums, reference, fit_steps, bounds


def _bins(sketch: Sketches, bin_bytes: Sparse, links: np.ndarray,
          quantile: float) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """``fit_bins``' input from sketches: per (link, size bin) its link's row, mean size, time quantile, count."""
    n_groups = len(bin_bytes.key)
    numbered = sketch.renumber(bin_bytes.key)
    counts = numbered.counts(n_groups)
    return (np.searchsorted(links, bin_bytes.key >> SIZE_BITS), bin_bytes.value / counts,
            numbered.quantile(quantile, n_groups), counts)


def _fit_error(bins: tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray], n_links: int,
               rel: float | np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per link, how far α (seconds) and β (relative) may be from the fit through the exact bin times, when
    each bin's time is off by at most ``rel`` of itself: the first-order bound Σ_bins max(|f(t(1 ± rel)) − f(t)|),
    each bin moved alone (the bins of every link are moved at once, one fit per bin position)."""
    link, size, t, counts = bins
    base = fit_bins(link, size, t, counts, n_links)
    rel = np.broadcast_to(np.asarray(rel, np.float64), t.shape)
    starts = np.searchsorted(link, link)  # bins are ordered by link
    position = np.arange(len(link)) - starts
    d_alpha, d_beta = np.zeros(n_links), np.zeros(n_links)
    for k in range(int(position.max()) + 1 if len(position) else 0):
        worst_a, worst_b = np.zeros(n_links), np.zeros(n_links)
        for sign in (-1.0, 1.0):
            moved = fit_bins(link, size, np.where(position == k, t * (1 + sign * rel), t), counts, n_links)
            with np.errstate(invalid="ignore"):
                worst_a = np.fmax(worst_a, np.abs(np.nan_to_num(moved.alpha_s) - np.nan_to_num(base.alpha_s)))
                worst_b = np.fmax(worst_b, np.abs(moved.beta_Bps / base.beta_Bps - 1.0))
        d_alpha += worst_a
        d_beta += worst_b
    return d_alpha, d_beta


def _signatures(steps: Sequence[StepSummary], n_steps: int) -> tuple[np.ndarray, ...]:
    """``models._collective_signatures`` from the steps' collective tables."""
    kinds, which = _unified(steps)
    calls = np.bincount(which, weights=np.concatenate([s.collective_calls for s in steps]), minlength=len(kinds))
    ranks = np.bincount(_callers(steps, which)[:, 0], minlength=len(kinds))
    with np.errstate(invalid="ignore", divide="ignore"):
        return kinds[:, 0], kinds[:, 1], kinds[:, 2], calls / ranks / n_steps


def _halo_groups(steps: Sequence[StepSummary], n_layers: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``models._halo_groups`` from the steps' distinct halo rows: (step, layer) cell, messages, bytes."""
    cells = [i * max(1, n_layers) + s.halo[:, 0].astype(np.int64) for i, s in enumerate(steps)]
    rows = np.concatenate([s.halo for s in steps])
    return np.concatenate(cells), rows[:, 1], rows[:, 2]


def _nanmedian(values: Sequence[float]) -> float:
    x = np.asarray(values, np.float64)
    x = x[np.isfinite(x)]
    return float(np.median(x)) if len(x) else float("nan")


def _newest_steps(steps: list[StepSummary], limit: int) -> list[StepSummary]:
    """The newest whole steps holding at most ``limit`` transfers (one step at least), as
    ``links._newest_steps`` picks them (steps after the newest one with transfers do not count)."""
    counts = np.array([s.transfers for s in steps])
    last = np.flatnonzero(counts)
    if not len(last):
        return steps[-1:]
    upto = int(last[-1]) + 1
    from_newest = np.cumsum(counts[:upto][::-1])
    keep = max(1, int(np.searchsorted(from_newest, limit, side="right")))
    return steps[max(0, upto - keep):]


def _padded(x: np.ndarray, n: int) -> np.ndarray:
    return x if len(x) == n else np.concatenate([x, np.full(n - len(x), np.nan)])


def _grown(array: np.ndarray, shape: tuple[int, ...]) -> np.ndarray:
    grown = np.zeros(shape, dtype=array.dtype)
    grown[tuple(slice(0, n) for n in array.shape)] = array
    return grown
