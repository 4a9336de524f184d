"""Pair-check links from the summary path: the node daemons' checks measure the network pairs the job's own
transfers do not cover; ``SummaryWindow.figures(checks=...)`` judges them with the job's links as ``analyse``
does (``links.link_stats(checks=...)``). Their fit comes from the checks themselves (the store keeps each
pair's newest few), so their α, β and sums are exact; the job's links keep their sketch bound (tested in
test_summaries.py), and every verdict must be the same.

The recordings carry no checks, so each gets synthetic ones: Hockney-shaped times t = α + n/β (Hockney, 1994)
with 1 % seeded noise for every ordered node pair, one pair the job does not cover at a quarter of the rate, as
the daemons' checks would time them.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from tests.summaries.conftest import Folded, Recorded
from tests.summaries.test_summaries import EXACT, _StakeBounds, close, summary_figures
from watchtower.analysis import analyse
from watchtower.analysis.checks import Checks
from watchtower.analysis.summary_window import as_analysis

SIZES = (1 << 16, 1 << 22)  # a small and a large message, as the daemons' plans send
ALPHA_S = 60e-6
PERIOD_S = 6.0


def synthetic_checks(rec: Recorded, beta_Bps: float, slow: tuple[int, int]) -> Checks:
    """Four rounds of both sizes for every ordered pair of the recording's nodes, spread over its steps; the
    ``slow`` pair at a quarter of ``beta_Bps``."""
    rng = np.random.default_rng(16)
    n = len(rec.window.nodes)
    steps = rec.window.steps
    src, dst, nbytes, secs, step = [], [], [], [], []
    for s in range(n):
        for d in range(n):
            if s == d:
                continue
            beta = beta_Bps / 4 if (s, d) == slow else beta_Bps
            for k in range(4):
                for size in SIZES:
                    src.append(s), dst.append(d), nbytes.append(size)
                    secs.append((ALPHA_S + size / beta) * rng.normal(1.0, 0.01))
                    step.append(int(steps[(k * len(steps)) // 4]))
    return Checks(np.array(src, np.int32), np.array(dst, np.int32), np.array(nbytes, np.int64), np.array(secs),
                  np.array(step, np.int64), period_s=PERIOD_S)


@pytest.fixture(scope="module")
def with_checks(recorded: Recorded, folded: Folded):
    plain = analyse(recorded.window, None, recorded.cluster)
    beta = float(np.median([lk.bandwidth_Bps for lk in plain.links if not lk.local]))
    covered = {(lk.src, lk.dst) for lk in plain.links}
    n = len(recorded.window.nodes)
    slow = next((s, d) for s in range(n) for d in range(n) if s != d and (s, d) not in covered)
    checks = synthetic_checks(recorded, beta, slow)
    series = recorded.series
    full = analyse(recorded.window, series, recorded.cluster, history=recorded.window, checks=checks)
    figures = summary_figures(recorded, folded, series=series, checks=checks)
    return full, figures, as_analysis(figures, recorded.cluster, series)


def test_checked_links_are_the_full_analysis_links(with_checks) -> None:
    full, figures, mine = with_checks
    checked = [lk for lk in full.links if lk.measured_by == "check"]
    assert checked, "the synthetic checks cover pairs the job does not"
    assert any(lk.slow for lk in checked)  # the quarter-rate pair
    assert [(lk.src_name, lk.dst_name, lk.measured_by, lk.slow, lk.reason, lk.port, lk.unexplained)
            for lk in mine.links] == \
        [(lk.src_name, lk.dst_name, lk.measured_by, lk.slow, lk.reason, lk.port, lk.unexplained)
         for lk in full.links]
    for a, b in zip(full.links, mine.links, strict=True):
        if a.measured_by != "check":
            continue
        assert (a.bytes, a.transfers, a.check_every_s, a.of_nominal) == \
            (b.bytes, b.transfers, b.check_every_s, b.of_nominal) == (a.bytes, a.transfers, PERIOD_S, None)
        if a.slow and full.remaining_steps is not None:  # a slow link's stake: the step model, within its bound
            lo, hi = _StakeBounds(full, figures).hours([], [f"{a.src_name}→{a.dst_name}"])
            assert lo - 1e-9 <= b.hours_at_stake <= hi + 1e-9 and lo - 1e-9 <= a.hours_at_stake <= hi + 1e-9
        else:
            assert (a.hours_at_stake is None) == (b.hours_at_stake is None)
        for name in ("bandwidth_Bps", "latency_s", "busy_s", "throughput_Bps"):
            assert close(getattr(a, name), getattr(b, name), EXACT) or (
                math.isnan(getattr(a, name)) and math.isnan(getattr(b, name))), name


def test_checked_links_are_watched_as_the_full_analysis_watches_them(with_checks) -> None:
    """With the run's series, the checked links' rates are charted too: the same number of series and the
    same findings."""
    full, _, mine = with_checks
    assert full.watch is not None and mine.watch is not None
    assert mine.watch.n_series == full.watch.n_series
    assert [(a.kind, a.subject, a.step_began, a.step_detected) for a in mine.alerts] == \
        [(a.kind, a.subject, a.step_began, a.step_detected) for a in full.alerts]
    assert [(p.name, p.slow, p.reason) for p in mine.ports] == [(p.name, p.slow, p.reason) for p in full.ports]
