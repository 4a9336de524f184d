"""Concurrent flows: the busy level of a port and each transfer's share of its bottleneck, at the edges of
the rules that decide them (``sharing.py``; the bottleneck of max-min fairness: Bertsekas & Gallager,
Data Networks, §6.5; the 60 %, 90 % and 1.1 figures are common practice, no source).

Ports are indexed node (way out) and n_nodes + node (way in). Every flow moves its bytes at a uniform rate
over its interval, so each figure below is worked by hand.
"""

from __future__ import annotations

import numpy as np
import pytest

from watchtower.analysis import bottleneck_share, busy_level

EDGE = 2.0 ** (1 / 16)  # the busy level is read at the upper edge of a 1/16-octave bin


def test_busy_level_is_the_time_weighted_90_percent_quantile() -> None:
    # One port: 0.8 s of items at 1 GB/s, 0.2 s at 2 GB/s. By time, 80 % sits at 1 GB/s, so the 90 %
    # quantile is in the 2 GB/s bin. Bins are fixed (bin k holds [2^(k/16), 2^((k+1)/16))) and the level is
    # the bin's upper edge: by hand 2^(495/16), as 16 log2 2e9 = 494.36.
    rate = np.r_[np.full(8, 1e9), np.full(2, 2e9)]
    (level,) = busy_level(np.zeros(10, np.int64), rate, np.full(10, 0.1), 1)
    assert level == pytest.approx(2.0 ** (495 / 16), rel=1e-9)
    assert 2e9 < level <= 2e9 * EDGE
    # With 95 % of the time at 1 GB/s the 90 % quantile stays in its bin: 2^(479/16) (16 log2 1e9 = 478.36).
    rate = np.r_[np.full(19, 1e9), 2e9]
    (level,) = busy_level(np.zeros(20, np.int64), rate, np.full(20, 0.1), 1)
    assert level == pytest.approx(2.0 ** (479 / 16), rel=1e-9)
    assert 1e9 < level <= 1e9 * EDGE


def flows(spec: list[tuple[int, int, float, float, float]]) -> tuple[np.ndarray, ...]:
    """(src node, dst node, start s, end s, bytes) rows as the columns ``bottleneck_share`` takes."""
    src, dst, lo, hi, nbytes = (np.array(col) for col in zip(*spec, strict=True))
    return src.astype(np.int64), dst.astype(np.int64), lo, hi, nbytes


@pytest.mark.parametrize(("aggregate", "full"), [(0.71e8, True), (0.52e8, False)])
def test_a_port_is_full_at_sixty_percent_of_its_busy_level(aggregate: float, full: bool) -> None:
    # n0's way out usually moves 100 MB/s: one flow to n3 for 9 s, alone. For 1 s it carries two equal
    # flows to n1 and n2 whose sum is 71 or 52 MB/s. Its busy level (90 % by time: the 9 s flow) is
    # 1e8 × 2^(k/16) for some k ∈ {0, 1}, so the pair runs at 0.68–0.71 or 0.50–0.52 of it: full (≥ 60 %)
    # or not. Full, each flow had half the port (share 0.5); not full, the port did not limit them (1).
    y = aggregate / 2
    src, dst, lo, hi, nbytes = flows([(0, 3, 0.0, 9.0, 9e8), (0, 1, 20.0, 21.0, y), (0, 2, 20.0, 21.0, y)])
    share = bottleneck_share(src, dst, lo, hi, nbytes, np.full(4, np.nan))
    assert share[1:] == pytest.approx([0.5, 0.5] if full else [1.0, 1.0])
    assert share[0] == pytest.approx(1.0)  # alone on both its ports


@pytest.mark.parametrize(("faster", "fair"), [(1.857, True), (3.0, False)])
def test_a_flow_needs_sixty_percent_of_the_mean_rate_to_be_limited_by_a_port(faster: float, fair: bool) -> None:
    # n0's way out carries two flows over the same second: to n1 at a, to n2 at `faster` × a. The first
    # flow's rate over the mean rate of the port's flows is 2a / (a + faster·a): 0.70 or 0.50. At ≥ 60 %
    # it had its fair share and the port limited it: its share a / (a + faster·a) = 0.35; below, it was
    # held back elsewhere and keeps its own rate (1).
    a = 1e8
    src, dst, lo, hi, nbytes = flows([(0, 1, 0.0, 1.0, a), (0, 2, 0.0, 1.0, faster * a)])
    share = bottleneck_share(src, dst, lo, hi, nbytes, np.full(3, np.nan))
    assert share[0] == pytest.approx(1 / (1 + faster) if fair else 1.0)
    assert share[1] == pytest.approx(faster / (1 + faster))


@pytest.mark.parametrize(("nominal", "corrected"), [(2.2e8, True), (1.7e8, False)])
def test_a_port_busier_than_its_card_allows_is_never_full(nominal: float, corrected: bool) -> None:
    # n0 sends 100 MB to n1 and to n2 over the same second: 200 MB/s out of n0, whose busy level is the
    # upper edge of that bin, 2e8 × 2^(1/16) = 2.089e8 (the lowest rate seen, 1e8 at n1's and n2's way in,
    # starts the bins). Against a nominal 220 MB/s (level 0.95 of it) the port was full and each flow had
    # half of it; against 170 MB/s (level 1.23 of it, over the 1.1 allowed for rounding) no card moves that
    # much: the overlap is not real (say, clock offsets), so no correction.
    src, dst, lo, hi, nbytes = flows([(0, 1, 0.0, 1.0, 1e8), (0, 2, 0.0, 1.0, 1e8)])
    share = bottleneck_share(src, dst, lo, hi, nbytes, np.array([nominal, np.nan, np.nan]))
    assert share == pytest.approx([0.5, 0.5] if corrected else [1.0, 1.0])
