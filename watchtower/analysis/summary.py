"""The whole analysis of a window: ``analyse`` → ``Analysis`` → ``analysis_to_json``; ``compare`` for A/B.

JSON holds only plain ints, floats, strings, booleans and None (NaN and infinities become None), so the
console, the report and any other reader get the same figures without numpy.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from watchtower.analysis.aggregate import COMM_BOUND_THRESHOLD, LayerStats, layer_stats, reduce_window
from watchtower.analysis.cusum import WARMUP, Alert, degradation_alerts
from watchtower.analysis.efficiency import (
    Efficiency,
    SerialFraction,
    Speedup,
    Straggler,
    find_stragglers,
    pop_efficiency,
    serial_fractions,
)
from watchtower.analysis.links import SLOW_FRACTION, LinkStats, link_rate_series, link_stats
from watchtower.analysis.models import StepModel, eta_s, remaining_steps, step_model
from watchtower.analysis.ports import PortStats, name_alert_ports, port_stats
from watchtower.analysis.window import RunSeries, Window
from watchtower.cluster import Cluster

RECENT_STEPS = 50  # steps behind the ETA's mean step time; common practice, no source
SCENARIOS = (("2× bandwidth", 2.0, 1.0, 1.0), ("½ latency", 1.0, 2.0, 1.0), ("2× ranks", 1.0, 1.0, 2.0))


@dataclass(frozen=True)
class WhatIf:
    """One projected scenario: β × ``bandwidth_x``, α / ``latency_div``, ``workers`` ranks."""

    label: str
    bandwidth_x: float
    latency_div: float
    workers: int
    step_s: float
    speedup: float


@dataclass(frozen=True)
class Analysis:
    """Every figure of one window; see ``HOW`` for each definition and its source."""

    job: str
    first_step: int
    last_step: int
    steps: int
    nodes: tuple[str, ...]
    efficiency: Efficiency
    speedup: Speedup
    layers: LayerStats
    links: tuple[LinkStats, ...]  # network links first, then node-local ones
    ports: tuple[PortStats, ...]  # by node, out before in
    stragglers: tuple[Straggler, ...]
    alerts: tuple[Alert, ...]
    step_s: float  # mean step wall time over the window
    recent_step_s: float
    remaining_steps: int | None
    eta_s: float | None
    hours_at_stake: float | None
    model: StepModel
    whatif: tuple[WhatIf, ...]
    serial_fraction: SerialFraction | None


def analyse(window: Window, series: RunSeries | None, cluster: Cluster, *,
            threshold: float = COMM_BOUND_THRESHOLD, slow_fraction: float = SLOW_FRACTION,
            warmup: int = WARMUP, recent: int = RECENT_STEPS, runs: Sequence[tuple[int, float]] = (),
            scenarios: Sequence[tuple[str, float, float, float]] = SCENARIOS,
            nic_Bps: np.ndarray | None = None, history: Window | None = None) -> Analysis:
    """Analyse a window (and the run's series, when there is one) against the cluster's configuration.

    ``runs`` are (p, S) of earlier runs at other sizes, for the Karp–Flatt serial fraction; this window's
    (p, S) is added to them (no serial fraction while all runs have one size). ``scenarios`` are
    (label, bandwidth ×, latency ÷, ranks ×) what-ifs. ``nic_Bps`` (float64 [N, 2], NaN: unknown) is each
    window node's NIC-counter rate out and in, the second witness of port capacity. ``history`` is every
    step the caller still holds in full: when given, link degradation is watched on its transfers with the
    port sharing taken out (``links.link_rate_series``), else on ``series``.
    """
    sums = reduce_window(window)
    eff = pop_efficiency(window, sums)
    speedup = eff.speedup()
    n_steps = int(np.count_nonzero(np.isfinite(sums.step_wall_s)))
    step_s = eff.wall_s / n_steps if n_steps else math.nan
    last_step = int(window.steps[-1]) if len(window.steps) else -1
    if series is not None and len(series.steps):
        last_step = max(last_step, int(series.steps[-1]))
        recent_step_s = _nanmean(np.asarray(series.step_s[-recent:], np.float64))
    else:
        recent_step_s = _nanmean(sums.step_wall_s[-recent:])
    remaining = remaining_steps(cluster.total_steps, last_step)

    links = link_stats(window, cluster, eff.wall_s, remaining, slow_fraction=slow_fraction)
    ports, links = port_stats(links, window.nodes, cluster, nic_Bps, slow_fraction=slow_fraction)
    link_rates = None if history is None else link_rate_series(history, cluster)
    alerts = degradation_alerts(series, window.nodes, links=link_rates, warmup=warmup) if series is not None else ()
    net = [lk for lk in links if not lk.local]
    at_stake = None if remaining is None else sum(lk.hours_at_stake or 0.0 for lk in net if lk.slow)
    model = step_model(window, eff, _nanmedian([lk.latency_s for lk in net]),
                       _nanmedian([lk.bandwidth_Bps for lk in net]))
    whatif = what_ifs(model, eff.workers, scenarios)
    serial = None
    if len({p for p, _ in runs} | {eff.workers}) >= 2 and eff.workers >= 2 and speedup.achieved > 0:
        serial = serial_fractions([*runs, (eff.workers, speedup.achieved)])
    return Analysis(
        job=cluster.name,
        first_step=int(window.steps[0]) if len(window.steps) else -1,
        last_step=int(window.steps[-1]) if len(window.steps) else -1,
        steps=len(window.steps), nodes=window.nodes, efficiency=eff, speedup=speedup,
        layers=layer_stats(window, sums, threshold), links=links, ports=ports,
        stragglers=find_stragglers(window, eff), alerts=name_alert_ports(alerts, links),
        step_s=step_s, recent_step_s=recent_step_s, remaining_steps=remaining,
        eta_s=eta_s(remaining, recent_step_s), hours_at_stake=at_stake, model=model, whatif=whatif,
        serial_fraction=serial,
    )


def what_ifs(model: StepModel, workers: int,
             scenarios: Sequence[tuple[str, float, float, float]]) -> tuple[WhatIf, ...]:
    """The (label, bandwidth ×, latency ÷, ranks ×) scenarios projected with the step model."""
    return tuple(_what_if(model, label, bw, lat, max(1, round(workers * rx)))
                 for label, bw, lat, rx in scenarios) if workers else ()


def _what_if(model: StepModel, label: str, bandwidth_x: float, latency_div: float, workers: int) -> WhatIf:
    knobs = {"bandwidth_x": bandwidth_x, "latency_div": latency_div, "workers": workers}
    return WhatIf(label, bandwidth_x, latency_div, workers, model.step_s(**knobs), model.speedup(**knobs))


def _nanmean(x: np.ndarray) -> float:
    x = x[np.isfinite(x)]
    return float(x.mean()) if len(x) else math.nan


def _nanmedian(values: Sequence[float]) -> float:
    x = np.asarray(values, dtype=np.float64)
    x = x[np.isfinite(x)]
    return float(np.median(x)) if len(x) else math.nan


_POP = "POP metrics (Wagner et al., 2017)"
HOW: dict[str, tuple[str, str]] = {
    "efficiency.load_balance": ("mean over ranks of compute / max over ranks of compute", _POP),
    "efficiency.communication": ("max over ranks of compute / window wall time (Σ steps of the slowest rank's step)",
                                 _POP),
    "efficiency.parallel": ("load balance × communication efficiency", _POP),
    "efficiency.serialisation": ("max compute / T_ideal, T_ideal = Σ steps Σ layers max over ranks of compute "
                                 "(free transfers, same per-layer synchronisation)", _POP),
    "efficiency.transfer": ("T_ideal / window wall time", _POP),
    "speedup.achieved": ("workers × parallel efficiency, against one ideal worker doing all the work",
                         "definition, strong scaling"),
    "speedup.lost_to_interconnect": ("workers × load balance × (1 − communication efficiency)",
                                     "split of p − S = p(1−LB) + p·LB(1−CommE)"),
    "speedup.lost_to_imbalance": ("workers × (1 − load balance)", "split of p − S = p(1−LB) + p·LB(1−CommE)"),
    "layers.compute_s": ("mean rank's compute in the layer, summed over the window", "plain sum"),
    "layers.exchange_s": ("mean rank's blocked exchange time in the layer, summed over the window", "plain sum"),
    "layers.comm_fraction": ("E / (C + E) of the mean rank, summed over the window", "definition"),
    "layers.comm_fraction_worst": ("highest E / (C + E) of any single rank", "definition"),
    "layers.comm_bound": ("comm fraction above the threshold (default 0.5)", "common practice, no source"),
    "links.bandwidth_Bps": ("β of t(n) = α + n/β, least squares through each size bin's median time (its 25 % "
                            "quantile when most waits are unknown), over the window's newest whole steps holding "
                            "at most 200,000 transfers, "
                            "fitted on times with the byte-moving part (time − α) × the transfer's share of its "
                            "bottleneck port: the rate with the path to itself, not a concurrent flow's share",
                            "Hockney (1994); share: see links.concurrency"),
    "links.concurrency": ("share = the transfer's bytes / bytes its port moved while it ran (flows at uniform "
                          "rate over [start + wait, end]); its bottleneck is a port that was full (≥ 60 % of "
                          "the port's busy level, the time-weighted 90 % quantile of its aggregate rate) where "
                          "the transfer had its fair share (≥ 60 % of the mean rate of the port's flows); both "
                          "ports: the one that moved more bytes; neither: share 1. A flow limited elsewhere "
                          "keeps its own rate",
                          "bottleneck of max-min fairness: Bertsekas & Gallager, Data Networks, §6.5; "
                          "60 %, 90 %: common practice, no source"),
    "links.port": ("the slow port at either end that limits a slow link (link β ≥ 75 % of the port's capacity), "
                   "the slower if both; null with unexplained = true when no slow port does (the path "
                   "between them, a blocking switch, or the pair itself)", "definition; 75 %: no source"),
    "links.latency_s": ("α of t(n) = α + n/β (none when only one message size was seen)", "Hockney (1994)"),
    "links.throughput_Bps": ("bytes / time spent transferring (known waits excluded), shares and all",
                             "plain ratio"),
    "ports.capacity_Bps": ("highest β of the network links through the port (a pair's path is limited by the "
                           "sender's way out and the receiver's way in; the switch is taken as non-blocking)",
                           "definition; β as links.bandwidth_Bps"),
    "ports.lower_bound": ("every link through the port runs at the capacity of its other end (within 2 %), so "
                          "the port's own limit was never seen: capacity is a lower bound, never judged slow",
                          "definition; 2 %: common practice, no source"),
    "ports.score": ("modified z-score 0.6745 (x − median) / MAD of log capacity among ports of the same "
                    "direction and node group", "Iglewicz & Hoaglin (1993)"),
    "ports.slow": ("score < −3.5 or capacity under a third of its peers' median (outlier), or capacity below the "
                   "set fraction (default 0.5) of the node's nominal rate (below-nominal)",
                   "Iglewicz & Hoaglin (1993); third and fraction: common practice, no source"),
    "ports.shadowed_by": ("set when the node's other direction is slow and over 3× slower: acknowledgements queue "
                          "behind it, so this direction's shortfall is its doing and this port is not called slow",
                          "TCP acknowledges in the reverse direction (RFC 9293); 3×: common practice, no source"),
    "ports.nic_Bps": ("the node's NIC-counter rate in that direction (psutil, loopback excluded); nic_disagrees "
                      "when it exceeds capacity by more than 10 %: unseen traffic shares the port",
                      "measured; 10 % margin for headers: common practice, no source"),
    "links.utilisation": ("bytes / window wall time / nominal rate (lower of the two NICs)", "plain ratio"),
    "links.score": ("modified z-score 0.6745 (x − median) / MAD of log β among links of the same class",
                    "Iglewicz & Hoaglin (1993)"),
    "links.slow": ("score < −3.5 or β under a third of its class's median (outlier), β below the set fraction "
                   "(default 0.5) of nominal (below-nominal), or running at a slow port's capacity (slow port)",
                   "Iglewicz & Hoaglin (1993); third and fraction: common practice, no source"),
    "links.hours_at_stake": ("slow links: remaining steps × per-step time the slowest receiver on the link would "
                             "save at the class's median β (its transfer time × (1 − β/β_median)); an upper estimate",
                             "model above"),
    "stragglers": ("ranks whose modified z-score of log compute exceeds +3.5", "Iglewicz & Hoaglin (1993)"),
    "alerts": ("one-sided tabular CUSUM, k = 0.5σ, h = 5σ, on medians of 4-step blocks clipped to μ0 ± 2.5σ "
               "(μ0, σ = median, 1.4826·MAD of the first 40 steps; for a link σ ≤ μ0/4); step time upward, "
               "each link's per-step median transfer rate with port sharing taken out (see "
               "links.concurrency) downward; "
               "reported when the next block confirms a change of 5 % or more (40 % for a link); began = "
               "least-squares change "
               "point; port: the one explaining the link, else the sender's way out when all its links "
               "dropped, else the receiver's way in likewise",
               "Page (1954); Montgomery, SQC; block, clip and 5 %: common practice, no source"),
    "eta_s": ("remaining steps × mean step time of the recent steps", "plain product"),
    "hours_at_stake": ("sum of hours at stake over the slow links", "model above"),
    "whatif": ("compute path × p/p' + unexplained time + modelled collectives (cheapest of ring, recursive "
               "doubling, Rabenseifner) and halo exchange (max over ranks of Σ α + n/β)",
               "Thakur, Rabenseifner & Gropp (2005); Patarasuk & Yuan (2009)"),
    "serial_fraction": ("Karp–Flatt e = (1/S − 1/p)/(1 − 1/p) per run size", "Karp & Flatt (1990)"),
}


def json_float(x: Any) -> float | None:
    """A JSON-safe float: NaN, infinities and missing values become None."""
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


_f = json_float  # the many uses below read better short


def analysis_to_json(a: Analysis) -> dict[str, Any]:
    """Plain data for the console, ``report --json`` and comparisons (keys are part of the interface)."""
    e, s = a.efficiency, a.speedup
    pct = s.percent()
    lay = a.layers
    net = [lk for lk in a.links if not lk.local]
    local = [lk for lk in a.links if lk.local]
    return {
        "job": a.job,
        "window": {"first_step": a.first_step, "last_step": a.last_step, "steps": a.steps,
                   "workers": e.workers, "nodes": list(a.nodes), "wall_s": _f(e.wall_s), "step_s": _f(a.step_s)},
        "efficiency": {"load_balance": _f(e.load_balance), "communication": _f(e.communication),
                       "parallel": _f(e.parallel), "serialisation": _f(e.serialisation), "transfer": _f(e.transfer)},
        "speedup": {"workers": e.workers, "achieved": _f(s.achieved),
                    "lost_to_interconnect": _f(s.lost_to_interconnect), "lost_to_imbalance": _f(s.lost_to_imbalance),
                    "percent": {"achieved": _f(pct.achieved), "lost_to_interconnect": _f(pct.lost_to_interconnect),
                                "lost_to_imbalance": _f(pct.lost_to_imbalance)}},
        "layers": [
            {"name": name, "compute_s": _f(lay.compute_s[i]), "exchange_s": _f(lay.exchange_s[i]),
             "comm_fraction": _f(lay.comm_fraction[i]), "comm_fraction_worst": _f(lay.comm_fraction_worst[i]),
             "worst_rank": int(lay.worst_rank[i]), "comm_bound": bool(lay.comm_bound[i])}
            for i, name in enumerate(lay.names)],
        "comm_bound_threshold": lay.threshold,
        "links": [_link_json(lk) for lk in net],
        "ports": [{"node": p.node_name, "direction": p.direction, "capacity_Bps": _f(p.capacity_Bps),
                   "slow": p.slow, "reason": p.reason, "score": _f(p.score),
                   "explains": [list(pair) for pair in p.explains], "links": p.links, "lower_bound": p.lower_bound,
                   "nominal_Bps": _f(p.nominal_Bps), "nic_Bps": _f(p.nic_Bps), "nic_disagrees": p.nic_disagrees,
                   "shadowed_by": p.shadowed_by}
                  for p in a.ports],
        "local_links": [_link_json(lk) for lk in local],
        "stragglers": [{"rank": st.rank, "node": st.node, "compute_s": _f(st.compute_s), "score": _f(st.score)}
                       for st in a.stragglers],
        "alerts": [{"kind": al.kind, "subject": al.subject, "step_began": al.step_began,
                    "step_detected": al.step_detected, "baseline": _f(al.baseline), "recent": _f(al.recent),
                    "message": al.message, "port": al.port} for al in a.alerts],
        "recent_step_s": _f(a.recent_step_s),
        "remaining_steps": a.remaining_steps,
        "eta_s": _f(a.eta_s),
        "hours_at_stake": _f(a.hours_at_stake),
        "model": {"alpha_s": _f(a.model.alpha_s), "bandwidth_Bps": _f(a.model.beta_Bps),
                  "path_s": _f(a.model.path_s), "measured_step_s": _f(a.model.measured_s)},
        "whatif": [{"label": w.label, "bandwidth_x": w.bandwidth_x, "latency_div": w.latency_div,
                    "workers": w.workers, "step_s": _f(w.step_s), "speedup": _f(w.speedup)} for w in a.whatif],
        "serial_fraction": None if a.serial_fraction is None else [
            {"workers": int(p), "speedup": _f(sp), "serial_fraction": _f(ef)}
            for p, sp, ef in zip(a.serial_fraction.workers, a.serial_fraction.speedup,
                                 a.serial_fraction.serial_fraction, strict=True)],
        "how": {key: {"definition": d, "source": src} for key, (d, src) in HOW.items()},
    }


def _link_json(lk: LinkStats) -> dict[str, Any]:
    return {"src": lk.src_name, "dst": lk.dst_name, "class": lk.link_class, "bytes": lk.bytes,
            "transfers": lk.transfers, "bandwidth_Bps": _f(lk.bandwidth_Bps), "latency_s": _f(lk.latency_s),
            "throughput_Bps": _f(lk.throughput_Bps), "nominal_Bps": _f(lk.nominal_Bps),
            "utilisation": _f(lk.utilisation), "slow": lk.slow, "reason": lk.reason, "score": _f(lk.score),
            "hours_at_stake": _f(lk.hours_at_stake), "port": lk.port, "unexplained": lk.unexplained}


def compare(a: Analysis | dict[str, Any], b: Analysis | dict[str, Any]) -> dict[str, Any]:
    """What got slower from A to B: step time, efficiencies, layers by added exchange time, links by lost
    bandwidth, and slow links and stragglers new in B. Either side may be an ``Analysis`` or its JSON (so a
    saved report compares with a fresh one). Changes are B − A, ratios B / A; a missing figure gives None."""
    a = analysis_to_json(a) if isinstance(a, Analysis) else a
    b = analysis_to_json(b) if isinstance(b, Analysis) else b

    def change(x: float | None, y: float | None) -> dict[str, float | None]:
        return {"a": x, "b": y, "change": None if x is None or y is None else y - x,
                "ratio": None if x is None or y is None or x == 0 else y / x}

    layers_a = {lay["name"]: lay for lay in a["layers"]}
    layers = []
    for lay in b["layers"]:
        old = layers_a.get(lay["name"])
        if old is None:
            continue
        row = {"name": lay["name"], "exchange_s": change(old["exchange_s"], lay["exchange_s"]),
               "compute_s": change(old["compute_s"], lay["compute_s"]),
               "comm_fraction": change(old["comm_fraction"], lay["comm_fraction"])}
        layers.append(row)
    layers.sort(key=lambda r: -(r["exchange_s"]["change"] or 0.0))

    links_a = {(lk["src"], lk["dst"]): lk for lk in a["links"]}
    links = [{"src": lk["src"], "dst": lk["dst"],
              "bandwidth_Bps": change(links_a[key]["bandwidth_Bps"], lk["bandwidth_Bps"]),
              "throughput_Bps": change(links_a[key]["throughput_Bps"], lk["throughput_Bps"])}
             for lk in b["links"] if (key := (lk["src"], lk["dst"])) in links_a]
    links.sort(key=lambda r: r["bandwidth_Bps"]["ratio"] if r["bandwidth_Bps"]["ratio"] is not None else math.inf)

    slow_a = {(lk["src"], lk["dst"]) for lk in a["links"] if lk["slow"]}
    stragglers_a = {st["rank"] for st in a["stragglers"]}
    return {
        "step_s": change(a["window"]["step_s"], b["window"]["step_s"]),
        "efficiency": {k: change(a["efficiency"][k], v) for k, v in b["efficiency"].items()},
        "speedup": {k: change(a["speedup"][k], b["speedup"][k])
                    for k in ("workers", "achieved", "lost_to_interconnect", "lost_to_imbalance")},
        "layers": layers,
        "links": links,
        "new_slow_links": [{"src": lk["src"], "dst": lk["dst"], "reason": lk["reason"]} for lk in b["links"]
                           if lk["slow"] and (lk["src"], lk["dst"]) not in slow_a],
        "new_stragglers": [st for st in b["stragglers"] if st["rank"] not in stragglers_a],
    }
