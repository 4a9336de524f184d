"""Tabular CUSUM against Montgomery's worked example, and degradation alerts on a run series."""

from __future__ import annotations

import numpy as np
import pytest

from watchtower.analysis import RunSeries, degradation_alerts, tabular_cusum

# Montgomery, Introduction to Statistical Quality Control, tabular CUSUM example (Tables 9.1/9.2):
# μ0 = 10, σ = 1, k = 0.5, h = 5; 20 observations from N(10, 1), then 10 after the mean moved to 11.
# Values recalled from memory, then matched against several independent public transcriptions of the table.
MONTGOMERY_X = [
    9.45, 7.99, 9.29, 11.66, 12.16, 10.18, 8.04, 11.46, 9.20, 10.34,
    9.03, 11.47, 10.51, 9.40, 10.08, 9.37, 10.62, 10.31, 8.52, 10.84,
    10.90, 9.33, 12.29, 11.50, 10.60, 11.08, 10.38, 11.62, 11.31, 10.52,
]


def _upper_by_definition(x: list[float], target: float) -> list[float]:
    """C⁺_i = max(0, x_i − (μ0 + K) + C⁺_{i−1}) with C⁺_0 = 0, written out independently of the code."""
    out, c = [], 0.0
    for value in x:
        c = max(0.0, value - target + c)
        out.append(c)
    return out


def test_montgomery_tabular_cusum() -> None:
    run = tabular_cusum(np.array(MONTGOMERY_X), 10.0, 1.0, side="upper", k=0.5, h=5.0)
    assert run.sums == pytest.approx(_upper_by_definition(MONTGOMERY_X, 10.5))
    # Montgomery (from memory, and re-derived by hand): C⁺ = 0, 0, 0, 1.16, 2.82, 2.50, 0.04, 1.00, ...;
    # C⁺_29 = 5.28 > H = 5 is the first alarm, and C⁺_30 = 5.30.
    assert run.sums[3:8] == pytest.approx([1.16, 2.82, 2.50, 0.04, 1.00], abs=1e-9)
    assert run.sums[28] == pytest.approx(5.28, abs=1e-9)
    assert run.sums[29] == pytest.approx(5.30, abs=1e-9)
    assert run.alarm + 1 == 29  # observations are numbered from 1 in the book
    # Change point: C⁺ was last zero at observation 22 (N⁺ = 7 nonzero periods up to 29), so Montgomery
    # concludes the shift happened after period 22; the data's true shift was after observation 20.
    assert run.began + 1 == 22


def test_montgomery_lower_side_is_quiet() -> None:
    run = tabular_cusum(np.array(MONTGOMERY_X), 10.0, 1.0, side="lower")
    assert run.alarm == -1
    assert run.sums.max() < 5.0


def test_nan_points_are_skipped() -> None:
    x = np.array(MONTGOMERY_X)
    with_gaps = np.insert(x, [5, 25], np.nan)
    run = tabular_cusum(with_gaps, 10.0, 1.0)
    assert run.alarm == 28 + 2  # the same observation, two positions later


def _series(rng: np.random.Generator, n: int = 160) -> RunSeries:
    step = 1.0 + 0.01 * rng.standard_normal(n)
    step[100:] += 0.08  # step time rises by 8 % (8σ) from step 1100
    nbytes = np.full((n, 2), 1e9)
    secs = np.column_stack([1.0 + 0.01 * rng.standard_normal(n), 0.5 + 0.005 * rng.standard_normal(n)])
    secs[60:, 1] *= 2.0  # link 1 moves half as fast from step 1060
    nbytes[10, 0] = 0.0  # a step in which link 0 moved nothing
    hiccups = rng.choice(n, size=n // 20, replace=False)
    secs[hiccups, 0] *= 2.0  # one step in twenty, link 0 takes twice as long: noise, not a degradation
    return RunSeries(np.arange(n) + 1000, step, ((0, 1), (1, 0)), nbytes, secs)


def test_degradation_alerts(rng: np.random.Generator) -> None:
    alerts = degradation_alerts(_series(rng), ("a", "b"), warmup=40, block=4)
    by_subject = {al.subject: al for al in alerts}
    assert set(by_subject) == {"step time", "b→a"}  # link 0's hiccups raise nothing
    link = by_subject["b→a"]
    assert link.kind == "link-throughput"
    # The change starts at step 1060, the first step of block 15. Each block adds at most (2.5 − 0.5)σ, so
    # even a 50 % drop (≫ 5σ) needs three blocks to alarm (block 17) and one more to confirm: step 1075.
    assert link.step_began == 1060 and link.step_detected == 1075
    assert link.recent == pytest.approx(link.baseline / 2.0, rel=0.02)
    step = by_subject["step time"]
    assert 1096 <= step.step_began <= 1100 and step.step_detected <= 1115
    assert "rose" in step.message


def test_a_small_lasting_change_does_not_mask_a_later_large_one(rng: np.random.Generator) -> None:
    series = _series(rng)
    step = 1.0 + 0.01 * rng.standard_normal(len(series.steps))
    step[40:] += 0.02  # 2 %: statistically real, too small to act on
    step[120:] += 0.10  # then 10 % more
    alerts = degradation_alerts(RunSeries(series.steps, step, (), np.empty((len(step), 0)),
                                          np.empty((len(step), 0))), (), warmup=40, block=4)
    assert len(alerts) == 1 and 1116 <= alerts[0].step_began <= 1120


def test_no_alert_without_enough_warmup(rng: np.random.Generator) -> None:
    assert degradation_alerts(_series(rng, n=15), ("a", "b"), warmup=40) == ()
