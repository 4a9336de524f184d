"""The collector's state: who is talking, the recent steps in full, and whole-run series, all bounded.

The store is the only writer of job state. It keeps the last steps in full detail (a window bounded by
``max_cells``), whole-run per-layer totals and per-step series, the latest node samples and clock offsets.
``window()`` and ``series()`` hand the analysis plain numpy snapshots; nothing outside reads the internals.
"""

from __future__ import annotations

from collections import OrderedDict
from dataclasses import dataclass, field

import numpy as np

from agent import wire
from watchtower.analysis.checks import Checks
from watchtower.analysis.window import Collectives, RunSeries, Transfers, Window

NS = 1e-9
DEFAULT_MAX_CELLS = 1 << 24  # rank x layer x step cells kept in full detail (two float64 arrays)
SERIES_CAP = 1 << 16  # per-step series entries before pairs of old entries are merged
CHECKS_CAP = 1 << 16  # pair-check results kept (the analysis fits only each pair's newest few)


@dataclass
class RankInfo:
    rank: int
    world: int
    node: int  # index into Store.nodes
    layer_map: np.ndarray  # int64: the sender's layer index -> global layer index
    schema_id: int
    sender: int
    offset_ns: int = 0  # collector clock minus sender clock
    round_trip_ns: int | None = None
    last_wall_ns: int = 0
    last_step: int = -1
    last_heard_ns: int = 0  # collector clock when its newest step arrived
    step_s: float = 0.0  # its newest step's duration: what "silent for a few of its own steps" is measured in


@dataclass
class NodeInfo:
    name: str
    cpu_percent: float = float("nan")
    memory_percent: float = float("nan")
    nics: tuple[str, ...] = ()
    nic_values: np.ndarray = field(default_factory=lambda: np.zeros((len(wire.NIC_COLUMNS), 0)))
    last_heard_ns: int = 0
    offset_ns: int | None = None


@dataclass
class _StepSlab:
    """One step across ranks: dense [R, L] arrays that grow as ranks and layers appear."""

    compute: np.ndarray
    exchange: np.ndarray
    duration: np.ndarray
    reported: int = 0
    transfers: list[np.ndarray] = field(default_factory=list)  # float64 [8, E] per rank, see _TRANSFER_ROWS
    collectives: list[np.ndarray] = field(default_factory=list)


class Store:
    """Aggregates decoded messages into analysable state."""

    def __init__(self, max_cells: int = DEFAULT_MAX_CELLS) -> None:
        self.max_cells = max_cells
        self.layers: list[str] = []
        self.carries: dict[str, tuple[str, ...]] = {}  # layer name -> layers whose gradients it carries
        self._layer_index: dict[str, int] = {}
        self.nodes: list[NodeInfo] = []
        self._node_index: dict[str, int] = {}
        self.ranks: dict[int, RankInfo] = {}
        self._sender_rank: dict[int, int] = {}
        self._sender_node: dict[int, int] = {}
        self._pending_offset: dict[int, tuple[int, int]] = {}
        self._rank_node = np.zeros(0, dtype=np.int64)  # rank -> node index, -1 when unknown
        self.world = 0
        self.job = ""
        self._slabs: OrderedDict[int, _StepSlab] = OrderedDict()
        self._row: dict[int, int] = {}  # rank -> row in the dense arrays
        self.total_compute_ns = np.zeros((0, 0), dtype=np.int64)  # exact sums, whole run
        self.total_exchange_ns = np.zeros((0, 0), dtype=np.int64)
        self.epoch_ns: int | None = None  # wall-clock origin of transfer times, keeps float64 precise
        self.steps_seen = 0
        self.last_step = -1
        self.unknown_sender_steps = 0
        # whole-run series, keyed by step
        self._series_step: dict[int, float] = {}
        self._series_links: dict[int, dict[tuple[int, int], list[float]]] = {}
        self._pairs: dict[tuple[int, int], int] = {}
        # pair checks: result tables (int64 [5, K]: src, dst, nbytes, elapsed_ns, step), newest last
        self._checks: list[np.ndarray] = []
        self._check_rows = 0
        self._check_state: dict[int, tuple[float, float, int]] = {}  # node -> (period_s, budget, deferred)

    # ------------------------------------------------------------------------------ registration
    def _node(self, name: str) -> int:
        index = self._node_index.get(name)
        if index is None:
            index = self._node_index[name] = len(self.nodes)
            self.nodes.append(NodeInfo(name))
        return index

    def _layer(self, name: str) -> int:
        index = self._layer_index.get(name)
        if index is None:
            index = self._layer_index[name] = len(self.layers)
            self.layers.append(name)
        return index

    def add_schema(self, message: wire.Schema) -> None:
        node = self._node(message.node)
        for layer, sources in message.carries:  # whose gradients a bucket carries (the ranks agree)
            self.carries[message.layers[layer]] = tuple(message.layers[i] for i in sources)
        self._sender_node[message.header.sender] = node
        self.job = message.job or self.job
        if message.rank < 0:  # a node daemon: it speaks for the node, not for a rank
            return
        layer_map = np.array([self._layer(name) for name in message.layers], dtype=np.int64)
        info = self.ranks.get(message.rank)
        if info is None:
            self._row[message.rank] = len(self._row)
            info = self.ranks[message.rank] = RankInfo(message.rank, message.world, node, layer_map,
                                                       message.schema_id, message.header.sender)
        else:
            info.node, info.layer_map = node, layer_map
            info.schema_id, info.sender = message.schema_id, message.header.sender
        self._sender_rank[message.header.sender] = message.rank
        if message.rank >= len(self._rank_node):
            self._rank_node = _grown(self._rank_node, (message.rank + 1,), -1)
        self._rank_node[message.rank] = node
        self.world = max(self.world, message.world)
        if message.header.sender in self._pending_offset:
            info.offset_ns, info.round_trip_ns = self._pending_offset.pop(message.header.sender)
        self._grow_totals()

    def _grow_totals(self) -> None:
        shape = (len(self._row), len(self.layers))
        if self.total_compute_ns.shape != shape:
            self.total_compute_ns = _grown(self.total_compute_ns, shape, 0)
            self.total_exchange_ns = _grown(self.total_exchange_ns, shape, 0)

    # ------------------------------------------------------------------------------ messages
    def add_offset(self, message: wire.ClockOffset) -> None:
        sender = message.header.sender
        rank = self._sender_rank.get(sender)
        if rank is not None:
            info = self.ranks[rank]
            info.offset_ns, info.round_trip_ns = message.offset_ns, message.round_trip_ns
        else:
            self._pending_offset[sender] = (message.offset_ns, message.round_trip_ns)
        node = self._sender_node.get(sender)
        if node is not None:
            self.nodes[node].offset_ns = message.offset_ns

    def add_node_sample(self, message: wire.NodeSample, received_ns: int) -> bool:
        node = self._sender_node.get(message.header.sender)
        if node is None:
            return False
        info = self.nodes[node]
        info.cpu_percent, info.memory_percent = message.cpu_percent, message.memory_percent
        info.nics, info.nic_values = message.nics, np.array(message.nic_values)
        info.last_heard_ns = received_ns
        return True

    def add_checks(self, message: wire.CheckResults, received_ns: int) -> bool:
        """Keep a daemon's pair-check results (link records of their own kind). False when its sender's
        schema is unknown (the source node is what the daemon's schema names)."""
        src = self._sender_node.get(message.header.sender)
        if src is None:
            return False
        self.nodes[src].last_heard_ns = received_ns
        self._check_state[src] = (message.period_s, message.budget, message.deferred_total)
        table = message.results
        if not table.shape[1]:
            return True
        dst = np.array([self._node(name) for name in message.peers], np.int64)[table[wire.C_PEER]]
        rows = np.empty((5, table.shape[1]), np.int64)
        rows[0], rows[1] = src, dst
        rows[2], rows[3] = table[wire.C_NBYTES], table[wire.C_ELAPSED]
        rows[4] = self.last_step
        self._checks.append(rows)
        self._check_rows += rows.shape[1]
        while self._check_rows > CHECKS_CAP and len(self._checks) > 1:
            self._check_rows -= self._checks.pop(0).shape[1]
        return True

    def recent_link_rates(self, steps: int = 8) -> dict[tuple[str, str], float]:
        """Each node pair's job throughput (bytes / transfer time) over the newest ``steps`` steps that have
        any: what the job's own timings say of a link, for choosing what the pair checks look at first."""
        totals: dict[tuple[int, int], list[float]] = {}
        for step in sorted(self._series_links)[-steps:]:
            for pair, (nbytes, seconds, _) in self._series_links[step].items():
                cell = totals.setdefault(pair, [0.0, 0.0])
                cell[0] += nbytes
                cell[1] += seconds
        return {(self.nodes[s].name, self.nodes[d].name): b / t for (s, d), (b, t) in totals.items() if t > 0}

    def checks(self) -> Checks:
        """Every pair-check result still held, oldest first."""
        if not self._checks:
            return Checks.empty()
        t = np.hstack(self._checks)
        states = list(self._check_state.values())
        return Checks(t[0].astype(np.int32), t[1].astype(np.int32), t[2], t[3] * NS, t[4],
                      period_s=max(p for p, _, _ in states), budget=max(b for _, b, _ in states),
                      deferred=sum(d for _, _, d in states))

    def add_step(self, message: wire.Step, received_ns: int) -> bool:
        """Fold one rank's step in. False when its sender's schema is unknown or does not match."""
        rank = self._sender_rank.get(message.header.sender)
        if rank is None:
            self.unknown_sender_steps += 1
            return False
        info = self.ranks[rank]
        if message.schema_id != info.schema_id or message.layer_ns.shape[1] != len(info.layer_map):
            self.unknown_sender_steps += 1
            return False
        info.last_wall_ns = message.header.wall_ns
        info.last_step = max(info.last_step, message.step)
        info.last_heard_ns, info.step_s = received_ns, message.duration_ns * NS
        self.nodes[info.node].last_heard_ns = received_ns
        row = self._row[rank]
        slab = self._slab(message.step)
        columns = info.layer_map
        compute = message.layer_ns[0] * NS
        exchange = message.layer_ns[1] * NS
        slab.compute[row, columns] = compute
        slab.exchange[row, columns] = exchange
        slab.duration[row] = message.duration_ns * NS
        slab.reported += 1
        self.total_compute_ns[row, columns] += message.layer_ns[0]
        self.total_exchange_ns[row, columns] += message.layer_ns[1]
        self._add_exchanges(slab, info, message)
        self.last_step = max(self.last_step, message.step)
        step_s = self._series_step.get(message.step, 0.0)
        self._series_step[message.step] = max(step_s, message.duration_ns * NS)
        if len(self._series_step) > SERIES_CAP:
            self._merge_old_series()
        return True

    def _add_exchanges(self, slab: _StepSlab, info: RankInfo, message: wire.Step) -> None:
        table = message.exchanges
        if not table.shape[1]:
            return
        ops = table[wire.X_OP]
        if self.epoch_ns is None:
            self.epoch_ns = message.header.wall_ns
        base_ns = message.header.wall_ns + self.offset_ns(info) - self.epoch_ns
        recv = table[:, ops == wire.Op.RECV]
        if recv.shape[1]:
            rows = np.empty((8, recv.shape[1]))
            rows[0] = message.step
            rows[1] = info.layer_map[recv[wire.X_LAYER]]
            rows[2] = recv[wire.X_PEER]
            rows[3] = info.rank
            rows[4] = recv[wire.X_NBYTES]
            rows[5] = (base_ns + recv[wire.X_START]) * NS
            rows[6] = (base_ns + recv[wire.X_END]) * NS
            known = recv[wire.X_WAIT] != wire.UNKNOWN_WAIT
            rows[7] = np.where(known, recv[wire.X_WAIT] * NS, np.nan)
            slab.transfers.append(rows)
            self._add_link_series(message.step, info, recv[wire.X_PEER], rows[4],
                                  rows[6] - rows[5] - np.where(known, rows[7], 0.0))
        coll = table[:, _IS_COLLECTIVE[ops]]
        if coll.shape[1]:
            rows = np.empty((7, coll.shape[1]))
            rows[0] = message.step
            rows[1] = info.layer_map[coll[wire.X_LAYER]]
            rows[2] = info.rank
            rows[3] = coll[wire.X_OP]
            rows[4] = coll[wire.X_GROUP]
            rows[5] = coll[wire.X_NBYTES]
            rows[6] = (coll[wire.X_END] - coll[wire.X_START]) * NS
            slab.collectives.append(rows)

    def offset_ns(self, info: RankInfo) -> int:
        """Collector clock minus the rank's clock: its own handshake if it made one, else its node daemon's.

        An estimate within its own error bound (|offset| ≤ round trip / 2, the NTP bound) is not applied: the
        clocks agree as far as that exchange can tell, and a ping queued behind a choked way out (a round
        trip of 60 ms, all of it on the way out) is off by up to half its round trip, far more than hosts
        that keep time with NTP disagree (under a millisecond on a LAN; from memory)."""
        if info.round_trip_ns is not None:
            return info.offset_ns if abs(info.offset_ns) > info.round_trip_ns // 2 else 0
        return self.nodes[info.node].offset_ns or 0

    def _add_link_series(self, step: int, info: RankInfo, peers: np.ndarray, nbytes: np.ndarray,
                         seconds: np.ndarray) -> None:
        """Add one rank's received transfers to the per-step totals of each (source node, this node) pair."""
        known = peers < len(self._rank_node)
        src = np.full(peers.shape, -1)
        src[known] = self._rank_node[peers[known]]
        keep = (src >= 0) & (src != info.node)
        if not keep.any():
            return
        per_pair = self._series_links.setdefault(step, {})
        sources, where = np.unique(src[keep], return_inverse=True)
        sums_bytes = np.bincount(where, nbytes[keep])
        sums_seconds = np.bincount(where, seconds[keep])
        peak = np.zeros(len(sources))
        with np.errstate(divide="ignore", invalid="ignore"):
            np.maximum.at(peak, where, np.where(seconds[keep] > 0, nbytes[keep] / seconds[keep], 0.0))
        for source, b, t, fastest in zip(sources.tolist(), sums_bytes.tolist(), sums_seconds.tolist(),
                                         peak.tolist(), strict=True):
            pair = (source, info.node)
            self._pairs.setdefault(pair, len(self._pairs))
            cell = per_pair.setdefault(pair, [0.0, 0.0, 0.0])
            cell[0] += b
            cell[1] += t
            cell[2] = max(cell[2], fastest)

    def _merge_old_series(self) -> None:
        """Keep memory flat on long runs: fold the oldest half of the series two steps into one."""
        steps = sorted(self._series_step)
        old = steps[: len(steps) // 2]
        for first, second in zip(old[0::2], old[1::2], strict=False):
            self._series_step[first] = max(self._series_step[first], self._series_step.pop(second))
            links = self._series_links.pop(second, {})
            merged = self._series_links.setdefault(first, {})
            for pair, (nbytes, seconds, fastest) in links.items():
                cell = merged.setdefault(pair, [0.0, 0.0, 0.0])
                cell[0] += nbytes
                cell[1] += seconds
                cell[2] = max(cell[2], fastest)

    def _slab(self, step: int) -> _StepSlab:
        slab = self._slabs.get(step)
        shape = (len(self._row), len(self.layers))
        if slab is None:
            slab = _StepSlab(np.full(shape, np.nan), np.full(shape, np.nan), np.full(shape[0], np.nan))
            self._slabs[step] = slab
            if len(self._slabs) > 1 and step < next(reversed(self._slabs)):
                self._slabs = OrderedDict(sorted(self._slabs.items()))
            self.steps_seen += 1
            self._trim()
        elif slab.compute.shape != shape:
            slab.compute = _grown(slab.compute, shape, np.nan)
            slab.exchange = _grown(slab.exchange, shape, np.nan)
            slab.duration = _grown(slab.duration[:, None], (shape[0], 1), np.nan)[:, 0]
        return slab

    def _trim(self) -> None:
        cells = max(1, len(self._row) * max(1, len(self.layers)))
        keep = max(2, self.max_cells // cells)
        while len(self._slabs) > keep:
            self._slabs.popitem(last=False)

    # ------------------------------------------------------------------------------ snapshots
    def newest_complete_step(self) -> int:
        """The newest step every known rank has reported (the newest step at all when none is complete)."""
        n_ranks = len(self._row)
        for step in reversed(self._slabs):
            if self._slabs[step].reported >= n_ranks:
                return step
        return next(reversed(self._slabs)) if self._slabs else -1

    def window(self) -> Window:
        """The steps held in full as a Window: every step up to the newest one all known ranks reported
        (``Window.last`` narrows it to the newest few)."""
        n_layers = len(self.layers)
        newest = self.newest_complete_step()
        steps = [s for s in self._slabs if s <= newest]
        rank_ids = sorted(self._row)
        rows = np.array([self._row[r] for r in rank_ids], dtype=np.int64)
        shape = (len(steps), len(rank_ids), n_layers)
        compute, exchange = np.full(shape, np.nan), np.full(shape, np.nan)
        duration = np.full(shape[:2], np.nan)
        transfers, collectives = [], []
        for i, step in enumerate(steps):
            slab = self._slab(step)
            compute[i], exchange[i], duration[i] = slab.compute[rows], slab.exchange[rows], slab.duration[rows]
            transfers.extend(slab.transfers)
            collectives.extend(slab.collectives)
        ranks = np.array(rank_ids, dtype=np.int32)
        return Window(
            layers=tuple(self.layers),
            nodes=tuple(n.name for n in self.nodes),
            ranks=ranks,
            rank_node=np.array([self.ranks[r].node for r in ranks.tolist()], dtype=np.int32),
            steps=np.array(steps, dtype=np.int64),
            compute_s=compute,
            exchange_s=exchange,
            step_s=duration,
            transfers=_transfers(transfers),
            collectives=_collectives(collectives),
        )

    def series(self) -> RunSeries:
        steps = sorted(self._series_step)
        pairs = tuple(sorted(self._pairs, key=self._pairs.__getitem__))
        link_bytes = np.full((len(steps), len(pairs)), np.nan)
        link_seconds = np.full((len(steps), len(pairs)), np.nan)
        link_peak = np.full((len(steps), len(pairs)), np.nan)
        column = {pair: i for i, pair in enumerate(pairs)}
        for i, step in enumerate(steps):
            for pair, (nbytes, seconds, fastest) in self._series_links.get(step, {}).items():
                link_bytes[i, column[pair]] = nbytes
                link_seconds[i, column[pair]] = seconds
                link_peak[i, column[pair]] = fastest if fastest > 0 else np.nan
        return RunSeries(
            steps=np.array(steps, dtype=np.int64),
            step_s=np.array([self._series_step[s] for s in steps], dtype=np.float64),
            links=pairs,
            link_bytes=link_bytes,
            link_transfer_s=link_seconds,
            link_watch_Bps=link_peak,
        )

    def totals_ns(self) -> tuple[np.ndarray, np.ndarray]:
        """Whole-run compute and exchange nanoseconds [R, L] (exact integer sums), ranks ascending."""
        rows = [self._row[r] for r in sorted(self._row)]
        return self.total_compute_ns[rows], self.total_exchange_ns[rows]


_IS_COLLECTIVE = np.zeros(256, dtype=bool)  # indexed by op value (the decoder admits only known ops)
_IS_COLLECTIVE[[int(op) for op in wire.COLLECTIVE_OPS]] = True


def _grown(array: np.ndarray, shape: tuple[int, ...], fill: float) -> np.ndarray:
    grown = np.full(shape, fill, dtype=array.dtype)
    grown[tuple(slice(0, n) for n in array.shape)] = array
    return grown


def _transfers(parts: list[np.ndarray]) -> Transfers:
    if not parts:
        return Transfers.empty()
    t = np.hstack(parts)
    return Transfers(t[0].astype(np.int64), t[1].astype(np.int32), t[2].astype(np.int32), t[3].astype(np.int32),
                     t[4].astype(np.int64), t[5], t[6], t[7])


def _collectives(parts: list[np.ndarray]) -> Collectives:
    if not parts:
        return Collectives.empty()
    c = np.hstack(parts)
    return Collectives(c[0].astype(np.int64), c[1].astype(np.int32), c[2].astype(np.int32),
                       c[3].astype(np.int16), c[4].astype(np.int32), c[5].astype(np.int64), c[6])
