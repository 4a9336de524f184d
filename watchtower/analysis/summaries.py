"""Per-step summaries: fold each completed step's raw records once; merge summaries of disjoint rank sets.

Why: a snapshot that re-analyses every raw transfer of its window costs O(transfers) each time (0.8 s at
4096 ranks × 256 layers × 120 steps). Folded once per step into the sums and sketches below, a window's
figures cost O(ranks × layers + links) whatever the number of transfers, and summaries of disjoint rank sets
(shard collectors) merge into the summary of their union. The figures are the full analysis's (the same
functions of ``aggregate``, ``efficiency``, ``links`` and ``ports`` run on the folded values); docs/snapshot.md
says which are exact and which are sketched, with what error.

``fold`` turns a ``Window`` into one ``StepSummary`` per step; ``merge_ranks`` joins summaries of one step
from disjoint rank sets; ``summary_window.SummaryWindow`` keeps the newest steps' summaries with running sums
and builds ``Figures`` from them.

The link fit needs two window-level values before a step can be folded: each link's raw latency α and each
port's busy level (``sharing``). A step is folded against a ``Reference`` holding them; ``Figures`` carries
the window's own reference and lists the fitted steps folded against another one (``stale_steps``): the
collector folds each step against its newest snapshot's reference and refolds stale steps while it still
holds their raw transfers. Folded against the window's reference, β equals the full analysis's within the
sketches' error bound.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, replace

import numpy as np

from watchtower.analysis.links import moving_transfers, unshare
from watchtower.analysis.robust import fit_hockney
from watchtower.analysis.sharing import PortFlows, busy_bins, level_of_bins, port_flows, shares
from watchtower.analysis.sketch import RELATIVE_ACCURACY, Sketches, merge
from watchtower.analysis.window import Window
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


RANK_BITS = 21  # a rank in a packed key (ranks are below agent.wire.MAX_WORLD = 2^20, with a bit to spare)


@dataclass(frozen=True)
class HaloRows:
    """One step's network transfers as the step model splits them by node pair (``models._halo_rows``): per
    group (layer, rank, side: 0 receiving, 1 sending, packed as ``group``) and link code, the messages and
    bytes. Sorted by (group, link), unique. A sender's group may hold rows from several shards (its
    transfers are recorded by their receivers), so merging adds equal keys: exact."""

    group: np.ndarray  # int64 layer << RANK_BITS | rank << 1 | side
    link: np.ndarray  # int64 (src node << NODE_BITS) | dst node
    msgs: np.ndarray  # float64
    bytes: np.ndarray  # float64

    @classmethod
    def of(cls, group: np.ndarray, link: np.ndarray, msgs: np.ndarray, nbytes: np.ndarray) -> HaloRows:
        if len(group) == 0:
            empty_i, empty_f = np.zeros(0, np.int64), np.zeros(0)
            return cls(empty_i, empty_i, empty_f, empty_f)
        order = np.lexsort((link, group))
        group, link = group[order], link[order]
        first = np.r_[True, (group[1:] != group[:-1]) | (link[1:] != link[:-1])]
        row = np.cumsum(first) - 1
        return cls(group[first], link[first], np.bincount(row, weights=msgs[order]),
                   np.bincount(row, weights=nbytes[order]))

    @staticmethod
    def merged(parts: Sequence[HaloRows]) -> HaloRows:
        return HaloRows.of(*(np.concatenate([getattr(p, f) for p in parts]) for f in ("group", "link", "msgs",
                                                                                      "bytes")))


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
    halo_rows: HaloRows  # the same transfers by rank and node pair, at both ends (the per-link step model)
    waits: Sparse  # per (layer, receiving rank, sending rank) ``waits_key``: Σ end − start (waiting included)
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
    src_rank, dst_rank = np.asarray(tr.src, np.int64)[known], np.asarray(tr.dst, np.int64)[known]
    took = np.nan_to_num(tr.end_s[known] - tr.start_s[known], nan=0.0).clip(min=0.0)  # drilldown._waits_on's
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
            halo_rows=_halo_rows(src_node[sel], dst_node[sel], layer[sel], src_rank[sel], dst_rank[sel],
                                 columns[3][sel]),
            waits=Sparse.of(waits_key(layer[sel], dst_rank[sel], src_rank[sel]), took[sel]),
            **_collectives(calls[c_sel], callers[c_sel]), reference=reference))
    return out


def _positions(sorted_ids: np.ndarray, ids: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Positions of ``ids`` in ``sorted_ids`` and a mask of those present."""
    at = np.clip(np.searchsorted(sorted_ids, ids), 0, max(0, len(sorted_ids) - 1))
    return at, (sorted_ids[at] == ids) if len(sorted_ids) else np.zeros(len(ids), bool)


def _ns(seconds: np.ndarray) -> np.ndarray:
    """Seconds to whole nanoseconds (the wire's unit, so exact for recorded data); NaN to 0. int32 when every
    cell fits (a layer under 2.1 s: half the memory), else int64; the window's running sums are int64."""
    ns = np.multiply(seconds, NS_PER_S, dtype=np.float64)
    np.rint(ns, out=ns)
    np.copyto(ns, 0.0, where=~np.isfinite(ns))  # (nan_to_num's infinity tests cost more than the rest)
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
        level = level_of_bins(*busy_items(busy), 2 * n_nodes)
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


def waits_key(layer: np.ndarray, receiver: np.ndarray, sender: np.ndarray) -> np.ndarray:
    """One int64 per (layer, receiving rank, sending rank): whom a rank waits on (``drilldown.WorstRanks``)."""
    return (((np.asarray(layer, np.int64) << RANK_BITS) | receiver) << RANK_BITS) | sender


def _halo_rows(src: np.ndarray, dst: np.ndarray, layer: np.ndarray, src_rank: np.ndarray, dst_rank: np.ndarray,
               n: np.ndarray) -> HaloRows:
    """The step's network transfers by (layer, rank, side) and node pair: each message counts at its receiver
    and at its sender (``models._halo_rows``)."""
    net = src != dst
    code = (src[net] << NODE_BITS) | dst[net]
    base = layer[net] << RANK_BITS
    group = np.concatenate([base | (dst_rank[net] << 1), base | (src_rank[net] << 1) | 1])
    ones = np.ones(int(net.sum()))
    return HaloRows.of(group, np.concatenate([code, code]), np.concatenate([ones, ones]),
                       np.concatenate([n[net], n[net]]))


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


def busy_items(busy: Sparse) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
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
                   halo_rows=HaloRows.merged([p.halo_rows for p in parts]),
                   waits=Sparse.merged([p.waits for p in parts]),
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
    kinds, which = unified_collectives(parts)
    calls = np.bincount(which, weights=np.concatenate([p.collective_calls for p in parts]),
                        minlength=len(kinds)).astype(np.int64)
    return {"collectives": kinds, "collective_calls": calls, "collective_ranks": collective_callers(parts, which)}


def unified_collectives(parts: Sequence[StepSummary]) -> tuple[np.ndarray, np.ndarray]:
    """One table of the parts' distinct calls, and each part row's place in it."""
    stacked = np.concatenate([p.collectives for p in parts])
    if len(stacked) == 0:
        return np.zeros((0, 3), np.int64), np.zeros(0, np.int64)
    kinds, which = np.unique(stacked, axis=0, return_inverse=True)
    return kinds, which.reshape(-1)


def collective_callers(parts: Sequence[StepSummary], which: np.ndarray) -> np.ndarray:
    offsets = np.cumsum([0] + [len(p.collectives) for p in parts])
    keys = [(which[offsets[i]:offsets[i + 1]][p.collective_ranks[:, 0]] << 32) | p.collective_ranks[:, 1]
            for i, p in enumerate(parts)]
    same = all(np.array_equal(k, keys[0]) for k in keys[1:])  # the usual case: every step, the same callers
    key = keys[0] if same else np.unique(np.concatenate(keys))
    return np.column_stack([key >> 32, key & ((1 << 32) - 1)])
