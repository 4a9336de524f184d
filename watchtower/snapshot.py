"""Builds the job snapshot (docs/snapshot.md): the one dictionary that the console and ``report`` show.

It joins the analysis of the store's window with what only the collector knows: who was heard from,
loss, node figures, the transport's security state and, on replay, the position.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from watchtower.analysis.checks import Checks
from watchtower.analysis.drilldown import worst_ranks
from watchtower.analysis.summary import analyse, analysis_to_json
from watchtower.analysis.summary import json_float as _f
from watchtower.analysis.window import RunSeries, Window
from watchtower.buckets import carried_label
from watchtower.cluster import Cluster, ClusterConfigError, cluster_from_dict
from watchtower.ingest import Ingest
from watchtower.store import NodeInfo, WindowParts

TREND_POINTS = 60
# A rank is silent when its newest step is older than SILENT_STEPS of its own step times, and at least
# SILENT_MIN_S (frames travel in batches and snapshots come every quarter second): common practice, no source.
SILENT_STEPS = 5
SILENT_MIN_S = 2.0
NODE_SILENT_S = 10.0  # a node without ranks (its daemon samples every second by default) is silent after this
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


@dataclass(frozen=True)
class SnapshotParts:
    """What a snapshot takes from the collector's state, copied: the analysis of it (``finish_snapshot``) may
    then run on another thread while ingest goes on changing the store."""

    held: WindowParts  # every step still held (the history, for degradation), not yet stacked
    window_steps: int | None  # the newest steps the figures cover (None: all held)
    series: RunSeries
    checks: Checks
    cluster: Cluster
    nic_Bps: np.ndarray
    carries: dict[str, tuple[str, ...]]
    totals_ns: tuple[np.ndarray, np.ndarray]  # whole-run compute and exchange [R, L], copied
    facts: dict[str, Any]  # the keys only the collector knows (who, loss, nodes, liveness, ...)

    @functools.cached_property
    def history(self) -> Window:
        return self.held.build()

    @property
    def window(self) -> Window:
        return self.history if self.window_steps is None else self.history.last(self.window_steps)


def build_snapshot(
    ingest: Ingest,
    cluster: Cluster,
    *,
    source: dict[str, str],
    meta: dict | None = None,
    security: dict[str, Any] | None = None,
    window_steps: int | None = None,
    replay: dict[str, Any] | None = None,
    recorder: dict[str, Any] | None = None,
    now_ns: int | None = None,
) -> dict[str, Any]:
    """``now_ns``: the wall clock when live (ages grow while nobody speaks); a recording's own clock (the
    newest record, the collector's ticks included) when None."""
    return finish_snapshot(gather_snapshot(ingest, cluster, source=source, meta=meta, security=security,
                                           window_steps=window_steps, replay=replay, recorder=recorder,
                                           now_ns=now_ns))


def gather_snapshot(
    ingest: Ingest,
    cluster: Cluster,
    *,
    source: dict[str, str],
    meta: dict | None = None,
    security: dict[str, Any] | None = None,
    window_steps: int | None = None,
    replay: dict[str, Any] | None = None,
    recorder: dict[str, Any] | None = None,
    now_ns: int | None = None,
) -> SnapshotParts:
    """The part of a snapshot that reads the store; it must run where the store is written. It copies only
    what is small (O(ranks + nodes + layers + series)); the held steps' arrays are shared, copy on write."""
    store = ingest.store
    meta = meta or {}
    held = store.window_parts()
    ranks_by_node: dict[int, list[int]] = {}
    for rank, info in sorted(store.ranks.items()):
        ranks_by_node.setdefault(info.node, []).append(rank)
    now_ns = ingest.last_received_ns if now_ns is None else max(now_ns, ingest.last_received_ns)
    liveness = _liveness(ingest, now_ns)
    silent_ranks = set(liveness["silent_ranks"])
    series = store.series()
    facts = {
        "job": store.job or cluster.name,
        "source": source,
        "invented": bool(meta.get("invented", False)),
        "note": str(meta.get("note", "")),
        "ranks": len(store.ranks),
        "world": store.world,
        "steps": store.steps_seen,
        "last_step": store.last_step,
        "steps_per_s": None,  # from the figures (finish_snapshot); the keys keep the order they always had
        "liveness": liveness,
        "nodes": [
            {"name": node.name, "ranks": ranks_by_node.get(i, []), "cpu_percent": _f(node.cpu_percent),
             "memory_percent": _f(node.memory_percent), **_nic_rates(node.nics, node.nic_values),
             "clock_offset_s": None if node.offset_ns is None else node.offset_ns * 1e-9,
             "last_heard_s": None if not node.last_heard_ns else max(0.0, (now_ns - node.last_heard_ns) * 1e-9),
             "silent": _node_silent(ranks_by_node.get(i, []), silent_ranks, node.last_heard_ns, now_ns)}
            for i, node in enumerate(store.nodes)
        ],
        "step_time": {"recent_s": None, "trend": [_f(x) for x in series.step_s[-TREND_POINTS:]]},
        "loss": ingest.ledger.as_json(),
        "security": _security(security, meta),
        "replay": replay,
        "checks": None,
        "recorder": recorder,
        "recording_gaps": list(ingest.recording_gaps),
        "run_totals": None,
    }
    return SnapshotParts(held, window_steps, series, store.checks(), cluster, _window_nics(store.nodes, held.nodes),
                         dict(store.carries), store.totals_ns(), facts)


def analyse_parts(parts: SnapshotParts) -> dict[str, Any]:
    """The figures of a snapshot: the full analysis of the window (``analysis_to_json``)."""
    cluster = parts.cluster
    bar = {key: value for key, value in (("min_effect", cluster.alert_min_effect),
                                         ("min_hours", cluster.alert_min_hours)) if value is not None}
    return analysis_to_json(analyse(parts.window, parts.series, cluster, nic_Bps=parts.nic_Bps,
                                    history=parts.history, checks=parts.checks, **bar))


def finish_snapshot(parts: SnapshotParts, figures: dict[str, Any] | None = None) -> dict[str, Any]:
    """The snapshot from gathered parts and their figures (``analyse_parts`` when not given); touches no
    shared state, so it may run on a thread of its own."""
    snapshot = analyse_parts(parts) if figures is None else figures
    facts = dict(parts.facts)
    window = parts.window
    worst = worst_ranks(window, WORST_RANKS)
    node_names = window.nodes
    rank_node = dict(zip(window.ranks.tolist(), window.rank_node.tolist(), strict=True))
    per_step = 1.0 / worst.steps if worst.steps else math.nan
    for i, layer in enumerate(snapshot["layers"]):
        carried = parts.carries.get(layer["name"])
        layer["carries"] = carried_label(carried) if carried else None
        layer["worst_ranks"] = [
            {"rank": int(r), "node": node_names[rank_node[int(r)]], "compute_s": _f(c), "exchange_s": _f(e),
             "comm_fraction": _f(f), "compute_step_s": _f(c * per_step), "exchange_step_s": _f(e * per_step),
             "waits_on": None if w < 0 else {"rank": int(w), "node": node_names[rank_node[int(w)]]}}
            for r, c, e, f, w in zip(worst.rank[:, i], worst.compute_s[:, i], worst.exchange_s[:, i],
                                     worst.comm_fraction[:, i], worst.waits_on[:, i], strict=True)
            if math.isfinite(f)
        ]
    straggler_nodes = {s["node"] for s in snapshot["stragglers"]}
    liveness = facts["liveness"]
    recent = snapshot.get("recent_step_s")
    facts["nodes"] = [{**node, "straggler": node["name"] in straggler_nodes} for node in facts["nodes"]]
    facts["step_time"] = {**facts["step_time"], "recent_s": recent}
    facts["steps_per_s"] = _rate(recent, liveness)
    compute_ns, exchange_ns = (totals.sum(axis=0).tolist() for totals in parts.totals_ns)
    facts["run_totals"] = {"layers": [{"name": name, "compute_ns": int(c), "exchange_ns": int(e)}
                                      for name, c, e in zip(parts.held.layers, compute_ns, exchange_ns, strict=True)]}
    facts["checks"] = None if not len(parts.checks) else {
        "results": len(parts.checks), "period_s": _f(parts.checks.period_s), "budget": _f(parts.checks.budget),
        "deferred": parts.checks.deferred}
    snapshot.update(facts)
    if liveness["stalled"]:
        snapshot["eta_s"] = None
    elif liveness["finished"]:
        snapshot["eta_s"] = 0.0  # nothing left to run (the hours at stake are the run's, not the future's)
    snapshot["alerts"] = snapshot["alerts"] + _silence_alerts(liveness, facts["job"])
    return snapshot


def _security(given: dict[str, Any] | None, meta: dict) -> dict[str, Any]:
    """The transport mode in force: the live collector's, else what the recording's collector noted in its
    metadata, else "unknown" (never a guess)."""
    if given is not None:
        return given
    noted = meta.get("security")
    if isinstance(noted, dict) and noted.get("mode") in ("loopback", "keys", "insecure"):
        return {"mode": noted["mode"], "warning": noted.get("warning") if isinstance(noted.get("warning"), str)
                else None}
    return {"mode": "unknown", "warning": None}


def _liveness(ingest: Ingest, now_ns: int) -> dict[str, Any]:
    """Each rank's age (now minus its newest step's arrival) and whether it is silent; the job is stalled
    when every rank is. ``stopped_early``: silent ranks behind the job's newest step, with the step they
    stopped at."""
    store = ingest.store
    ranks = []
    for rank, info in sorted(store.ranks.items()):
        if not info.last_heard_ns:
            continue
        age = max(0.0, (now_ns - info.last_heard_ns) * 1e-9)
        limit = max(SILENT_STEPS * info.step_s, SILENT_MIN_S)
        finished = bool(info.finished_ns)
        ranks.append({"rank": rank, "node": store.nodes[info.node].name, "age_s": age, "last_step": info.last_step,
                      "step_s": info.step_s, "silent_after_s": limit, "silent": age > limit and not finished,
                      "finished": finished})
    newest = max((info.last_heard_ns for info in store.ranks.values()), default=0)
    silent = [r["rank"] for r in ranks if r["silent"]]
    running = [r for r in ranks if not r["finished"]]
    return {
        "now_ns": now_ns,
        "age_s": None if not newest else max(0.0, (now_ns - newest) * 1e-9),
        "ranks": ranks,
        "silent_ranks": silent,
        "finished": bool(ranks) and not running,  # every rank signed off: the job ended, nothing is stalled
        "stalled": bool(running) and len(silent) == len(running),
        "stopped_early": [{"rank": r["rank"], "node": r["node"], "last_step": r["last_step"]}
                          for r in ranks if r["silent"] and r["last_step"] < store.last_step],
    }


def _rate(recent_s: float | None, liveness: dict[str, Any]) -> float | None:
    """Steps per second: 0 once stalled; decaying as 1 / (time since the newest step) once that exceeds
    two recent step times, so a rate never freezes at its last value while nobody speaks."""
    if liveness["stalled"] or liveness.get("finished"):
        return 0.0
    if not recent_s:
        return None
    age = liveness["age_s"] or 0.0
    return 1.0 / (age if age > 2 * recent_s else recent_s)


def _node_silent(ranks: list[int], silent_ranks: set[int], last_heard_ns: int, now_ns: int) -> bool:
    if ranks:
        return all(rank in silent_ranks for rank in ranks)
    return bool(last_heard_ns) and (now_ns - last_heard_ns) * 1e-9 > NODE_SILENT_S


def _silence_alerts(liveness: dict[str, Any], job: str) -> list[dict[str, Any]]:
    """``rank-silent`` per silent rank and ``job-stalled`` when no rank advances; they clear by themselves
    when a rank speaks again (every snapshot recomputes them)."""
    alerts = [{"kind": "rank-silent", "subject": f"rank {r['rank']}", "step_began": r["last_step"],
               "step_detected": r["last_step"], "port": None,
               "message": f"rank {r['rank']} on {r['node']} silent for {r['age_s']:.0f} s since step {r['last_step']} "
                          f"(its steps take {r['step_s']:.3g} s; silent after {r['silent_after_s']:.3g} s)"}
              for r in liveness["ranks"] if r["silent"]]
    if liveness["stalled"]:
        newest = max(r["last_step"] for r in liveness["ranks"])
        alerts.append({"kind": "job-stalled", "subject": job or "job", "step_began": newest, "step_detected": newest,
                       "port": None, "message": f"no rank has advanced for {liveness['age_s']:.0f} s "
                                                f"(newest step {newest})"})
    return alerts


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
