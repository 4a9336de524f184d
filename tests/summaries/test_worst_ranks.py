"""The partial sort behind the worst-ranks drill-down against numpy's full stable argsort."""

from __future__ import annotations

import numpy as np

from watchtower.analysis.drilldown import worst_of_sums


def test_worst_ranks_equal_a_full_stable_sort_with_ties_and_empty_cells() -> None:
    rng = np.random.default_rng(11)
    for _ in range(200):
        n_ranks, n_layers, count = int(rng.integers(1, 40)), int(rng.integers(1, 6)), int(rng.integers(1, 8))
        compute = rng.integers(0, 3, (n_ranks, n_layers)).astype(float)  # many ties, some all-zero cells
        exchange = rng.integers(0, 3, (n_ranks, n_layers)).astype(float)
        ranks = np.arange(100, 100 + n_ranks)
        got = worst_of_sums(ranks, compute, exchange, steps=1, count=count)
        total = compute + exchange
        with np.errstate(invalid="ignore", divide="ignore"):
            fraction = np.where(total > 0, exchange / total, np.nan)
        order = np.argsort(np.where(np.isnan(fraction), -np.inf, -fraction), axis=0, kind="stable")[:count]
        np.testing.assert_array_equal(got.rank, ranks[order])

