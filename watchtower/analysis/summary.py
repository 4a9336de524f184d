"""The whole analysis of a window: ``analyse`` → ``Analysis`` → ``analysis_to_json``; ``compare`` for A/B.

JSON holds only plain ints, floats, strings, booleans and None (NaN and infinities become None), so the
console, the report and any other reader get the same figures without numpy.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from watchtower.analysis.aggregate import COMM_BOUND_THRESHOLD, LayerStats, layer_stats, reduce_window
from watchtower.analysis.checks import Checks, check_rate_series
from watchtower.analysis.cusum import (
    FALSE_ALERTS_PER_DAY,
    K_FAST,
    K_SLOW,
    MIN_EFFECT,
    MIN_HOURS,
    WARMUP,
    Alert,
    Watch,
    chart_thresholds,
    watch_run,
)
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
    slow_fixed: bool = False  # every slow link at its class's median β instead (bandwidth_x etc. are 1)


@dataclass(frozen=True)
class Standing:
    """A fault present for the whole window (a slow port or a slow link no port explains), not a change:
    ``culprit`` the port to look at (None for a lone link), ``links`` the slow links it holds back and
    ``hours_at_stake`` what fixing it buys the rest of the run (None without a configured total)."""

    kind: str  # "slow-port" | "slow-link"
    subject: str
    culprit: str | None
    links: tuple[str, ...]
    hours_at_stake: float | None
    message: str
    hours_once_others_fixed: float | None = None  # what it holds back after every other slow link is fixed


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
    alerts: tuple[Alert, ...]  # open and closed, by onset
    recoveries: tuple[Alert, ...]
    changes: tuple[Alert, ...]  # lasting changes below the bar worth an alert
    standing: tuple[Standing, ...]
    watch: Watch | None
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
            nic_Bps: np.ndarray | None = None, history: Window | None = None,
            min_effect: float = MIN_EFFECT, min_hours: float = MIN_HOURS,
            false_alerts_per_day: float = FALSE_ALERTS_PER_DAY, checks: Checks | None = None) -> Analysis:
    """Analyse a window (and the run's series, when there is one) against the cluster's configuration.

    ``runs`` are (p, S) of earlier runs at other sizes, for the Karp–Flatt serial fraction; this window's
    (p, S) is added to them (no serial fraction while all runs have one size). ``scenarios`` are
    (label, bandwidth ×, latency ÷, ranks ×) what-ifs. ``nic_Bps`` (float64 [N, 2], NaN: unknown) is each
    window node's NIC-counter rate out and in, the second witness of port capacity. ``history`` is every
    step the caller still holds in full: when given, link degradation is watched on its transfers with the
    port sharing taken out (``links.link_rate_series``), else on ``series``. ``min_effect`` and
    ``min_hours`` set the bar an alert must clear (see ``cusum.watch_run``). ``checks`` are the node
    daemons' pair checks: they measure the network links the job's own transfers do not (``link_stats``),
    and those links' check rates are watched for degradation like the job's, against the same bar.
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

    links = link_stats(window, cluster, remaining, slow_fraction=slow_fraction, checks=checks)
    ports, links = port_stats(links, window.nodes, cluster, nic_Bps, slow_fraction=slow_fraction)
    link_rates = None if history is None else link_rate_series(history, cluster)
    bar = {"warmup": warmup, "remaining_steps": remaining, "min_effect": min_effect, "min_hours": min_hours,
           "false_alerts_per_day": false_alerts_per_day}
    watch = None if series is None else watch_run(series, window.nodes, links=link_rates, **bar)
    checked = {(lk.src, lk.dst) for lk in links if lk.measured_by == "check"}
    rates = None if watch is None or not checked or checks is None else _checked_rates(checks, checked)
    if rates is not None:
        watch = _with_checked(watch, watch_run(series, window.nodes, links=rates, **bar))
    net = [lk for lk in links if not lk.local]
    model = step_model(window, eff, _nanmedian([lk.latency_s for lk in net]),
                       _nanmedian([lk.bandwidth_Bps for lk in net]))
    fixer = _Fixer(model, links, ports, len(window.nodes), remaining)
    links = _with_stakes(fixer, links)
    net = [lk for lk in links if not lk.local]
    fixed_step = fixer.step_s([lk for lk in net if lk.slow])
    at_stake = fixer.saved_hours(fixer.now, fixed_step)
    whatif = what_ifs(model, eff.workers, scenarios)
    if eff.workers:
        speedup_fixed = model.work_s / fixed_step if fixed_step > 0 else math.nan
        whatif += (WhatIf("slow links fixed", 1.0, 1.0, eff.workers, fixed_step, speedup_fixed, True),)
    alerts = () if watch is None else name_alert_ports(watch.alerts, links)
    serial = None
    if len({p for p, _ in runs} | {eff.workers}) >= 2 and eff.workers >= 2 and speedup.achieved > 0:
        serial = serial_fractions([*runs, (eff.workers, speedup.achieved)])
    return Analysis(
        job=cluster.name,
        first_step=int(window.steps[0]) if len(window.steps) else -1,
        last_step=int(window.steps[-1]) if len(window.steps) else -1,
        steps=len(window.steps), nodes=window.nodes, efficiency=eff, speedup=speedup,
        layers=layer_stats(window, sums, threshold), links=links, ports=ports,
        stragglers=find_stragglers(window, eff), alerts=alerts,
        recoveries=() if watch is None else watch.recoveries, changes=() if watch is None else watch.changes,
        standing=_standing(ports, net, alerts, fixer), watch=watch,
        step_s=step_s, recent_step_s=recent_step_s, remaining_steps=remaining,
        eta_s=eta_s(remaining, recent_step_s), hours_at_stake=at_stake, model=model, whatif=whatif,
        serial_fraction=serial,
    )


def _with_checked(watch: Watch, checked: Watch) -> Watch:
    """The job's watch plus what the pair checks' rates showed on the links only checks measure (their
    step-time findings are the job's own, already in ``watch``)."""
    def links_only(found: tuple[Alert, ...], more: tuple[Alert, ...]) -> tuple[Alert, ...]:
        both = found + tuple(al for al in more if al.subject != "step time")
        return tuple(sorted(both, key=lambda al: (al.step_began, al.kind, al.subject)))

    return replace(watch, alerts=links_only(watch.alerts, checked.alerts),
                   recoveries=links_only(watch.recoveries, checked.recoveries),
                   changes=links_only(watch.changes, checked.changes),
                   n_series=watch.n_series + checked.n_series - 1)


class _Fixer:
    """Predicted step times with chosen slow links at their class's median β (α unchanged), through the
    step model with every node pair at its own α and β: the measured step less the modelled communication
    as measured plus the modelled communication then (``StepModel.links_comm_s``).

    Fixing a slow port also frees the links whose TCP acknowledgements cross it (RFC 9293: a flow into a
    node is acknowledged through that node's way out, so a choked way out slows the flows coming in, and a
    choked way in the flows going out): with every slow link through the port fixed, those links are raised
    to their class's median too. They are no healthy reference either, so the median leaves them out."""

    def __init__(self, model: StepModel, links: tuple[LinkStats, ...], ports: tuple[PortStats, ...], n_nodes: int,
                 remaining: int | None) -> None:
        self.model, self.n, self.remaining = model, n_nodes, remaining
        self.alpha = np.zeros(n_nodes * n_nodes)
        self.beta = np.full(n_nodes * n_nodes, np.inf)
        net = [lk for lk in links if not lk.local]
        slow_ports = [p for p in ports if p.slow]
        # Per slow port: the slow links it explains (fixing all of them fixes the port) and the links whose
        # acknowledgements it carries (into its node for a way out, out of its node for a way in).
        self.port_links = {p.name: {(lk.src, lk.dst) for lk in net if lk.slow and (lk.port or "").split(" (")[0]
                                    == p.name} for p in slow_ports}
        self.acked = {p.name: [lk.src * n_nodes + lk.dst for lk in net if not lk.slow and
                               (lk.dst if p.direction == "out" else lk.src) == p.node] for p in slow_ports}
        behind = {code for codes in self.acked.values() for code in codes}
        # The class's healthy links set the rate to reach: in a small class the slow links themselves
        # would pull a median over all of it down (in a 4-node ring one bad node is on half the links).
        median = {cls: _nanmedian([lk.bandwidth_Bps for lk in net if lk.link_class == cls and not lk.slow
                                   and lk.src * n_nodes + lk.dst not in behind]
                                  or [lk.bandwidth_Bps for lk in net if lk.link_class == cls and not lk.slow]
                                  or [lk.bandwidth_Bps for lk in net if lk.link_class == cls])
                  for cls in {lk.link_class for lk in net}}
        self.better = self.beta.copy()
        for lk in net:
            code = lk.src * n_nodes + lk.dst
            self.alpha[code] = lk.latency_s if np.isfinite(lk.latency_s) else 0.0
            if np.isfinite(lk.bandwidth_Bps) and lk.bandwidth_Bps > 0:
                self.beta[code] = lk.bandwidth_Bps
            self.better[code] = np.fmax(self.beta[code], median[lk.link_class])
        self.comm_now = model.links_comm_s(self.alpha, self.beta)
        self.now = max(model.path_s, model.measured_s)  # nothing fixed: the model's communication as measured

    def beta_with(self, fixed: list[LinkStats]) -> np.ndarray:
        """Every node pair's β with the links ``fixed`` at their class's healthy median β, and the links a
        port held back through their acknowledgements once every slow link through that port is fixed."""
        beta = self.beta.copy()
        pairs = {(lk.src, lk.dst) for lk in fixed}
        codes = [lk.src * self.n + lk.dst for lk in fixed]
        codes += [code for port, held in self.port_links.items() if held and held <= pairs for code in self.acked[port]]
        beta[codes] = self.better[codes]
        return beta

    def step_s(self, fixed: list[LinkStats]) -> float:
        """The step time with the links ``fixed`` at their class's healthy median β."""
        if not fixed:
            return self.now
        m = self.model
        return max(m.path_s, m.measured_s + (m.links_comm_s(self.alpha, self.beta_with(fixed)) - self.comm_now))

    def saved_hours(self, before_s: float, after_s: float) -> float | None:
        """DESIGN §3: remaining steps × (predicted step time before − after a fix); None without a total."""
        if self.remaining is None:
            return None
        return self.remaining * max(0.0, before_s - after_s) / 3600.0

    def hours(self, fixed: list[LinkStats]) -> float | None:
        """The hours at stake on ``fixed``: from the step time now to the one with them at the median."""
        return self.saved_hours(self.now, self.step_s(fixed))


def _checked_rates(checks: Checks, checked: set[tuple[int, int]]) -> RunSeries | None:
    """The pair checks' rate series of the links only checks measure (as ``analyse`` watches them)."""
    rates = check_rate_series(checks)
    keep = [j for j, pair in enumerate(rates.links) if pair in checked]
    if not keep:
        return None
    return replace(rates, links=tuple(rates.links[j] for j in keep), link_bytes=rates.link_bytes[:, keep],
                   link_transfer_s=rates.link_transfer_s[:, keep],
                   link_watch_Bps=None if rates.link_watch_Bps is None else rates.link_watch_Bps[:, keep])


def _with_stakes(fixer: _Fixer, links: tuple[LinkStats, ...]) -> tuple[LinkStats, ...]:
    """Each slow network link with its own hours at stake (that link alone at the median β)."""
    out = []
    for lk in links:
        if lk.local or not lk.slow:
            out.append(lk)
            continue
        alone = fixer.step_s([lk])
        out.append(replace(lk, saving_per_step_s=max(0.0, fixer.now - alone),
                           hours_at_stake=fixer.saved_hours(fixer.now, alone)))
    return tuple(out)


def _standing(ports: tuple[PortStats, ...], net: list[LinkStats], alerts: tuple[Alert, ...],
              fixer: _Fixer) -> tuple[Standing, ...]:
    """Slow ports, then slow links no port explains, that no change alert already covers (a port or link
    that changed during the run is its alert's business), costliest first. A port's stake is what fixing
    all the links it holds back buys at once."""
    changed = {al.subject for al in alerts} | {(al.port or "").split(" (")[0] for al in alerts if al.port}
    every_slow = [lk for lk in net if lk.slow]
    all_fixed = fixer.step_s(every_slow) if fixer.remaining is not None else None

    def once_others_fixed(held: list[LinkStats]) -> float | None:
        """Two faults on one critical path hide each other: fixing either alone buys nothing while the other
        holds the step, so each is also priced as the last one standing."""
        if all_fixed is None:
            return None
        return fixer.saved_hours(fixer.step_s([lk for lk in every_slow if lk not in held]), all_fixed)

    by_pair = {(lk.src_name, lk.dst_name): lk for lk in net}
    found = []
    slow = [p for p in ports if p.slow and p.name not in changed]
    for node in dict.fromkeys(p.node_name for p in slow):
        # Both ways of one node slow (a card at a lower rate): one finding, fixed together, or neither
        # direction's fix would show while the other still held the node's exchanges back.
        mine = [p for p in slow if p.node_name == node]
        held = [by_pair[pair] for p in mine for pair in p.explains if pair in by_pair]
        subject = mine[0].name if len(mine) == 1 else f"{node} out and in"
        names = tuple(f"{lk.src_name}→{lk.dst_name}" for lk in held)
        rates = " and ".join(f"{p.direction} {p.capacity_Bps / 1e9:.3g} GB/s" for p in mine)
        found.append(Standing("slow-port", subject, subject, names, fixer.hours(held),
                              f"{node} {rates} ({', '.join(dict.fromkeys(p.reason for p in mine))}) for the whole "
                              f"window, holding back {len(names)} link{'s' * (len(names) != 1)}",
                              once_others_fixed(held)))
    for lk in net:
        subject = f"{lk.src_name}→{lk.dst_name}"
        if lk.slow and lk.port is None and subject not in changed:
            found.append(Standing("slow-link", subject, None, (subject,), lk.hours_at_stake,
                                  f"link {subject} runs at {lk.bandwidth_Bps / 1e9:.3g} GB/s ({lk.reason}) for the "
                                  "whole window; no slow port explains it", once_others_fixed([lk])))
    found.sort(key=lambda f: (-(f.hours_at_stake or 0.0), -(f.hours_once_others_fixed or 0.0)))
    return tuple(found)


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


def _threshold_how() -> str:
    """The false-alarm budget worked through for two job sizes, from the same functions the charts use."""
    parts = []
    for links in (8, 1024):
        arl, h_fast, h_slow = chart_thresholds(1 + links)
        parts.append(f"{1 + links} series (step time + {links} links): ARL ≥ 4 × {1 + links} × 86,400 = "
                     f"{arl:,.0f} → h = {h_fast:.2f}σ (k = 1), {h_slow:.2f}σ (k = 0.5)")
    return ("each of the 4 charts of each series needs an in-control ARL ≥ 4 × series × 86,400 steps (one step per "
            "second, under 1 false alert a day for the whole job); h solves Siegmund's ARL = (e^(2kb) − 2kb − "
            "1)/(2k²), b = h + 1.166, for it: " + "; ".join(parts) + ".")


_THRESHOLD_HOW = _threshold_how()
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
    "layers.per_step": ("compute and exchange per step: the window's sums / the window's steps with a report, on "
                        "the mean rank and on the worst rank (the rank with the most of it)", "plain mean"),
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
    "links.measured_by": ("\"job\": fitted on the job's own point-to-point transfers; \"check\": on the node "
                          "daemons' pair checks (one small and one large message per check, timed until "
                          "acknowledged, so α is a round trip), for network pairs the job's transfers do not "
                          "cover; judged by the same rules, no hours at stake; check_every_s: the period within "
                          "which every ordered pair is checked", "definition; Hockney (1994)"),
    "links.latency_s": ("α of t(n) = α + n/β (none when only one message size was seen); latency_clamped when "
                        "the fitted line crossed zero below the origin: α is then too small to tell from timer "
                        "noise and is taken as 0, not measured as 0", "Hockney (1994)"),
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
    "links.of_nominal": ("throughput / nominal rate (lower of the two NICs): the share of the rate on paper that "
                         "the pair's flows got while moving bytes", "plain ratio; throughput as links.throughput_Bps"),
    "links.score": ("modified z-score 0.6745 (x − median) / MAD of log β among links of the same class",
                    "Iglewicz & Hoaglin (1993)"),
    "links.slow": ("score < −3.5 or β under a third of its class's median (outlier), β below the set fraction "
                   "(default 0.5) of nominal (below-nominal), or running at a slow port's capacity (slow port)",
                   "Iglewicz & Hoaglin (1993); third and fraction: common practice, no source"),
    "links.hours_at_stake": ("slow links: remaining steps × (predicted step time now − predicted step time with "
                             "this link alone at the median β of its class's links not judged slow), both through the "
                             "step model with every node pair at its own α and β (see whatif.slow_fixed); 0 for "
                             "links not slow",
                             "DESIGN §3; Hockney (1994)"),
    "stragglers": ("ranks whose modified z-score of log compute exceeds +3.5", "Iglewicz & Hoaglin (1993)"),
    "alerts": ("robust per-step CUSUM (Page 1954; tabular form, Montgomery SQC) on log step time (rises) and "
               "each link's log per-step median rate with port sharing taken out (falls; see links.concurrency); "
               "μ0, σ = median, 1.4826·MAD (scipy's scale='normal') of the in-control period: the first 40 "
               "points, then every point since the last change (newest 400), σ × (1 + 1/√n) for n points "
               "(σ ≥ 1 %, ≤ 25 % for a link); points clipped to ±4σ; per series four one-sided charts, fast "
               "k = 1σ and patient k = 0.5σ (after 200 in-control points) each way; an alarm counts when the "
               "next point is still past k; began = least-squares change point; after a change the level is "
               "re-learned from 8 points and the charts re-armed at h/2 (fast initial response, Lucas & "
               "Crosier 1982). Threshold: " + _THRESHOLD_HOW + " An alert needs a step-time change of ≥ 10 % or "
               "≥ 1 h at stake (cluster file / flags), and for a link a fall of ≥ 40 % of its rate; smaller "
               "lasting changes are listed under changes. A return nearer the old level than the degraded one "
               "closes the alert with a recovery. port: the one explaining the link, else the sender's way "
               "out when all its links dropped, else the receiver's way in likewise",
               "Page (1954); Montgomery, SQC; Siegmund (1985); Lucas & Crosier (1982); Hawkins (1987, "
               "self-starting); clip, 10 %, 1 h, 40 %, 400, 200: common practice, no source"),
    "standing": ("slow ports, then slow links no port explains, for the whole window and not covered by a change "
                 "alert; stake = Σ hours at stake of the links they hold back", "definition; see ports.slow"),
    "eta_s": ("remaining steps × mean step time of the recent steps", "plain product"),
    "hours_at_stake": ("remaining steps × (predicted step time now − predicted step time with every slow link at "
                       "its class's healthy median β): the 'slow links fixed' what-if", "DESIGN §3; model above"),
    "whatif": ("compute path × p/p' + unexplained time + modelled collectives (cheapest of ring, recursive "
               "doubling, Rabenseifner) and halo exchange (max over ranks of Σ α + n/β)",
               "Thakur, Rabenseifner & Gropp (2005); Patarasuk & Yuan (2009)"),
    "whatif.slow_fixed": ("measured step − modelled communication with each node pair at its own α, β + the same "
                          "with every slow link's β raised to the median of its class's links not judged slow (nor "
                          "held back by a slow port's acknowledgements); a slow port fixed also raises the links "
                          "whose acknowledgements cross it (into its node for a way out, out of it for a way in); "
                          "halo messages at their pair's α + n/β, summed per rank over what it receives and, "
                          "apart, what it sends (a shared way out sends one after another), the layer waiting "
                          "for the busiest; collectives at the fleet α and the slowest pair's β",
                          "Hockney (1994); Patarasuk & Yuan (2009)"),
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
             "worst_rank": int(lay.worst_rank[i]), "comm_bound": bool(lay.comm_bound[i]),
             "per_step": {"compute_s": _f(lay.step_compute_s[i]), "exchange_s": _f(lay.step_exchange_s[i]),
                          "compute_worst_s": _f(lay.step_compute_worst_s[i]),
                          "exchange_worst_s": _f(lay.step_exchange_worst_s[i])}}
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
        "alerts": [_alert_json(al) for al in a.alerts],
        "recoveries": [_alert_json(al) for al in a.recoveries],
        "changes": [{**_alert_json(al), "open": False} for al in a.changes],
        "standing": [{"kind": f.kind, "subject": f.subject, "culprit": f.culprit, "links": list(f.links),
                      "hours_at_stake": _f(f.hours_at_stake), "hours_once_others_fixed": _f(f.hours_once_others_fixed),
                      "message": f.message} for f in a.standing],
        "alert_design": None if a.watch is None else {
            "series": a.watch.n_series, "chart_arl": _f(a.watch.arl), "h_fast": _f(a.watch.h_fast),
            "h_slow": _f(a.watch.h_slow), "k_fast": K_FAST, "k_slow": K_SLOW},
        "recent_step_s": _f(a.recent_step_s),
        "remaining_steps": a.remaining_steps,
        "eta_s": _f(a.eta_s),
        "hours_at_stake": _f(a.hours_at_stake),
        "model": {"alpha_s": _f(a.model.alpha_s), "bandwidth_Bps": _f(a.model.beta_Bps),
                  "path_s": _f(a.model.path_s), "measured_step_s": _f(a.model.measured_s)},
        "whatif": [{"label": w.label, "bandwidth_x": w.bandwidth_x, "latency_div": w.latency_div,
                    "workers": w.workers, "step_s": _f(w.step_s), "speedup": _f(w.speedup),
                    "slow_fixed": w.slow_fixed} for w in a.whatif],
        "serial_fraction": None if a.serial_fraction is None else [
            {"workers": int(p), "speedup": _f(sp), "serial_fraction": _f(ef)}
            for p, sp, ef in zip(a.serial_fraction.workers, a.serial_fraction.speedup,
                                 a.serial_fraction.serial_fraction, strict=True)],
        "how": {key: {"definition": d, "source": src} for key, (d, src) in HOW.items()},
    }


def _alert_json(al: Alert) -> dict[str, Any]:
    return {"kind": al.kind, "subject": al.subject, "step_began": al.step_began, "step_detected": al.step_detected,
            "step_closed": al.step_closed, "open": al.step_closed is None and al.kind != "recovered",
            "baseline": _f(al.baseline), "recent": _f(al.recent), "effect": _f(al.effect),
            "hours_at_stake": _f(al.hours_at_stake), "message": al.message, "port": al.port}


def _link_json(lk: LinkStats) -> dict[str, Any]:
    return {"src": lk.src_name, "dst": lk.dst_name, "class": lk.link_class, "bytes": lk.bytes,
            "transfers": lk.transfers, "bandwidth_Bps": _f(lk.bandwidth_Bps), "latency_s": _f(lk.latency_s),
            "latency_clamped": lk.latency_clamped, "throughput_Bps": _f(lk.throughput_Bps),
            "nominal_Bps": _f(lk.nominal_Bps), "of_nominal": _f(lk.of_nominal), "slow": lk.slow, "reason": lk.reason,
            "score": _f(lk.score),
            "hours_at_stake": _f(lk.hours_at_stake), "port": lk.port, "unexplained": lk.unexplained,
            "measured_by": lk.measured_by, "check_every_s": _f(lk.check_every_s)}


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
