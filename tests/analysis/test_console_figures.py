"""Figures the console shows beside the window sums: times per step, whom a worst rank waits on, and
whether a link's α was measured or clamped. Worked out by hand on the tiny window of test_hand_window."""

from __future__ import annotations

import numpy as np
import pytest
from test_hand_window import CLUSTER, tiny_window

from watchtower.analysis import analyse, analysis_to_json, fit_hockney
from watchtower.analysis.drilldown import worst_ranks


def test_layer_times_per_step_on_the_mean_and_the_worst_rank() -> None:
    # Window sums (test_hand_window.test_layers): mean rank C = (4.75, 7.5, 4.75), E = (3, 3.75, 14) over
    # 4 steps with a report. Per rank, C r3 = (8, 8, 8) is the most; E: a r2 = 5, b r0 = r2 = r3 = 4, c 16.
    layers = analysis_to_json(analyse(tiny_window(), None, CLUSTER))["layers"]
    per_step = [layer["per_step"] for layer in layers]
    assert [p["compute_s"] for p in per_step] == pytest.approx([4.75 / 4, 7.5 / 4, 4.75 / 4])
    assert [p["exchange_s"] for p in per_step] == pytest.approx([3 / 4, 3.75 / 4, 14 / 4])
    assert [p["compute_worst_s"] for p in per_step] == pytest.approx([2.0, 2.0, 2.0])
    assert [p["exchange_worst_s"] for p in per_step] == pytest.approx([5 / 4, 4 / 4, 16 / 4])


def test_worst_ranks_point_at_the_sender_that_kept_them_waiting() -> None:
    # Only layer c carries transfers: 0→2, 1→3 (n0→n1), 2→0, 3→1 (n1→n0, half the rate), 0→1 (inside n0).
    # Rank 1 hears from rank 0 (10 GB/s, local) and rank 3 (0.5 GB/s): rank 3 took longer.
    worst = worst_ranks(tiny_window(), count=4)
    c = {int(rank): int(peer) for rank, peer in zip(worst.rank[:, 2], worst.waits_on[:, 2], strict=True)}
    assert c == {0: 2, 1: 3, 2: 0, 3: 1}
    assert (worst.waits_on[:, :2] == -1).all()  # layers a and b received nothing
    assert worst.steps == 4


def test_alpha_below_zero_is_flagged_as_clamped_not_measured() -> None:
    # t = −5 µs + n / 1 GB/s exactly: the line's intercept is negative (numpy.polyfit agrees), so α is
    # set to 0 and flagged; with +5 µs it is measured and not flagged.
    n = np.repeat([1e6, 2e6, 4e6, 8e6], 5)
    group = np.zeros(len(n), np.int64)
    for alpha in (-5e-6, 5e-6):
        t = alpha + n / 1e9
        intercept = np.polyfit(n, t, 1)[1]
        fit = fit_hockney(group, n, t, 1)
        assert bool(fit.clamped[0]) == (intercept < 0)
        assert fit.alpha_s[0] == pytest.approx(max(alpha, 0.0), abs=1e-9)
        assert fit.beta_Bps[0] == pytest.approx(1e9, rel=1e-6)


def test_of_nominal_is_throughput_over_nominal_so_it_differs_between_links() -> None:
    # n0→n1 moves its bytes at ~0.96 GB/s while busy, n1→n0 at ~0.49 GB/s; nominal is 1.25 GB/s for both.
    # Bytes over wall time would give both the same share (same bytes, same window): this one does not.
    links = {(lk["src"], lk["dst"]): lk for lk in analysis_to_json(analyse(tiny_window(), None, CLUSTER))["links"]}
    fwd, back = links["n0", "n1"], links["n1", "n0"]
    assert fwd["of_nominal"] == pytest.approx(20e6 / 0.0208 / 1.25e9)
    assert back["of_nominal"] == pytest.approx(20e6 / 0.0408 / 1.25e9)
