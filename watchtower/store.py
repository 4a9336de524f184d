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
    finished_ns: int = 0  # collector clock when it signed off (its loop closed the probe); 0: still running
    finished_step: int = -1  # the newest step it said it published when it signed off


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
    shared: bool = False  # a gathered window (WindowParts) still reads these arrays: copy before writing

    def unshare(self) -> None:
        """Copy on write: the next writer gets arrays of its own, the reader keeps the ones it holds."""
        self.compute, self.exchange, self.duration = self.compute.copy(), self.exchange.copy(), self.duration.copy()
        self.transfers, self.collectives = list(self.transfers), list(self.collectives)
        self.shared = False


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
    def add_sign_off(self, message: wire.SignOff, received_ns: int) -> bool:
        """A rank has finished: from now on it is shown as finished, not silent. False if its sender is
        no known rank."""
        rank = self._sender_rank.get(message.header.sender)
        if rank is None:
            return False
        info = self.ranks[rank]
        info.finished_ns, info.finished_step = received_ns, message.last_step
        return True

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

    def step_rank(self, message: wire.Step) -> RankInfo | None:
        """The rank a step belongs to, or None when its sender's schema is unknown or does not match."""
        rank = self._sender_rank.get(message.header.sender)
        if rank is None:
            return None
        info = self.ranks[rank]
        if message.schema_id != info.schema_id or message.layer_ns.shape[1] != len(info.layer_map):
            return None
        return info

    def add_step(self, message: wire.Step, received_ns: int) -> bool:
        """Fold one rank's step in. False when its sender's schema is unknown or does not match."""
        info = self.step_rank(message)
        if info is None:
            self.unknown_sender_steps += 1
            return False
        rank = info.rank
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

    def add_steps(self, steps: list[tuple[wire.Step, int]]) -> list[bool]:
        """Fold in a run of steps exactly as ``add_step`` one after another would (what a collector drains
        at once): the bookkeeping in one loop, the arrays with a few numpy calls for the whole run. The
        caller hands over runs with no schema or offset between them. Returns ``add_step``'s answer for each."""
        if len({(self._sender_rank.get(m.header.sender), m.step) for m, _ in steps}) < len(steps) or \
                len(self._series_step) + len({m.step for m, _ in steps}) > SERIES_CAP:
            return [self.add_step(m, t) for m, t in steps]  # a rank's step twice, or the series merging: in turn
        done: list[bool] = []
        taken: list[tuple[wire.Step, RankInfo, _StepSlab]] = []
        for message, received_ns in steps:
            info = self.step_rank(message)
            if info is None:
                self.unknown_sender_steps += 1
                done.append(False)
                continue
            info.last_wall_ns = message.header.wall_ns
            info.last_step = max(info.last_step, message.step)
            info.last_heard_ns, info.step_s = received_ns, message.duration_ns * NS
            self.nodes[info.node].last_heard_ns = received_ns
            slab = self._slab(message.step)
            slab.duration[self._row[info.rank]] = message.duration_ns * NS
            slab.reported += 1
            if self.epoch_ns is None and message.exchanges.shape[1]:
                self.epoch_ns = message.header.wall_ns
            self.last_step = max(self.last_step, message.step)
            self._series_step[message.step] = max(self._series_step.get(message.step, 0.0), message.duration_ns * NS)
            taken.append((message, info, slab))
            done.append(True)
        if taken:
            self._scatter_steps(taken)
        return done

    def _scatter_steps(self, taken: list[tuple[wire.Step, RankInfo, _StepSlab]]) -> None:
        """The array part of ``add_steps``: layer times into their slabs and the run's totals, transfers and
        collectives appended per slab in message order, the link series per (message, source node)."""
        slabs = {id(slab): slab for _, _, slab in taken}
        place = {key: i for i, key in enumerate(slabs)}
        slab_of = np.array([place[id(slab)] for _, _, slab in taken], np.int64)
        order = np.argsort(slab_of, kind="stable")  # each slab's messages together, in their order
        arrival, taken = taken, [taken[i] for i in order.tolist()]
        slab_of = slab_of[order]
        messages = [m for m, _, _ in taken]
        infos = [info for _, info, _ in taken]
        widths = np.array([len(info.layer_map) for info in infos], np.int64)
        columns = np.concatenate([info.layer_map for info in infos])
        layer_ns = np.concatenate([m.layer_ns for m in messages], axis=1)
        rows = np.repeat(np.array([self._row[info.rank] for info in infos], np.int64), widths)
        cuts = np.searchsorted(np.repeat(slab_of, widths), np.arange(len(slabs) + 1))
        for i, slab in enumerate(slabs.values()):  # a rank is in a slab once (add_steps saw to it): no cell twice
            cell = slice(cuts[i], cuts[i + 1])
            flat = rows[cell] * slab.compute.shape[1] + columns[cell]
            slab.compute.reshape(-1)[flat] = layer_ns[0, cell] * NS
            slab.exchange.reshape(-1)[flat] = layer_ns[1, cell] * NS
            flat = rows[cell] * self.total_compute_ns.shape[1] + columns[cell]
            self.total_compute_ns.reshape(-1)[flat] += layer_ns[0, cell]
            self.total_exchange_ns.reshape(-1)[flat] += layer_ns[1, cell]
        counts = np.array([m.exchanges.shape[1] for m in messages], np.int64)
        if not counts.any():
            return
        table = np.concatenate([m.exchanges for m in messages], axis=1)
        owner = np.repeat(np.arange(len(taken)), counts)
        map_start = np.concatenate([[0], np.cumsum(widths)[:-1]])
        layer = columns[map_start[owner] + table[wire.X_LAYER]]
        step = np.array([m.step for m in messages], np.int64)[owner]
        rank = np.array([info.rank for info in infos], np.int64)[owner]
        base = np.array([m.header.wall_ns + self.offset_ns(info) - self.epoch_ns if m.exchanges.shape[1] else 0
                         for m, info in zip(messages, infos, strict=True)], np.int64)[owner]
        ops = table[wire.X_OP]
        recv: np.ndarray | slice = np.flatnonzero(ops == wire.Op.RECV)
        coll = np.flatnonzero(_IS_COLLECTIVE[ops])
        if len(recv) == len(ops):  # receives only (the usual table): no selection to copy
            recv = slice(None)
        picked = table[:, recv]
        out = np.empty((8, picked.shape[1]))
        out[0], out[1], out[2], out[3] = step[recv], layer[recv], picked[wire.X_PEER], rank[recv]
        out[4] = picked[wire.X_NBYTES]
        out[5] = (base[recv] + picked[wire.X_START]) * NS
        out[6] = (base[recv] + picked[wire.X_END]) * NS
        wait = picked[wire.X_WAIT]
        known = wait != wire.UNKNOWN_WAIT
        out[7] = np.where(known, wait * NS, np.nan)
        picked = table[:, coll]
        collective = np.empty((7, len(coll)))
        collective[0], collective[1], collective[2] = step[coll], layer[coll], rank[coll]
        collective[3], collective[4], collective[5] = picked[wire.X_OP], picked[wire.X_GROUP], picked[wire.X_NBYTES]
        collective[6] = (picked[wire.X_END] - picked[wire.X_START]) * NS
        owner_recv = owner[recv]
        for part, whose, kind in ((out, owner_recv, "transfers"), (collective, owner[coll], "collectives")):
            if not part.shape[1]:
                continue
            cuts = np.searchsorted(slab_of[whose], np.arange(len(slabs) + 1))
            for i, slab in enumerate(slabs.values()):
                if cuts[i + 1] > cuts[i]:
                    getattr(slab, kind).append(part[:, cuts[i]:cuts[i + 1]])
        if out.shape[1]:
            seconds = out[6] - out[5] - np.where(known, out[7], 0.0)
            self._add_link_series_many(arrival, order[owner_recv], out, seconds)  # in arrival order, as in turn

    def _add_link_series_many(self, taken: list[tuple[wire.Step, RankInfo, _StepSlab]], owner: np.ndarray,
                              rows: np.ndarray, seconds: np.ndarray) -> None:
        """``_add_link_series`` for many messages' received transfers at once (``owner``: the index into
        ``taken`` of each), in the same order and with the same sums: a bin of ``np.bincount`` adds its
        elements in turn, as one message's would."""
        peers = rows[2].astype(np.int64)
        known = peers < len(self._rank_node)
        src = np.full(peers.shape, -1)
        src[known] = self._rank_node[peers[known]]
        node = np.array([info.node for _, info, _ in taken], np.int64)[owner]
        keep = (src >= 0) & (src != node)
        if not keep.any():
            return
        width = len(self.nodes) + 1
        cell = owner[keep] * width + src[keep]  # (message, source node), ascending as the messages came
        bins = len(taken) * width
        keys = np.flatnonzero(np.bincount(cell, minlength=bins))
        nbytes = rows[4][keep]
        sums_bytes = np.bincount(cell, nbytes, minlength=bins)[keys]
        sums_seconds = np.bincount(cell, seconds[keep], minlength=bins)[keys]
        peak = np.zeros(bins)
        with np.errstate(divide="ignore", invalid="ignore"):
            np.maximum.at(peak, cell, np.where(seconds[keep] > 0, nbytes / seconds[keep], 0.0))
        peak = peak[keys]
        for key, b, t, fastest in zip(keys.tolist(), sums_bytes.tolist(), sums_seconds.tolist(), peak.tolist(),
                                      strict=True):
            i, source = divmod(key, width)
            message, info, _ = taken[i]
            pair = (source, info.node)
            self._pairs.setdefault(pair, len(self._pairs))
            cell = self._series_links.setdefault(message.step, {}).setdefault(pair, [0.0, 0.0, 0.0])
            cell[0] += b
            cell[1] += t
            cell[2] = max(cell[2], fastest)

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
            return slab
        self._fit(slab)
        if slab.shared:
            slab.unshare()
        return slab

    def _fit(self, slab: _StepSlab) -> None:
        """Grow a step's arrays to the ranks and layers known now (new arrays: a reader keeps the old ones)."""
        shape = (len(self._row), len(self.layers))
        if slab.compute.shape != shape:
            slab.compute = _grown(slab.compute, shape, np.nan)
            slab.exchange = _grown(slab.exchange, shape, np.nan)
            slab.duration = _grown(slab.duration[:, None], (shape[0], 1), np.nan)[:, 0]

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
        return self.window_parts().build()

    def window_parts(self) -> WindowParts:
        """What ``window()`` copies, taken without copying (O(steps + ranks)): the steps' arrays are marked
        shared, so ingest writes to copies of them from now on and ``build`` may run on another thread."""
        newest = self.newest_complete_step()
        rank_ids = sorted(self._row)
        slabs = []
        for step, slab in self._slabs.items():
            if step <= newest:
                self._fit(slab)
                slab.shared = True
                slabs.append((step, slab.compute, slab.exchange, slab.duration, tuple(slab.transfers),
                              tuple(slab.collectives)))
        return WindowParts(tuple(self.layers), tuple(n.name for n in self.nodes), np.array(rank_ids, np.int32),
                           np.array([self._row[r] for r in rank_ids], np.int64),
                           np.array([self.ranks[r].node for r in rank_ids], np.int32), slabs)

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


@dataclass(frozen=True)
class WindowParts:
    """The held steps' arrays as the store had them (``Store.window_parts``); ``build`` stacks them."""

    layers: tuple[str, ...]
    nodes: tuple[str, ...]
    ranks: np.ndarray
    rows: np.ndarray  # each rank's row in the steps' arrays
    rank_node: np.ndarray
    slabs: list[tuple[int, np.ndarray, np.ndarray, np.ndarray, tuple[np.ndarray, ...], tuple[np.ndarray, ...]]]

    def build(self) -> Window:
        shape = (len(self.slabs), len(self.ranks), len(self.layers))
        compute, exchange = np.full(shape, np.nan), np.full(shape, np.nan)
        duration = np.full(shape[:2], np.nan)
        transfers: list[np.ndarray] = []
        collectives: list[np.ndarray] = []
        for i, (_, c, e, d, t, k) in enumerate(self.slabs):
            compute[i], exchange[i], duration[i] = c[self.rows], e[self.rows], d[self.rows]
            transfers.extend(t)
            collectives.extend(k)
        return Window(
            layers=self.layers,
            nodes=self.nodes,
            ranks=self.ranks,
            rank_node=self.rank_node,
            steps=np.array([slab[0] for slab in self.slabs], dtype=np.int64),
            compute_s=compute,
            exchange_s=exchange,
            step_s=duration,
            transfers=_transfers(transfers),
            collectives=_collectives(collectives),
        )


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
