"""Collective cost formulas, the what-if step model and the ETA."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from agent.wire import Op
from watchtower.analysis import (
    Collectives,
    allreduce,
    binomial_tree,
    collective_cost,
    eta_s,
    pop_efficiency,
    rabenseifner_allreduce,
    recursive_doubling_allreduce,
    reduce_window,
    remaining_steps,
    ring_allgather,
    ring_allreduce,
    step_model,
)


def test_collective_formulas_by_hand() -> None:
    # Thakur, Rabenseifner & Gropp (IJHPCA 2005); ring: Patarasuk & Yuan (JPDC 2009).
    # p = 8, n = 1 MB, α = 10 µs, β = 1 GB/s, so n/β = 1 ms and log2 p = 3. By hand:
    p, n, a, b = 8, 1e6, 1e-5, 1e9
    assert ring_allreduce(p, n, a, b) == pytest.approx(2 * 7 * 1e-5 + 2 * (7 / 8) * 1e-3)  # 1.89 ms
    assert ring_allreduce(p, n, a, b) == pytest.approx(1.89e-3)
    assert recursive_doubling_allreduce(p, n, a, b) == pytest.approx(3.03e-3)  # 3 × (10 µs + 1 ms)
    assert binomial_tree(p, n, a, b) == pytest.approx(3.03e-3)
    assert rabenseifner_allreduce(p, n, a, b) == pytest.approx(1.81e-3)  # 2·3·10 µs + 1.75 ms
    assert ring_allgather(p, n, a, b) == pytest.approx(7e-5 + 0.875e-3)
    assert allreduce(p, n, a, b) == pytest.approx(1.81e-3)  # large message: Rabenseifner is cheapest
    # An 8-byte allreduce is latency bound: recursive doubling, 3 × (10 µs + 8 ns), is cheapest.
    assert allreduce(p, 8, a, b) == pytest.approx(3 * (1e-5 + 8e-9))
    # Non-power-of-two p pays the rounds of the next power of two: ceil(log2 6) = 3.
    assert binomial_tree(6, n, a, b) == pytest.approx(3.03e-3)


def test_collective_cost_dispatch() -> None:
    ops = np.array([Op.ALLREDUCE, Op.BROADCAST, Op.ALLGATHER, Op.BARRIER, Op.SEND, Op.ALLREDUCE])
    cost = collective_cost(ops, np.array([8, 8, 8, 8, 8, 1]), 1e6, 1e-5, 1e9)
    assert cost == pytest.approx([1.81e-3, 3.03e-3, 7e-5 + 0.875e-3, 3e-5, 0.0, 0.0])


def test_gradient_allreduce_over_ethernet_and_infiniband() -> None:
    # Common practice, no source: 1e9 float32 parameters are 4e9 bytes. A single transfer (Hockney with
    # α = 0, t = n/β) takes 4e9 × 8 / 1e9 = 32 s over 1 Gb/s Ethernet and 32/56 ≈ 0.57 s over 56 Gb/s.
    # The ring allreduce's bandwidth term 2((p−1)/p)·n/β is about twice that for large p: ≈ 64 s and 1.14 s.
    n = 4e9
    gige, fdr = 1e9 / 8, 56e9 / 8
    assert n / gige == pytest.approx(32.0)
    assert n / fdr == pytest.approx(0.5714, rel=1e-3)
    assert ring_allreduce(1024, n, 0.0, gige) == pytest.approx(2 * 32.0, rel=1e-3)
    assert ring_allreduce(1024, n, 0.0, fdr) == pytest.approx(2 * 0.5714, rel=1e-3)


def _collectives(n_steps: int, p: int, nbytes: float) -> Collectives:
    """One allreduce of ``nbytes`` per step on every rank."""
    k = n_steps * p
    return Collectives(np.repeat(np.arange(n_steps), p), np.zeros(k, np.int32), np.tile(np.arange(p), n_steps),
                       np.full(k, Op.ALLREDUCE, np.int16), np.full(k, p, np.int32), np.full(k, nbytes, np.int64),
                       np.full(k, 0.01))


def _model_window(build_window, build_transfers, seed: int, n_ranks: int = 8):
    rng = np.random.default_rng(seed)
    compute = rng.uniform(0.5, 1.5, size=(4, n_ranks, 3))
    src = rng.integers(0, n_ranks, 40)
    dst = (src + 1 + rng.integers(0, n_ranks - 1, 40)) % n_ranks
    nbytes = rng.integers(1_000, 10_000_000, 40)
    tr = build_transfers(rng.integers(0, 4, 40), src, dst, nbytes, 5e-5 + nbytes / 2e9, rng.integers(0, 3, 40))
    w = build_window(compute, np.full((4, 3), 0.05), ranks_per_node=2, transfers=tr)
    w = type(w)(**{**w.__dict__, "collectives": _collectives(4, n_ranks, 4e8)})
    return w


def test_step_model_reproduces_measured_step(build_window, build_transfers) -> None:
    w = _model_window(build_window, build_transfers, 1)
    eff = pop_efficiency(w, reduce_window(w))
    model = step_model(w, eff, 5e-5, 2e9)
    assert model.step_s() == pytest.approx(eff.wall_s / 4)
    assert model.speedup() == pytest.approx(eff.speedup().achieved)  # p × PE = Σ U / T
    assert model.step_s(bandwidth_x=2.0) < model.step_s()


def test_step_model_collectives_and_halo_by_hand(build_window, build_transfers) -> None:
    # Halo model: per layer, max over receiving ranks of Σ (α + n/β). Ranks 0, 1 on n0; 2, 3 on n1.
    # Step 0, layer 0: rank 0 receives 2 × 1 MB (from 2 and 3), rank 1 receives 1 × 3 MB (from 2):
    # with α = 100 µs, β = 1 GB/s: rank 0 = 2 × 100 µs + 2 ms = 2.2 ms, rank 1 = 100 µs + 3 ms = 3.1 ms.
    # Rank 2 receives 1 MB from rank 1 over the network: 1.1 ms; rank 3 receives 1 MB from rank 2, on
    # its own node, which the network model leaves out. Max = 3.1 ms in the only step.
    tr = build_transfers([0, 0, 0, 0, 0], [2, 3, 2, 1, 2], [0, 0, 1, 2, 3], [1e6, 1e6, 3e6, 1e6, 1e6],
                         [1.0] * 5)
    w = build_window(np.ones((1, 4, 1)), np.zeros((1, 1)), ranks_per_node=2, transfers=tr)
    w = type(w)(**{**w.__dict__, "collectives": _collectives(1, 4, 4e8)})
    model = step_model(w, pop_efficiency(w, reduce_window(w)), 1e-4, 1e9)
    # Plus one 400 MB allreduce per step on 4 ranks (Thakur et al., 2005): the cheapest algorithm.
    assert model.comm_s(1e-4, 1e9, 4) == pytest.approx(3.1e-3 + allreduce(4, 4e8, 1e-4, 1e9))
    # Twice the ranks: the job-wide allreduce grows to 8 ranks, the halo stays as measured.
    assert model.comm_s(1e-4, 1e9, 8) == pytest.approx(3.1e-3 + allreduce(8, 4e8, 1e-4, 1e9))


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 10_000), slower_bw=st.floats(0.05, 1.0), slower_lat=st.floats(0.05, 1.0),
       ranks=st.sampled_from([None, 4, 16, 64]))
def test_slower_fabric_never_raises_projected_speedup(build_window, build_transfers, seed: int,
                                                      slower_bw: float, slower_lat: float, ranks) -> None:
    # Property: a uniformly slower fabric (β × k, α / m with k, m ≤ 1) never raises the projected speedup.
    w = _model_window(build_window, build_transfers, seed)
    model = step_model(w, pop_efficiency(w, reduce_window(w)), 5e-5, 2e9)
    base = model.speedup(workers=ranks)
    slower = model.speedup(bandwidth_x=slower_bw, latency_div=slower_lat, workers=ranks)
    assert slower <= base * (1 + 1e-12)


def test_eta() -> None:
    assert remaining_steps(1000, 99) == 900  # steps 0..99 done
    assert remaining_steps(None, 99) is None
    assert remaining_steps(50, 99) == 0
    assert eta_s(900, 2.5) == pytest.approx(2250.0)
    assert eta_s(None, 2.5) is None
