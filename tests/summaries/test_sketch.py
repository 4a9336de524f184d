"""The quantile sketch against numpy's exact quantiles: the relative-error guarantee of DDSketch
(Masson, Rim & Lee, VLDB 2019, Proposition 3 and Theorem 5) and its exact mergeability."""

from __future__ import annotations

import numpy as np
import pytest

from watchtower.analysis.sketch import Sketches, merge

QUANTILES = (0.0, 0.01, 0.25, 0.5, 0.75, 0.9, 0.99, 1.0)


def _data(seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Heavy-tailed, multi-modal positive values in 40 groups of very different sizes and scales."""
    rng = np.random.default_rng(seed)
    group = rng.integers(0, 40, 30_000) ** 2 % 37  # uneven group sizes, one group id never used
    scale = 10.0 ** rng.uniform(-6, 2, 37)
    values = scale[group] * rng.lognormal(0.0, 1.5, len(group)) * np.where(rng.random(len(group)) < 0.1, 50, 1)
    return group, values


@pytest.mark.parametrize("seed", [1, 2, 3])
@pytest.mark.parametrize("accuracy", [1e-2, 1e-3])
def test_every_quantile_is_within_the_relative_accuracy(seed: int, accuracy: float) -> None:
    group, values = _data(seed)
    sketch = Sketches.of(group, values, accuracy)
    for q in QUANTILES:
        got = sketch.quantile(q, 37)
        for g in range(37):
            mine = values[group == g]
            if len(mine) == 0:
                assert np.isnan(got[g])
                continue
            exact = np.quantile(mine, q, method="lower")  # the value of rank ⌊q (n − 1)⌋
            assert abs(got[g] - exact) <= accuracy * exact * (1 + 1e-12), (q, g)


def test_the_bound_is_tight_enough_to_matter() -> None:
    """The worst error is of the order of the accuracy, not far below it: the test above is not vacuous."""
    rng = np.random.default_rng(4)
    values = rng.uniform(1.0, 2.0, 100_000)
    sketch = Sketches.of(np.zeros(len(values), np.int64), values, 1e-2)
    errors = [abs(sketch.quantile(q, 1)[0] / np.quantile(values, q, method="lower") - 1)
              for q in np.linspace(0, 1, 101)]
    assert 0.5e-2 < max(errors) <= 1e-2


def test_merge_is_identical_to_the_sketch_of_the_union_in_any_grouping() -> None:
    group, values = _data(5)
    whole = Sketches.of(group, values)
    rng = np.random.default_rng(6)
    part = rng.integers(0, 7, len(values))
    pieces = [Sketches.of(group[part == i], values[part == i]) for i in range(7)]
    for merged in (merge(pieces), merge([merge(pieces[:3]), merge(pieces[3:])]), merge(pieces[::-1])):
        np.testing.assert_array_equal(merged.key, whole.key)
        np.testing.assert_array_equal(merged.count, whole.count)
    np.testing.assert_array_equal(whole.counts(37), np.bincount(group, minlength=37))


def test_values_that_are_not_positive_are_left_out() -> None:
    sketch = Sketches.of(np.zeros(5, np.int64), np.array([0.0, -1.0, np.nan, np.inf, 3.0]))
    assert sketch.counts(1).tolist() == [1]
    assert sketch.quantile(0.5, 1)[0] == pytest.approx(3.0, rel=1e-3)


def test_regroup_folds_groups_together() -> None:
    group, values = _data(7)
    folded = Sketches.of(group, values).regroup(np.arange(37) % 2)
    direct = Sketches.of(group % 2, values)
    np.testing.assert_array_equal(folded.key, direct.key)
    np.testing.assert_array_equal(folded.count, direct.count)
