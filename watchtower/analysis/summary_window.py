"""A window of per-step summaries and its figures: the full analysis's, from folded values.

``SummaryWindow`` keeps the newest steps' summaries (``summaries.fold``) with running exact sums; ``figures``
runs the full analysis's own functions (``aggregate``, ``efficiency``, ``links.judge_links``,
``ports.port_stats``, ``models.model_of``, ``cusum``) on merged sums and sketches: O(ranks × layers + links +
sketch entries), never O(transfers). ``as_analysis`` hands the result on as an ``Analysis``.
"""

from __future__ import annotations

from collections import deque
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from watchtower.analysis.aggregate import COMM_BOUND_THRESHOLD, LayerStats, WindowSums, layer_stats
from watchtower.analysis.checks import Checks, fit_checks
from watchtower.analysis.cusum import FALSE_ALERTS_PER_DAY, MIN_EFFECT, MIN_HOURS, WARMUP, Alert, Watch, watch_run
from watchtower.analysis.drilldown import WorstRanks, worst_of_sums
from watchtower.analysis.efficiency import Efficiency, Speedup, Straggler, find_stragglers, pop_efficiency
from watchtower.analysis.links import (
    MAX_FIT_TRANSFERS,
    SLOW_FRACTION,
    WAITS_KNOWN_QUANTILE,
    WAITS_UNKNOWN_QUANTILE,
    LinkStats,
    judge_links,
)
from watchtower.analysis.models import StepModel, eta_s, model_of
from watchtower.analysis.models import remaining_steps as _remaining
from watchtower.analysis.ports import PortStats, name_alert_ports, port_stats
from watchtower.analysis.robust import HockneyFit, fit_bins
from watchtower.analysis.sharing import level_of_bins
from watchtower.analysis.sketch import Sketches
from watchtower.analysis.summaries import (
    NODE_BITS,
    NS_PER_S,
    RANK_BITS,
    SIZE_BITS,
    HaloRows,
    LinkSums,
    Reference,
    Sparse,
    StepSummary,
    busy_items,
    collective_callers,
    unified_collectives,
    waits_key,
)
from watchtower.analysis.summary import (
    RECENT_STEPS,
    SCENARIOS,
    Analysis,
    Standing,
    WhatIf,
    _checked_rates,
    _Fixer,
    _standing,
    _with_checked,
    _with_stakes,
    what_ifs,
)
from watchtower.analysis.window import RunSeries, Window
from watchtower.cluster import Cluster


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
    watch: Watch | None  # what the charts found (alerts, recoveries, changes); None without the run's series
    fit_error: dict[tuple[str, str], FitError]  # by (src, dst) node names: how far α and β may be from exact
    reference: Reference  # the window's α and busy levels: fold new steps against it
    stale_steps: tuple[int, ...]  # fitted steps folded against another reference (β may be off)
    fit_steps: tuple[int, ...]
    standing: tuple[Standing, ...] = ()
    hours_at_stake: float | None = None  # the "slow links fixed" what-if's, over the remaining steps


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

    _links: _Running = field(default_factory=lambda: _Running(len(_LINK_COLUMNS)))  # every step's, by link
    _fit: deque[StepSummary] = field(default_factory=deque)  # the newest steps the link fit covers
    _fit_total: int = 0  # their transfers
    _raw: _Running = field(default_factory=lambda: _Running(0))  # sketch keys, weight = count
    _unshared: _Running = field(default_factory=lambda: _Running(0))
    _bin_bytes: _Running = field(default_factory=lambda: _Running(1))
    _busy: _Running = field(default_factory=lambda: _Running(1))
    _fit_links: _Running = field(default_factory=lambda: _Running(2))  # transfers, with known waits
    _waits: _Running = field(default_factory=lambda: _Running(1))  # by summaries.waits_key: Σ time per sender
    _halo: dict[int, tuple[np.ndarray, ...]] = field(default_factory=dict)  # by step: ``_halo_parts``
    _pushes: int = 0

    def push(self, summary: StepSummary) -> None:
        replaced = bool(self.summaries) and summary.step == self.summaries[-1].step
        if self.summaries and summary.step < self.summaries[-1].step:
            raise ValueError("steps arrive in order")
        if replaced:
            self._add(self.summaries.pop(), -1)
        self.summaries.append(summary)
        self._halo[summary.step] = _halo_parts(summary.halo_rows)
        self._add(summary, +1)
        self._enter(summary)
        while len(self.summaries) > self.capacity:
            old = self.summaries.popleft()
            del self._halo[old.step]
            self._add(old, -1)
            self._leave(old)
        self._pushes += 1
        if replaced or self._pushes % max(1, self.capacity) == 0:  # float sums: start afresh now and then
            self._rebuild()

    def _enter(self, s: StepSummary) -> None:
        """A new step: into the window's link sums and the fit (which then drops its oldest steps while it
        holds more than ``MAX_FIT_TRANSFERS`` transfers and more than one step, as ``links`` chooses them)."""
        self._links.add(s.links.link, np.column_stack([getattr(s.links, c) for c in _LINK_COLUMNS]), 1, +1)
        self._waits.add(s.waits.key, s.waits.value[:, None], 1, +1)
        self._fit.append(s)
        self._fit_total += s.transfers
        self._fit_add(s, +1)
        while self._fit_total > MAX_FIT_TRANSFERS and len(self._fit) > 1:
            old = self._fit.popleft()
            self._fit_total -= old.transfers
            self._fit_add(old, -1)

    def _leave(self, s: StepSummary) -> None:
        self._links.add(s.links.link, np.column_stack([getattr(s.links, c) for c in _LINK_COLUMNS]), 1, -1)
        self._waits.add(s.waits.key, s.waits.value[:, None], 1, -1)
        if self._fit and self._fit[0] is s:
            self._fit.popleft()
            self._fit_total -= s.transfers
            self._fit_add(s, -1)

    def _fit_add(self, s: StepSummary, sign: int) -> None:
        self._raw.add(s.raw_s.key, np.zeros((len(s.raw_s.key), 0)), s.raw_s.count, sign)
        self._unshared.add(s.unshared_s.key, np.zeros((len(s.unshared_s.key), 0)), s.unshared_s.count, sign)
        self._bin_bytes.add(s.bin_bytes.key, s.bin_bytes.value[:, None], 1, sign)
        self._busy.add(s.busy.key, s.busy.value[:, None], 1, sign)
        self._fit_links.add(s.links.link, np.column_stack([s.links.transfers, s.links.waits_known]), 1, sign)

    def _rebuild(self) -> None:
        steps = list(self.summaries)
        self._links, self._fit, self._fit_total = _Running(len(_LINK_COLUMNS)), deque(), 0
        self._waits = _Running(1)
        self._raw, self._unshared, self._bin_bytes = _Running(0), _Running(0), _Running(1)
        self._busy, self._fit_links = _Running(1), _Running(2)
        for step in steps:
            self._enter(step)

    def _link_figures(self, nodes: tuple[str, ...], cluster: Cluster, remaining: int | None,
                      slow_fraction: float, checks: Checks | None
                      ) -> tuple[tuple[LinkStats, ...], Reference, dict[tuple[str, str], FitError]]:
        """Link figures as ``links.link_stats`` computes them, from the running link sums and fit sketches, and
        the pair ``checks``' links the job's transfers do not cover (fitted from the checks themselves: the
        store keeps only each pair's newest few)."""
        n_nodes, window = len(nodes), self._links
        codes, n_links = window.key, len(window.key)
        accuracy = self.summaries[-1].raw_s.accuracy
        raw, unshared = self._raw.sketches(accuracy), self._unshared.sketches(accuracy)
        bin_bytes = self._bin_bytes.sparse()
        raw_bins = _bins(raw, bin_bytes, codes, WAITS_UNKNOWN_QUANTILE)
        alpha = np.nan_to_num(fit_bins(*raw_bins, n_links).alpha_s, nan=0.0)
        alpha_error, _ = _fit_error(raw_bins, n_links, accuracy)
        port, bins, seconds = busy_items(self._busy.sparse())
        reference = Reference(codes, alpha, level_of_bins(port, bins, seconds, 2 * n_nodes))
        fit_links = self._fit_links
        waits_known = np.zeros(n_links, bool)
        waits_known[np.searchsorted(codes, fit_links.key)] = fit_links.values[:, 1] >= 0.5 * fit_links.values[:, 0]
        fit, error = None, None
        for quantile, chosen in ((WAITS_UNKNOWN_QUANTILE, ~waits_known), (WAITS_KNOWN_QUANTILE, waits_known)):
            if chosen.any() or fit is None:
                bins_q = _bins(unshared, bin_bytes, codes, quantile)
                # A bin's time is off by the sketch's accuracy, plus whatever the raw α's own error moved it by
                # (the time less α is what sharing scales: at most |Δα|).
                rel = accuracy + alpha_error[bins_q[0]] / bins_q[2]
                fit_q, error_q = fit_bins(*bins_q, n_links), _fit_error(bins_q, n_links, rel)
                fit = fit_q if fit is None else fit.where(chosen, fit_q)
                error = error_q if error is None else tuple(np.where(chosen, q, e) for q, e in zip(error_q, error,
                                                                                                  strict=True))
        pairs = (codes >> NODE_BITS) * n_nodes + (codes & ((1 << NODE_BITS) - 1))
        column = {name: window.values[:, i] for i, name in enumerate(_LINK_COLUMNS)}
        worst = column["worst_receiver_s"]  # Σ over steps of each step's slowest receiver
        total_bytes, busy, count = column["bytes"], column["busy_s"], column["transfers"].astype(np.int64)
        period = None
        if checks is not None and len(checks):  # as links.link_stats: checked pairs after the job's own
            fits = fit_checks(checks, n_nodes)
            new = ~np.isin(fits.pairs, pairs)
            pairs = np.concatenate([pairs, fits.pairs[new]])
            fit = HockneyFit(*(np.concatenate([getattr(fit, f), getattr(fits.fit, f)[new]])
                               for f in ("alpha_s", "beta_Bps", "sizes", "clamped")))
            total_bytes = np.concatenate([total_bytes, fits.bytes[new]])
            busy = np.concatenate([busy, fits.busy_s[new]])
            count = np.concatenate([count, fits.count[new]])
            period = checks.period_s if np.isfinite(checks.period_s) else None
        links = judge_links(pairs, nodes, cluster, fit, total_bytes, busy, count, remaining,
                            lambda shrink: _padded(worst * shrink[:n_links] / len(self.summaries), len(pairs), 0.0),
                            n_job=n_links, check_every_s=period, slow_fraction=slow_fraction)
        src, dst = codes >> NODE_BITS, codes & ((1 << NODE_BITS) - 1)
        bounds = {(nodes[a], nodes[b]): FitError(float(ea), float(eb))
                  for a, b, ea, eb in zip(src.tolist(), dst.tolist(), *error, strict=True)}
        for pair in pairs[n_links:].tolist():  # checked links: fitted from the checks themselves, exactly
            bounds[nodes[pair // n_nodes], nodes[pair % n_nodes]] = FitError(0.0, 0.0)
        return links, reference, bounds

    def _waits_on(self, picked: np.ndarray) -> np.ndarray:
        """For each picked rank id [count, L] and its layer, the sender whose transfers into it took longest in
        all over the window (``drilldown._waits_on``: the lowest rank id among equals), −1 for none."""
        key, took = self._waits.key, self._waits.values[:, 0]
        want = (waits_key(np.arange(picked.shape[1])[None, :], picked, 0) >> RANK_BITS).ravel()  # (layer, rank)
        lo = np.searchsorted(key, want << RANK_BITS)  # keys are sorted: each cell's senders are one run
        length = np.searchsorted(key, (want + 1) << RANK_BITS) - lo
        out = np.full(len(want), -1, np.int64)
        if length.sum() == 0:
            return out.reshape(picked.shape)
        cell = np.repeat(np.arange(len(want)), length)
        at = np.arange(len(cell)) - np.repeat(np.cumsum(length) - length, length) + np.repeat(lo, length)
        best = np.lexsort((-took[at], cell))  # within a cell senders ascend: ties go to the lowest id
        first = best[np.r_[True, cell[best][1:] != cell[best][:-1]]]
        out[cell[first]] = key[at[first]] & ((1 << RANK_BITS) - 1)
        return out.reshape(picked.shape)

    def link_sums(self) -> LinkSums:
        """Every column of the window's link sums, extremes included (a merge over the steps: for drill-downs)."""
        return LinkSums.merged([s.links for s in self.summaries])

    def _add(self, s: StepSummary, sign: int) -> None:
        for r in s.ranks.tolist():
            self._rank_row.setdefault(r, len(self._rank_row))
        n_ranks, n_layers = len(self._rank_row), len(s.layers)
        if self._compute.shape[0] < n_layers or self._compute.shape[1] < n_ranks:
            shape = (n_layers, n_ranks)  # layers × ranks: what the figures reduce over ranks is contiguous
            self._compute, self._exchange = _grown(self._compute, shape), _grown(self._exchange, shape)
            self._reported = _grown(self._reported[:, None], (n_ranks, 1))[:, 0]
            self._node = _grown(self._node[:, None], (n_ranks, 1))[:, 0]
        rows = _rows(np.array([self._rank_row[r] for r in s.ranks.tolist()], np.int64))
        if sign > 0:
            self._node[rows] = s.rank_node
            self._compute[:n_layers, rows] += s.compute_ns.T
            self._exchange[:n_layers, rows] += s.exchange_ns.T
        else:
            self._compute[:n_layers, rows] -= s.compute_ns.T
            self._exchange[:n_layers, rows] -= s.exchange_ns.T
        self._reported[rows] += sign * np.isfinite(s.step_s)

    def figures(self, cluster: Cluster, *, threshold: float = COMM_BOUND_THRESHOLD,
                slow_fraction: float = SLOW_FRACTION, nic_Bps: np.ndarray | None = None,
                worst_count: int = 5, series: RunSeries | None = None, warmup: int = WARMUP,
                min_effect: float = MIN_EFFECT, min_hours: float = MIN_HOURS,
                false_alerts_per_day: float = FALSE_ALERTS_PER_DAY, checks: Checks | None = None) -> Figures:
        """The window's figures (see ``analysis.summary.analyse`` for each one's definition). With the run's
        ``series``, the run's watch too (alerts, recoveries, changes against the same bar), links watched over
        the window's fitted steps as ``analyse`` does with ``history`` = this window.

        ``checks`` are the node daemons' pair checks, as ``analyse`` takes them (the store keeps each pair's
        newest few): their links join the job's, and with ``series`` their rates are watched too."""
        steps = list(self.summaries)
        newest = steps[-1]
        layers, nodes = newest.layers, newest.nodes
        ranks = np.array(sorted(self._rank_row), np.int32)
        rows = _rows(np.array([self._rank_row[r] for r in ranks.tolist()], np.int64))
        frame = Window(layers, nodes, ranks, self._node[rows],
                       np.array([s.step for s in steps], np.int64), np.empty((0, len(ranks), len(layers))),
                       np.empty((0, len(ranks), len(layers))), np.empty((0, len(ranks))))
        n_layers = len(layers)
        compute = (self._compute[:n_layers, rows] / NS_PER_S).T  # [R, L] views of layer-major arrays
        exchange = (self._exchange[:n_layers, rows] / NS_PER_S).T
        path = np.stack([_padded(s.path_s, n_layers) for s in steps])
        wall = np.array([np.fmax.reduce(s.step_s) if len(s.step_s) else np.nan for s in steps])
        sums = WindowSums(compute, exchange, path, wall, self._reported[rows] > 0)
        eff = pop_efficiency(frame, sums)
        n_finite = int(np.count_nonzero(np.isfinite(wall)))
        last_step = steps[-1].step
        run_last = last_step if series is None or not len(series.steps) else max(last_step, int(series.steps[-1]))
        remaining = _remaining(cluster.total_steps, run_last)
        fit_steps = list(self._fit)
        links, reference, fit_error = self._link_figures(nodes, cluster, remaining, slow_fraction, checks)
        ports, links = port_stats(links, nodes, cluster, nic_Bps, slow_fraction=slow_fraction)
        bar = {"warmup": warmup, "remaining_steps": remaining, "min_effect": min_effect, "min_hours": min_hours,
               "false_alerts_per_day": false_alerts_per_day}
        watch = None if series is None else watch_run(
            series, nodes, links=_rate_series(steps, fit_steps, n_nodes=len(nodes)), **bar)
        checked = {(lk.src, lk.dst) for lk in links if lk.measured_by == "check"}
        rates = None if watch is None or not checked or checks is None else _checked_rates(checks, checked)
        if rates is not None:
            watch = _with_checked(watch, watch_run(series, nodes, links=rates, **bar))
        alerts = () if watch is None else name_alert_ports(watch.alerts, links)
        net = [lk for lk in links if not lk.local]
        model = model_of(eff, max(1, n_finite), _nanmedian([lk.latency_s for lk in net]),
                         _nanmedian([lk.bandwidth_Bps for lk in net]), _signatures(steps, max(1, n_finite)),
                         _halo_groups(steps, n_layers),
                         _halo_split([self._halo[s.step] for s in steps], n_layers, len(nodes)))
        # From here as ``analyse``: each slow link's stake, the run's, the standing findings, the what-if.
        fixer = _Fixer(model, links, ports, len(nodes), remaining)
        links = _with_stakes(fixer, links)
        net = [lk for lk in links if not lk.local]
        slow = [lk for lk in net if lk.slow]
        whatif = what_ifs(model, eff.workers, SCENARIOS)
        fixed_step = fixer.step_s(slow)
        hours = fixer.saved_hours(fixer.now, fixed_step)
        if eff.workers:
            whatif += (WhatIf("slow links fixed", 1.0, 1.0, eff.workers, fixed_step,
                              model.work_s / fixed_step if fixed_step > 0 else np.nan, True),)
        return Figures(
            first_step=steps[0].step, last_step=last_step, steps=len(steps), nodes=nodes, efficiency=eff,
            speedup=eff.speedup(), layers=layer_stats(frame, sums, threshold),
            worst=worst_of_sums(ranks, compute, exchange, n_finite, worst_count,
                                waits_on=lambda order: self._waits_on(ranks[order])),
            links=links, ports=ports,
            stragglers=find_stragglers(frame, eff), step_s=eff.wall_s / n_finite if n_finite else np.nan,
            step_wall_s=wall,
            model=model, whatif=whatif, alerts=alerts, watch=watch,
            fit_error=fit_error, reference=reference,
            stale_steps=tuple(s.step for s in fit_steps if not reference.same(s.reference)),
            fit_steps=tuple(s.step for s in fit_steps), standing=_standing(ports, net, alerts, fixer),
            hours_at_stake=hours)


def as_analysis(figures: Figures, cluster: Cluster, series: RunSeries | None = None,
                recent: int = RECENT_STEPS) -> Analysis:
    """The figures as the full analysis's ``Analysis`` (what ``analysis_to_json`` and the snapshot take), with
    the run-level figures ``analyse`` adds: recent step time and ETA."""
    last_step = figures.last_step
    if series is not None and len(series.steps):
        last_step = max(last_step, int(series.steps[-1]))
        recent_s = np.asarray(series.step_s[-recent:], np.float64)
    else:
        recent_s = figures.step_wall_s[-recent:]
    recent_s = recent_s[np.isfinite(recent_s)]
    recent_step_s = float(recent_s.mean()) if len(recent_s) else float("nan")
    remaining = _remaining(cluster.total_steps, last_step)
    return Analysis(job=cluster.name, first_step=figures.first_step, last_step=figures.last_step,
                    steps=figures.steps, nodes=figures.nodes, efficiency=figures.efficiency, speedup=figures.speedup,
                    layers=figures.layers, links=figures.links, ports=figures.ports, stragglers=figures.stragglers,
                    alerts=figures.alerts, recoveries=() if figures.watch is None else figures.watch.recoveries,
                    changes=() if figures.watch is None else figures.watch.changes, standing=figures.standing,
                    watch=figures.watch,
                    step_s=figures.step_s, recent_step_s=recent_step_s,
                    remaining_steps=remaining, eta_s=eta_s(remaining, recent_step_s),
                    hours_at_stake=figures.hours_at_stake,
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
    kinds, which = unified_collectives(steps)
    calls = np.bincount(which, weights=np.concatenate([s.collective_calls for s in steps]), minlength=len(kinds))
    ranks = np.bincount(collective_callers(steps, which)[:, 0], minlength=len(kinds))
    with np.errstate(invalid="ignore", divide="ignore"):
        return kinds[:, 0], kinds[:, 1], kinds[:, 2], calls / ranks / n_steps


def _halo_groups(steps: Sequence[StepSummary], n_layers: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``models._halo_groups`` from the steps' distinct halo rows: (step, layer) cell, messages, bytes."""
    cells = [i * max(1, n_layers) + s.halo[:, 0].astype(np.int64) for i, s in enumerate(steps)]
    rows = np.concatenate([s.halo for s in steps])
    return np.concatenate(cells), rows[:, 1], rows[:, 2]


def _halo_parts(h: HaloRows) -> tuple[np.ndarray, ...]:
    """One step's halo rows as ``_halo_split`` joins them: each group's layer, each row's group (from 0), link
    code, messages and bytes (worked out once, as the step enters the window)."""
    first = np.r_[True, h.group[1:] != h.group[:-1]] if len(h.group) else np.zeros(0, bool)
    return h.group[first] >> RANK_BITS, np.cumsum(first) - 1, h.link, h.msgs, h.bytes


def _halo_split(parts: Sequence[tuple[np.ndarray, ...]], n_layers: int, n_nodes: int) -> tuple[np.ndarray, ...]:
    """``models._halo_rows`` from the steps' ``_halo_parts``: each (step, layer, rank, side) group's cell, then
    per row its group, node pair code (src × nodes + dst), messages and bytes."""
    sizes = np.array([0] + [len(p[0]) for p in parts], np.int64)
    cells = [i * max(1, n_layers) + p[0] for i, p in enumerate(parts)]
    groups = [offset + p[1] for offset, p in zip(np.cumsum(sizes[:-1]).tolist(), parts, strict=True)]
    link = np.concatenate([np.zeros(0, np.int64), *(p[2] for p in parts)])
    return (np.concatenate([np.zeros(0, np.int64), *cells]), np.concatenate([np.zeros(0, np.int64), *groups]),
            (link >> NODE_BITS) * n_nodes + (link & ((1 << NODE_BITS) - 1)),
            np.concatenate([np.zeros(0), *(p[3] for p in parts)]),
            np.concatenate([np.zeros(0), *(p[4] for p in parts)]))


def _nanmedian(values: Sequence[float]) -> float:
    x = np.asarray(values, np.float64)
    x = x[np.isfinite(x)]
    return float(np.median(x)) if len(x) else float("nan")


_LINK_COLUMNS = ("bytes", "transfers", "busy_s", "worst_receiver_s")  # what adds up over a window's steps


class _Running:
    """Sums by sorted int64 key and the weight behind each (steps, or a sketch's counts), updated in place as
    parts enter and leave: O(entries) per step with no sort, so a snapshot reads merged state, never merges.
    A key leaves when its weight returns to 0. Each part's keys are unique (they come from one summary)."""

    def __init__(self, width: int) -> None:
        self.key = np.zeros(0, np.int64)
        self.values = np.zeros((0, width))
        self.weight = np.zeros(0, np.int64)

    def add(self, key: np.ndarray, values: np.ndarray, weight: np.ndarray | int, sign: int) -> None:
        weight = np.broadcast_to(np.asarray(weight, np.int64), key.shape)
        at = np.searchsorted(self.key, key)
        hit = at < len(self.key)
        hit[hit] = self.key[at[hit]] == key[hit]
        self.values[at[hit]] += sign * values[hit]
        self.weight[at[hit]] += sign * weight[hit]
        new = ~hit
        if new.any():
            if sign < 0:
                raise ValueError("only what entered can leave")
            self.key = np.insert(self.key, at[new], key[new])
            self.values = np.insert(self.values, at[new], values[new], axis=0)
            self.weight = np.insert(self.weight, at[new], weight[new])
        if sign < 0 and (gone := self.weight == 0).any():
            keep = ~gone
            self.key, self.values, self.weight = self.key[keep], self.values[keep], self.weight[keep]

    def sparse(self) -> Sparse:
        return Sparse(self.key, self.values[:, 0])

    def sketches(self, accuracy: float) -> Sketches:
        return Sketches(self.key, self.weight, accuracy)


def _rows(rows: np.ndarray) -> np.ndarray | slice:
    """Row positions as a slice when they are 0, 1, 2, … (ranks joined in id order, the usual case): views,
    no copies of the [L, R] sums."""
    return slice(0, len(rows)) if np.array_equal(rows, np.arange(len(rows))) else rows


def _padded(x: np.ndarray, n: int, fill: float = np.nan) -> np.ndarray:
    return x if len(x) == n else np.concatenate([x, np.full(n - len(x), fill)])


def _grown(array: np.ndarray, shape: tuple[int, ...]) -> np.ndarray:
    grown = np.zeros(shape, dtype=array.dtype)
    grown[tuple(slice(0, n) for n in array.shape)] = array
    return grown
