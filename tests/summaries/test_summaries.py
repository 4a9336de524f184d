"""The summary path against the full analysis (``analyse`` on the raw window) on real recordings.

Sums must agree to relative 1e-9. Link β and α come from quantile sketches: each must lie within twice the
first-order error bound the summary path states for it (``Figures.fit_error``, propagated from the sketch's
relative accuracy, DDSketch: Masson, Rim & Lee, 2019); the factor 2 covers the second-order terms.
Figures that follow from β (scores, ports' capacities, the savings of links not judged slow) get the bound
carried through their formulas; verdicts (slow, reason, port) must be identical. Whatever the summary path
would not provide (docs/snapshot.md, "Figures from per-step summaries") is skipped by name, with the reason,
in ``NOT_FROM_SUMMARIES``: now empty.
"""

from __future__ import annotations

import math
import re
from dataclasses import replace

import numpy as np
import pytest

from tests.summaries.conftest import Folded, Recorded
from watchtower.analysis import Analysis, RunSeries, analyse, analysis_to_json, hockney_lstsq
from watchtower.analysis.checks import Checks
from watchtower.analysis.drilldown import worst_ranks
from watchtower.analysis.efficiency import RELATIVE_JITTER
from watchtower.analysis.links import LinkStats
from watchtower.analysis.summary import _Fixer
from watchtower.analysis.summary_window import Figures, SummaryWindow, as_analysis

EXACT = 1e-9
# Keys of ``analysis_to_json`` the summary path does not provide, and why (docs/snapshot.md): none left. (The
# lasting changes below the alert bar, the last entry, follow since both paths read ports' busy levels on one
# fixed grid, ``sharing.busy_bins``.)
NOT_FROM_SUMMARIES: dict[str, str] = {}


def summary_figures(rec: Recorded, folded: Folded, series: RunSeries | None = None,
                    checks: Checks | None = None) -> Figures:
    """The figures of the steps folded against the window's reference (as collect converges)."""
    return _window_of(folded.converged, len(rec.window.steps)).figures(rec.cluster, series=series, checks=checks)


def _series(rec: Recorded) -> RunSeries:
    """The run's per-step series as the store keeps it."""
    return rec.series


def _window_of(summaries: list, capacity: int) -> SummaryWindow:
    window = SummaryWindow(capacity)
    for s in summaries:
        window.push(s)
    return window


@pytest.fixture(scope="module")
def both(recorded: Recorded, folded: Folded) -> tuple[Analysis, Figures]:
    """Both paths on one window; with a configured total of steps (the namespace run has none), so that hours
    at stake are worked out."""
    if recorded.cluster.total_steps is None:
        recorded = replace(recorded, cluster=replace(recorded.cluster, total_steps=10 * len(recorded.window.steps)))
    return analyse(recorded.window, None, recorded.cluster), summary_figures(recorded, folded)


def close(a: float, b: float, rel: float = EXACT) -> bool:
    return (math.isnan(a) and math.isnan(b)) or abs(a - b) <= rel * max(abs(a), abs(b), 1e-300)


def test_the_recordings_have_what_the_comparison_needs(recorded: Recorded) -> None:
    """Several steps, network links, and for the fit more than one step's transfers."""
    assert len(recorded.window.steps) >= 10
    assert len(recorded.window.transfers) > 0
    assert len(set(recorded.window.rank_node.tolist())) >= 4


def test_window_efficiency_and_speedup_are_exact(both: tuple[Analysis, Figures]) -> None:
    full, mine = both
    assert mine.steps == full.steps and mine.first_step == full.first_step and mine.last_step == full.last_step
    for name in ("wall_s", "ideal_s", "load_balance", "communication", "parallel", "serialisation", "transfer"):
        assert close(getattr(full.efficiency, name), getattr(mine.efficiency, name)), name
    np.testing.assert_array_equal(full.efficiency.ranks, mine.efficiency.ranks)
    np.testing.assert_allclose(mine.efficiency.useful_s, full.efficiency.useful_s, rtol=EXACT)
    for name in ("workers", "achieved", "lost_to_interconnect", "lost_to_imbalance"):
        assert close(getattr(full.speedup, name), getattr(mine.speedup, name)), name
    assert close(full.step_s, mine.step_s)


def test_layers_and_their_worst_ranks_are_exact(recorded: Recorded, both: tuple[Analysis, Figures]) -> None:
    full, mine = both
    for name in ("compute_s", "exchange_s", "comm_fraction", "comm_fraction_worst"):
        np.testing.assert_allclose(getattr(mine.layers, name), getattr(full.layers, name), rtol=EXACT, err_msg=name)
    np.testing.assert_array_equal(mine.layers.worst_rank, full.layers.worst_rank)
    np.testing.assert_array_equal(mine.layers.comm_bound, full.layers.comm_bound)
    drill = worst_ranks(recorded.window)
    np.testing.assert_allclose(mine.worst.comm_fraction, drill.comm_fraction, rtol=EXACT)
    np.testing.assert_allclose(mine.worst.exchange_s, drill.exchange_s, rtol=EXACT)
    np.testing.assert_array_equal(mine.worst.rank, drill.rank)
    np.testing.assert_array_equal(mine.worst.waits_on, drill.waits_on)  # summed per (layer, receiver, sender)
    assert (drill.waits_on >= 0).any()


def test_stragglers_are_exact(both: tuple[Analysis, Figures]) -> None:
    full, mine = both
    assert [(s.rank, s.node) for s in mine.stragglers] == [(s.rank, s.node) for s in full.stragglers]
    for a, b in zip(full.stragglers, mine.stragglers, strict=True):
        assert close(a.compute_s, b.compute_s) and close(a.score, b.score, 1e-6)


def test_link_sums_are_exact(both: tuple[Analysis, Figures]) -> None:
    full, mine = both
    assert [(lk.src_name, lk.dst_name, lk.link_class, lk.local) for lk in mine.links] == \
        [(lk.src_name, lk.dst_name, lk.link_class, lk.local) for lk in full.links]
    for a, b in zip(full.links, mine.links, strict=True):
        assert (a.bytes, a.transfers) == (b.bytes, b.transfers)
        assert close(a.busy_s, b.busy_s) and close(a.throughput_Bps, b.throughput_Bps)
        assert a.nominal_Bps == b.nominal_Bps
        assert (a.of_nominal is None) == (b.of_nominal is None)
        assert a.of_nominal is None or close(a.of_nominal, b.of_nominal)
        assert (a.measured_by, b.measured_by) == ("job", "job")


def test_link_fit_is_within_the_stated_sketch_bound(both: tuple[Analysis, Figures]) -> None:
    full, mine = both
    assert mine.stale_steps == ()
    for a, b in zip(full.links, mine.links, strict=True):
        bound = mine.fit_error[a.src_name, a.dst_name]
        assert 0 < bound.bandwidth_rel < 0.02  # the bound itself is small: a sketch of accuracy 0.1 %
        assert abs(b.bandwidth_Bps / a.bandwidth_Bps - 1) <= 2 * bound.bandwidth_rel, (a.src_name, a.dst_name)
        if math.isnan(a.latency_s):
            assert math.isnan(b.latency_s)
        else:
            assert abs(b.latency_s - a.latency_s) <= 2 * bound.latency_s + 1e-12, (a.src_name, a.dst_name)


def _class_bound(full: Analysis, mine: Figures, link_class: str) -> float:
    return max(mine.fit_error[lk.src_name, lk.dst_name].bandwidth_rel for lk in full.links
               if lk.link_class == link_class and not lk.local)


def test_verdicts_scores_and_hours_follow_the_bound(both: tuple[Analysis, Figures]) -> None:
    """A modified z-score of log β moves by at most 2D(1 + |z|)/σ when every log β of its class moves by at
    most D (median by D, MAD by 2D; σ ≥ the 0.02 floor); a saving W(1 − β/β_med) by W(β/β_med)·2(δ + D)."""
    full, mine = both
    for a, b in zip(full.links, mine.links, strict=True):
        assert (a.slow, a.reason, a.port, a.unexplained) == (b.slow, b.reason, b.port, b.unexplained)
        if a.local:
            continue
        if a.latency_clamped != b.latency_clamped:  # the fitted intercept's sign: only where α is 0 within its bound
            assert max(a.latency_s, b.latency_s) <= 2 * mine.fit_error[a.src_name, a.dst_name].latency_s + 1e-12
        d = 2 * _class_bound(full, mine, a.link_class)
        assert abs(a.score - b.score) <= 2 * 2 * d * (1 + abs(a.score)) / RELATIVE_JITTER, (a.src_name, a.dst_name)
        if a.slow:  # a slow link's stake: through the step model, test_hours_at_stake_follow_the_bound
            continue
        if a.saving_per_step_s > 0:
            peers = [lk.bandwidth_Bps for lk in full.links if lk.link_class == a.link_class and not lk.local]
            ratio = a.bandwidth_Bps / float(np.median(peers))
            delta = 2 * (mine.fit_error[a.src_name, a.dst_name].bandwidth_rel + d)
            assert abs(b.saving_per_step_s / a.saving_per_step_s - 1) <= 2 * ratio * delta / (1 - ratio)
        else:
            assert b.saving_per_step_s == 0


def test_ports_follow_their_links(both: tuple[Analysis, Figures]) -> None:
    full, mine = both
    assert [(p.name, p.links, p.slow, p.reason, p.lower_bound, p.explains, p.shadowed_by) for p in mine.ports] == \
        [(p.name, p.links, p.slow, p.reason, p.lower_bound, p.explains, p.shadowed_by) for p in full.ports]
    worst = max(e.bandwidth_rel for e in mine.fit_error.values())
    for a, b in zip(full.ports, mine.ports, strict=True):
        assert abs(b.capacity_Bps / a.capacity_Bps - 1) <= 2 * worst


def test_the_summaries_plain_fit_is_least_squares(recorded: Recorded, folded: Folded) -> None:
    """Σn, Σt, Σn², Σnt give the textbook least-squares line (numpy.polyfit's, via hockney_lstsq)."""
    window = _window_of(folded.own, len(recorded.window.steps))
    sums = window.link_sums()
    alpha, beta = sums.plain_fit()
    tr, node = recorded.window.transfers, dict(zip(recorded.window.ranks.tolist(),
                                                   recorded.window.rank_node.tolist(), strict=True))
    code = np.array([(node[s] << 16) | node[d] for s, d in zip(tr.src.tolist(), tr.dst.tolist(), strict=True)])
    t = tr.transfer_s
    for i, link in enumerate(sums.link):
        sel = (code == link) & (tr.nbytes > 0) & (t > 0)
        a, b = hockney_lstsq(tr.nbytes[sel], t[sel])
        assert close(alpha[i], a, 1e-6) or abs(alpha[i] - a) < 1e-12
        assert close(beta[i], b, 1e-6)
        assert sums.t_min_s[i] == t[sel].min() and sums.t_max_s[i] == t[sel].max()


def test_folding_against_another_reference_is_reported_and_shows(recorded: Recorded, folded: Folded) -> None:
    """Steps folded against their own α and busy level are stale for the window; the test above would catch
    the difference it makes (here: some β beyond its sketch bound), so the check is not vacuous."""
    full = analyse(recorded.window, None, recorded.cluster)
    mine = _window_of(folded.own, len(recorded.window.steps)).figures(recorded.cluster)
    assert mine.stale_steps == mine.fit_steps and mine.fit_steps
    if recorded.name.startswith("netns"):
        return  # one message size per link: no α, so the step's own reference is the window's
    off = [abs(b.bandwidth_Bps / a.bandwidth_Bps - 1) / mine.fit_error[a.src_name, a.dst_name].bandwidth_rel
           for a, b in zip(full.links, mine.links, strict=True)]
    assert max(off) > 2


def test_the_step_model_and_what_ifs_follow_the_fleet_median(both: tuple[Analysis, Figures]) -> None:
    """The model's collectives and halo groups are exact; its α and β are the fleet's medians of sketched
    figures (within the links' bounds), and with them each what-if is what the full model projects."""
    full, mine = both
    a, b = full.model, mine.model
    for name in ("workers", "n_steps"):
        assert getattr(a, name) == getattr(b, name)
    for name in ("work_s", "path_s", "measured_s"):
        assert close(getattr(a, name), getattr(b, name)), name
    for name in ("coll_op", "coll_group", "coll_nbytes"):
        np.testing.assert_array_equal(getattr(b, name), getattr(a, name))
    np.testing.assert_allclose(b.coll_per_step, a.coll_per_step, rtol=EXACT)
    for alpha, beta in ((a.alpha_s, a.beta_Bps), (2 * a.alpha_s, a.beta_Bps / 3)):  # the model's and another fabric
        assert close(a.comm_s(alpha, beta, a.workers), b.comm_s(alpha, beta, b.workers))
    # α and β are medians over the links: each moves at most as far as the links' worst bound
    assert abs(b.beta_Bps / a.beta_Bps - 1) <= 2 * max(e.bandwidth_rel for e in mine.fit_error.values())
    assert abs(b.alpha_s - a.alpha_s) <= 2 * max(e.latency_s for e in mine.fit_error.values()) + 1e-12
    # with those, every what-if is the full model's own projection
    same_fabric = replace(a, alpha_s=b.alpha_s, beta_Bps=b.beta_Bps)
    assert [w.label for w in full.whatif if w.slow_fixed] == [w.label for w in mine.whatif if w.slow_fixed] == \
        ["slow links fixed"]  # held to its bound in test_hours_at_stake_follow_the_bound
    for x, y in zip([w for w in full.whatif if not w.slow_fixed], [w for w in mine.whatif if not w.slow_fixed],
                    strict=True):
        assert (x.label, x.workers, x.bandwidth_x, x.latency_div) == (y.label, y.workers, y.bandwidth_x, y.latency_div)
        assert close(y.step_s, same_fabric.step_s(bandwidth_x=y.bandwidth_x, latency_div=y.latency_div,
                                                  workers=y.workers))


def test_the_halo_split_by_node_pair_is_exact(both: tuple[Analysis, Figures]) -> None:
    """The per-link step model's input (``models._halo_rows``: each (step, layer, rank, side) group's messages
    and bytes by node pair) is a sum: the summaries give it exactly."""
    full, mine = both
    a, b = full.model, mine.model
    assert len(a.row_pair) > 0
    for name in ("group_cell", "row_group", "row_pair", "row_msgs"):
        np.testing.assert_array_equal(getattr(b, name), getattr(a, name), err_msg=name)
    np.testing.assert_allclose(b.row_bytes, a.row_bytes, rtol=EXACT)


class _StakeBounds:
    """Bounds of the step model's predictions (``summary._Fixer``: step(X) = max(path, measured − comm now +
    comm with the links X at their class's healthy median β)) when every link's α and β may be off by twice its
    stated bound, as the sketches allow. Each comm is monotone (rising in every α, falling in every β: sums of
    maxima of α·m + n/β, with medians and minima of β), so the full analysis's model evaluated at the optimistic
    and the pessimistic corner bounds it; differences are bounded by interval arithmetic (sound, not tight)."""

    def __init__(self, full: Analysis, mine: Figures) -> None:
        self.model, self.remaining = full.model, full.remaining_steps
        self.by_name = {f"{lk.src_name}→{lk.dst_name}": lk for lk in full.links if not lk.local}
        worst_alpha = 2 * max(e.latency_s for e in mine.fit_error.values())

        def corner(sign: float) -> _Fixer:
            def moved(lk: LinkStats) -> LinkStats:
                if lk.local:
                    return lk
                e = mine.fit_error[lk.src_name, lk.dst_name]
                return replace(lk, bandwidth_Bps=lk.bandwidth_Bps * (1 - sign * 2 * e.bandwidth_rel),
                               latency_s=lk.latency_s + sign * 2 * e.latency_s)
            model = replace(full.model, alpha_s=full.model.alpha_s + sign * worst_alpha)
            return _Fixer(model, tuple(moved(lk) for lk in full.links), full.ports, len(full.nodes),
                          full.remaining_steps)

        self.opt, self.pess = corner(-1.0), corner(1.0)

    def _comm(self, fixer: _Fixer, names: list[str]) -> float:
        return fixer.model.links_comm_s(fixer.alpha, fixer.beta_with([self.by_name[n] for n in names]))

    def step(self, names: list[str]) -> tuple[float, float]:
        """The predicted step time with ``names`` fixed: measured − comm now + comm then, each at its worst."""
        if not names:
            return (max(self.model.path_s, self.model.measured_s),) * 2
        low = self._comm(self.opt, names) - self.pess.comm_now
        high = self._comm(self.pess, names) - self.opt.comm_now
        return max(self.model.path_s, self.model.measured_s + low), max(self.model.path_s, self.model.measured_s + high)

    def hours(self, before: list[str], after: list[str]) -> tuple[float, float]:
        """remaining × max(0, step(before) − step(after)) / 3600."""
        (b_lo, b_hi), (a_lo, a_hi) = self.step(before), self.step(after)
        scale = self.remaining / 3600.0
        return scale * max(0.0, b_lo - a_hi), scale * max(0.0, b_hi - a_lo)


def test_hours_at_stake_follow_the_bound(both: tuple[Analysis, Figures]) -> None:
    """Each slow link's stake, the run's, every standing finding's (both stakes) and the "slow links fixed"
    what-if come from the step model with each node pair at its own α and β: the model's input is exact (test
    above), its α and β within the sketch bound, so each figure lies within the bounds that allows (and so does
    the full analysis's own, which shows the bounds hold what they claim). The findings themselves are the same."""
    full, mine = both
    assert full.remaining_steps is not None and mine.hours_at_stake is not None
    bound = _StakeBounds(full, mine)

    def within(x: float, y: float, lo_hi: tuple[float, float], what: object) -> None:
        lo, hi = lo_hi
        slack = 1e-9 * max(1.0, hi)
        assert lo - slack <= x <= hi + slack and lo - slack <= y <= hi + slack, (what, x, y, lo, hi)

    slow = [f"{lk.src_name}→{lk.dst_name}" for lk in full.links if lk.slow and not lk.local]
    assert slow == [f"{lk.src_name}→{lk.dst_name}" for lk in mine.links if lk.slow and not lk.local]
    within(full.hours_at_stake, mine.hours_at_stake, bound.hours([], slow), "run")
    for a, b in zip(full.links, mine.links, strict=True):
        if a.slow and not a.local:
            within(a.hours_at_stake, b.hours_at_stake, bound.hours([], [f"{a.src_name}→{a.dst_name}"]), a.src_name)
            assert close(b.saving_per_step_s * full.remaining_steps / 3600, b.hours_at_stake)
    assert [(f.kind, f.subject, f.culprit, f.links) for f in mine.standing] == \
        [(f.kind, f.subject, f.culprit, f.links) for f in full.standing]
    for a, b in zip(full.standing, mine.standing, strict=True):
        within(a.hours_at_stake, b.hours_at_stake, bound.hours([], list(a.links)), a.subject)
        others = [n for n in slow if n not in a.links]
        within(a.hours_once_others_fixed, b.hours_once_others_fixed, bound.hours(others, slow), a.subject)
    (x,), (y,) = [w for w in full.whatif if w.slow_fixed], [w for w in mine.whatif if w.slow_fixed]
    within(x.step_s, y.step_s, bound.step(slow), "slow links fixed")
    if slow:  # the bound is narrow enough to mean something
        lo, hi = bound.hours([], slow)
        assert mine.hours_at_stake > 0 and hi - lo < 0.1 * mine.hours_at_stake, (lo, hi)


def test_the_watch_is_the_full_analysis_watch(recorded: Recorded, folded: Folded) -> None:
    """Per step and link, the watched rate (median with sharing taken out) is computed at the fold, from the
    transfers themselves: the only difference is the α the sharing correction keeps, off by at most the
    latency bound, which moves a rate n/t by at most that over the shortest transfer time. The alerts are the
    same, their levels within that (recoveries and lasting changes below the bar too, and the charts' design);
    the demo's degrading way out must raise some alerts, and its noisy link some changes."""
    series = _series(recorded)
    full = analyse(recorded.window, series, recorded.cluster, history=recorded.window)
    mine = summary_figures(recorded, folded, series=series)
    t = recorded.window.transfers.transfer_s
    rel = 2 * max(e.latency_s for e in mine.fit_error.values()) / t[t > 0].min()
    assert mine.watch is not None and full.watch is not None
    assert (mine.watch.n_series, mine.watch.arl, mine.watch.h_fast, mine.watch.h_slow) == \
        (full.watch.n_series, full.watch.arl, full.watch.h_fast, full.watch.h_slow)
    for what, found, theirs in (("alerts", full.alerts, mine.alerts),
                                ("recoveries", full.recoveries, mine.watch.recoveries),
                                ("changes", full.changes, mine.watch.changes)):
        assert [(a.kind, a.subject, a.step_began, a.step_detected, a.step_closed, a.port) for a in theirs] == \
            [(a.kind, a.subject, a.step_began, a.step_detected, a.step_closed, a.port) for a in found], what
        for a, b in zip(found, theirs, strict=True):
            assert close(a.baseline, b.baseline, rel) and close(a.recent, b.recent, rel)
    if recorded.name.startswith("netns"):
        return
    assert any(al.kind == "link-throughput" for al in full.alerts)
    assert full.changes


def _agree(full: object, mine: object, path: str, rel: float | None) -> None:
    """Same JSON shape, same strings, ints, booleans and Nones; floats within ``rel`` (None: any float, the
    figure's own test above holds it to its bound)."""
    if isinstance(full, dict):
        assert isinstance(mine, dict) and full.keys() == mine.keys(), path
        for key in full:
            _agree(full[key], mine[key], f"{path}.{key}", rel)
    elif isinstance(full, list):
        assert isinstance(mine, list) and len(full) == len(mine), path
        for i, (a, b) in enumerate(zip(full, mine, strict=True)):
            _agree(a, b, f"{path}[{i}]", rel)
    elif isinstance(full, float) and isinstance(mine, float):
        assert rel is None or close(full, mine, rel), (path, full, mine)
    else:
        assert full == mine, (path, full, mine)


def test_the_snapshot_json_agrees_key_for_key(recorded: Recorded, folded: Folded) -> None:
    """The whole ``analysis_to_json`` of both paths: every key, verdict, name and count identical; every float
    outside the link fit's consequences exact, those within their bounds (tested figure by figure above)."""
    series = _series(recorded)
    full = analysis_to_json(analyse(recorded.window, series, recorded.cluster, history=recorded.window))
    mine = analysis_to_json(as_analysis(summary_figures(recorded, folded, series=series), recorded.cluster,
                                                       series))
    for links in (full["links"], mine["links"]):
        for lk in links:
            lk.pop("latency_clamped")  # the sign of a sketched intercept: held to α's bound in its own test above
    for found in (full, mine):  # a message prints its levels, held to their bound in the tests above
        for key in ("alerts", "recoveries", "changes", "standing"):
            for al in found[key]:
                al["message"] = re.sub(r"[0-9.]+ [MG]B/s", "… B/s", al["message"])
    sketched = ("links", "ports", "local_links", "model", "whatif", "alerts", "recoveries", "changes", "standing",
                "hours_at_stake")
    assert not NOT_FROM_SUMMARIES.keys() & full.keys()
    _agree({k: v for k, v in full.items() if k not in sketched}, {k: v for k, v in mine.items() if k not in sketched},
           "", EXACT)
    _agree({k: full[k] for k in sketched}, {k: mine[k] for k in sketched}, "", None)


def test_a_window_that_slides_equals_one_built_from_its_steps_alone(folded: Folded, recorded: Recorded) -> None:
    """Steps leaving the window are subtracted from the running sums exactly (integer nanoseconds)."""
    summaries = folded.own
    keep = len(summaries) // 3
    sliding = _window_of(summaries, keep)
    fresh = _window_of(summaries[-keep:], keep)
    assert [s.step for s in sliding.summaries] == [s.step for s in fresh.summaries]
    a, b = sliding.figures(recorded.cluster), fresh.figures(recorded.cluster)
    for name in ("compute_s", "exchange_s", "comm_fraction", "comm_fraction_worst", "worst_rank"):
        np.testing.assert_array_equal(getattr(a.layers, name), getattr(b.layers, name), err_msg=name)
    np.testing.assert_array_equal(a.efficiency.useful_s, b.efficiency.useful_s)
    np.testing.assert_array_equal(a.worst.waits_on, b.worst.waits_on)
    assert (a.efficiency.load_balance, a.stragglers, a.first_step) == (b.efficiency.load_balance, b.stragglers,
                                                                       b.first_step)
    assert [(lk.src_name, lk.dst_name, lk.bytes, lk.bandwidth_Bps) for lk in a.links] == \
        [(lk.src_name, lk.dst_name, lk.bytes, lk.bandwidth_Bps) for lk in b.links]


def test_a_step_pushed_again_replaces_itself(folded: Folded, recorded: Recorded) -> None:
    """A step folded again (its late frames arrived) takes the place of its first fold."""
    summaries = folded.own
    once = _window_of(summaries, len(summaries)).figures(recorded.cluster)
    twice = _window_of([*summaries[:-1], summaries[-2], summaries[-1], summaries[-1]], len(summaries))
    with pytest.raises(ValueError, match="in order"):
        twice.push(summaries[0])
    again = twice.figures(recorded.cluster)
    np.testing.assert_array_equal(again.layers.compute_s, once.layers.compute_s)
    assert [(lk.bytes, lk.bandwidth_Bps) for lk in again.links] == [(lk.bytes, lk.bandwidth_Bps) for lk in once.links]
