"""POP efficiencies, the speedup split, stragglers and the Karp–Flatt serial fraction."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from watchtower.analysis import Window, find_stragglers, karp_flatt, pop_efficiency, reduce_window, serial_fractions


def _one_step(compute: list[list[float]], step: list[float]) -> Window:
    c = np.array([compute], dtype=np.float64)  # [1, R, L]
    s = np.array([step], dtype=np.float64)
    n_ranks, n_layers = c.shape[1:]
    return Window(tuple(f"l{i}" for i in range(n_layers)), ("n0",), np.arange(n_ranks, dtype=np.int32),
                  np.zeros(n_ranks, np.int32), np.array([0]), c, s[..., None] - c, s)


def test_pop_worked_example_imbalance() -> None:
    # POP metrics (Wagner et al., 2017): LB = mean U / max U, CommE = max U / T, PE = LB × CommE.
    # Three ranks compute 8, 6 and 4 s in a 10 s window, by hand:
    # LB = 6/8 = 0.75, CommE = 8/10 = 0.8, PE = 0.6, T_ideal = 8 → SerE = 1, TE = 0.8.
    w = _one_step([[8.0], [6.0], [4.0]], [10.0, 10.0, 10.0])
    eff = pop_efficiency(w, reduce_window(w))
    assert eff.load_balance == pytest.approx(0.75)
    assert eff.communication == pytest.approx(0.8)
    assert eff.parallel == pytest.approx(0.6)
    assert eff.serialisation == pytest.approx(1.0)
    assert eff.transfer == pytest.approx(0.8)
    # Speedup split: S = 3 × 0.6 = 1.8; imbalance 3 × 0.25 = 0.75; interconnect 3 × 0.75 × 0.2 = 0.45.
    sp = eff.speedup()
    assert (sp.achieved, sp.lost_to_imbalance, sp.lost_to_interconnect) == pytest.approx((1.8, 0.75, 0.45))
    assert sp.percent().achieved == pytest.approx(60.0)


def test_pop_worked_example_serialisation() -> None:
    # POP metrics (Wagner et al., 2017). Two ranks alternate which layer is heavy: rank 0 computes (4, 1),
    # rank 1 (1, 4): U = 5 each, LB = 1. With per-layer synchronisation the ideal step is max(4,1) +
    # max(1,4) = 8, so SerE = 5/8; a 10 s step gives TE = 8/10 = 0.8 and CommE = max U / T = 5/10 = 0.5
    # (which is SerE × TE = 5/8 × 4/5, as the POP model says it must be).
    w = _one_step([[4.0, 1.0], [1.0, 4.0]], [10.0, 10.0])
    eff = pop_efficiency(w, reduce_window(w))
    assert eff.load_balance == pytest.approx(1.0)
    assert eff.serialisation == pytest.approx(5 / 8)
    assert eff.transfer == pytest.approx(0.8)
    assert eff.communication == pytest.approx(0.5)
    assert eff.parallel == pytest.approx(0.5)
    assert eff.speedup().achieved == pytest.approx(1.0)  # ΣU / T = 10 / 10


def test_rank_that_never_reported_is_left_out() -> None:
    w = _one_step([[8.0], [6.0], [np.nan]], [10.0, 10.0, np.nan])
    eff = pop_efficiency(w, reduce_window(w))
    assert eff.workers == 2
    assert eff.load_balance == pytest.approx(7 / 8)


@settings(max_examples=60, deadline=None)
@given(
    compute=arrays(np.float64, st.tuples(st.integers(1, 4), st.integers(1, 6), st.integers(1, 4)),
                   elements=st.floats(1e-3, 10.0)),
    transfer_scale=st.floats(0.0, 5.0),
)
def test_pop_properties(build_window, compute: np.ndarray, transfer_scale: float) -> None:
    # POP metrics (Wagner et al., 2017) on data that follow the step model, each figure computed here from
    # the inputs: every layer waits for its slowest rank, then moves data for ``transfer`` seconds, so
    # T = Σ_steps Σ_layers (max_r C + transfer), T_ideal = Σ Σ max_r C, U_r = Σ Σ C_r; and S = ΣU / T.
    transfer = np.full((compute.shape[0], compute.shape[2]), transfer_scale)
    w = build_window(compute, transfer)
    eff = pop_efficiency(w, reduce_window(w))
    useful = compute.sum(axis=(0, 2))
    ideal = compute.max(axis=1).sum()
    wall = ideal + transfer.sum()
    assert eff.load_balance == pytest.approx(useful.mean() / useful.max())
    assert eff.communication == pytest.approx(useful.max() / wall)
    assert eff.serialisation == pytest.approx(useful.max() / ideal)
    assert eff.transfer == pytest.approx(ideal / wall)
    for value in (eff.load_balance, eff.communication, eff.parallel, eff.serialisation, eff.transfer):
        assert 0.0 < value <= 1.0 + 1e-12
    sp = eff.speedup()
    assert sp.workers == compute.shape[1]
    assert sp.achieved == pytest.approx(useful.sum() / wall)
    assert sp.lost_to_imbalance == pytest.approx(compute.shape[1] - useful.sum() / useful.max())


def test_straggler_found(build_window, rng: np.random.Generator) -> None:
    compute = rng.uniform(0.95, 1.05, size=(5, 32, 4))
    compute[:, 7, :] *= 1.6  # rank 7 computes 60 % longer
    w = build_window(compute, np.zeros((5, 4)), ranks_per_node=4)
    found = find_stragglers(w, pop_efficiency(w, reduce_window(w)))
    assert [s.rank for s in found] == [7]
    assert found[0].node == "n1"
    assert found[0].score > 3.5


def test_even_fleet_has_no_stragglers(build_window) -> None:
    w = build_window(np.ones((3, 16, 2)), np.zeros((3, 2)))
    assert find_stragglers(w, pop_efficiency(w, reduce_window(w))) == ()


def test_karp_flatt_known_value() -> None:
    # Karp & Flatt (CACM 1990): speedup 47 on 64 workers → e = (1/47 − 1/64)/(1 − 1/64).
    # By hand: 1/47 = 0.0212766, 1/64 = 0.015625, numerator 0.0056516 (the "≈ 0.00565" often quoted is
    # this numerator), divided by 0.984375 gives e ≈ 0.0057413.
    assert karp_flatt(64, 47) == pytest.approx((1 / 47 - 1 / 64) / (1 - 1 / 64))
    assert karp_flatt(64, 47) == pytest.approx(0.0057413, abs=5e-7)


def test_serial_fractions_over_run_sizes() -> None:
    # Karp & Flatt (CACM 1990): a fixed serial fraction f gives Amdahl speedups S = 1/(f + (1−f)/p), for
    # which e recovers f at every size.
    f = 0.03
    runs = [(p, 1 / (f + (1 - f) / p)) for p in (64, 8, 16)]
    res = serial_fractions(runs)
    assert res.workers.tolist() == [8, 16, 64]
    assert res.serial_fraction == pytest.approx([f, f, f])
    with pytest.raises(ValueError):
        serial_fractions([(8, 6.0)])
