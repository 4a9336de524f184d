"""Builds the job snapshot (docs/snapshot.md): the one dictionary that the console and ``report`` show.

It joins the analysis of the store's window with what only the collector knows: who was heard from,
loss, node figures, the transport's security state and, on replay, the position.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from watchtower.analysis.drilldown import worst_ranks
from watchtower.analysis.summary import analyse, analysis_to_json
from watchtower.analysis.summary import json_float as _f
from watchtower.cluster import Cluster, ClusterConfigError, cluster_from_dict
from watchtower.ingest import Ingest
from watchtower.store import NodeInfo

TREND_POINTS = 60
WORST_RANKS = 5
LOOPBACK_NIC = "lo"


def cluster_for(meta: dict, given: Cluster | None) -> Cluster:
    """The cluster description: the one given, else the one a recording carries, else none."""
    if given is not None:
        return given
    described = meta.get("cluster")
    if isinstance(described, dict):
        try:
            return cluster_from_dict(described)
        except ClusterConfigError:
            return Cluster.default()
    return Cluster.default()


def build_snapshot(
    ingest: Ingest,
    cluster: Cluster,
    *,
    source: dict[str, str],
    meta: dict | None = None,
    security: dict[str, Any] | None = None,
    window_steps: int | None = None,
    replay: dict[str, Any] | None = None,
) -> dict[str, Any]:
    store = ingest.store
    meta = meta or {}
    history = store.window()  # every step still held, for degradation; the figures cover its newest steps
    window = history if window_steps is None else history.last(window_steps)
    series = store.series()
    bar = {key: value for key, value in (("min_effect", cluster.alert_min_effect),
                                         ("min_hours", cluster.alert_min_hours)) if value is not None}
    snapshot = analysis_to_json(analyse(window, series, cluster, nic_Bps=_window_nics(store.nodes, window.nodes),
                                        history=history, **bar))
    ranks_by_node: dict[int, list[int]] = {}
    for rank, info in sorted(store.ranks.items()):
        ranks_by_node.setdefault(info.node, []).append(rank)
    straggler_nodes = {s["node"] for s in snapshot["stragglers"]}
    now_ns = ingest.last_received_ns
    worst = worst_ranks(window, WORST_RANKS)
    node_names = window.nodes
    rank_node = dict(zip(window.ranks.tolist(), window.rank_node.tolist(), strict=True))
    for i, layer in enumerate(snapshot["layers"]):
        layer["worst_ranks"] = [
            {"rank": int(r), "node": node_names[rank_node[int(r)]], "compute_s": _f(c), "exchange_s": _f(e),
             "comm_fraction": _f(f)}
            for r, c, e, f in zip(worst.rank[:, i], worst.compute_s[:, i], worst.exchange_s[:, i],
                                  worst.comm_fraction[:, i], strict=True)
            if math.isfinite(f)
        ]
    compute_ns, exchange_ns = store.totals_ns()
    trend = series.step_s[-TREND_POINTS:]
    recent = snapshot.get("recent_step_s")
    snapshot.update({
        "job": store.job or cluster.name,
        "source": source,
        "invented": bool(meta.get("invented", False)),
        "note": str(meta.get("note", "")),
        "ranks": len(store.ranks),
        "world": store.world,
        "steps": store.steps_seen,
        "last_step": store.last_step,
        "steps_per_s": None if not recent else 1.0 / recent,
        "nodes": [
            {"name": node.name, "ranks": ranks_by_node.get(i, []), "cpu_percent": _f(node.cpu_percent),
             "memory_percent": _f(node.memory_percent), **_nic_rates(node.nics, node.nic_values),
             "clock_offset_s": None if node.offset_ns is None else node.offset_ns * 1e-9,
             "last_heard_s": None if not node.last_heard_ns else max(0.0, (now_ns - node.last_heard_ns) * 1e-9),
             "straggler": node.name in straggler_nodes}
            for i, node in enumerate(store.nodes)
        ],
        "step_time": {"recent_s": recent, "trend": [_f(x) for x in trend]},
        "loss": ingest.ledger.as_json(),
        "security": security or {"mode": "loopback", "warning": None},
        "replay": replay,
        "run_totals": {"layers": [
            {"name": name, "compute_ns": int(compute_ns[:, i].sum()), "exchange_ns": int(exchange_ns[:, i].sum())}
            for i, name in enumerate(store.layers)
        ]},
    })
    return snapshot


def _window_nics(nodes: list[NodeInfo], names: tuple[str, ...]) -> np.ndarray:
    """Each window node's latest NIC-counter rate out and in (NaN: no sample), for the port analysis."""
    known = {node.name: _nic_rates(node.nics, node.nic_values) for node in nodes}
    out = np.full((len(names), 2), np.nan)
    for i, name in enumerate(names):
        rates = known.get(name, {})
        out[i] = [math.nan if rates.get(k) is None else rates[k] for k in ("nic_out_Bps", "nic_in_Bps")]
    return out


def _nic_rates(nics: tuple[str, ...], values: np.ndarray) -> dict[str, float | None]:
    if not nics:
        return {"nic_out_Bps": None, "nic_in_Bps": None}
    keep = np.array([name != LOOPBACK_NIC for name in nics])
    return {"nic_out_Bps": float(values[0, keep].sum()), "nic_in_Bps": float(values[1, keep].sum())}
