"""Collective cost formulas, the what-if step model and the ETA."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from agent.wire import Op
from watchtower.analysis import (
    Collectives,
    Window,
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
    scatter_tree,
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
    # Common practice, no source: 1e9 float32 parameters are 4e9 bytes; one pass over 1 Gb/s Ethernet
    # (1.25e8 B/s) takes 32 s, over 56 Gb/s InfiniBand (7e9 B/s) 0.5714 s. The ring allreduce's bandwidth
    # term 2((p−1)/p)·n/β (Patarasuk & Yuan, 2009) is about twice that for large p: 2 × 1023/1024 × 32 s
    # = 63.9375 s and 2 × 1023/1024 × 4/7 s = 1.141741 s, by hand.
    n = 4e9
    assert ring_allreduce(1024, n, 0.0, 1.25e8) == pytest.approx(63.9375)
    assert ring_allreduce(1024, n, 0.0, 7e9) == pytest.approx(1.141741, rel=1e-6)


# The published α–β costs, typed out here (Thakur, Rabenseifner & Gropp, IJHPCA 2005, §4; the ring
# allreduce: Patarasuk & Yuan, JPDC 2009). lg = ceil(log2 p): a non-power-of-two p pays the rounds of the
# next power of two. n is the vector each rank holds (allreduce, broadcast) or the gathered total.
def _lg(p: int) -> int:
    return math.ceil(math.log2(p))


PUBLISHED = {
    "ring allreduce": lambda p, n, a, b: 2 * (p - 1) * a + 2 * (p - 1) / p * n / b,
    "recursive doubling allreduce": lambda p, n, a, b: _lg(p) * (a + n / b),
    "Rabenseifner allreduce": lambda p, n, a, b: 2 * _lg(p) * a + 2 * (p - 1) / p * n / b,
    "binomial tree broadcast": lambda p, n, a, b: _lg(p) * (a + n / b),
    "ring allgather": lambda p, n, a, b: (p - 1) * a + (p - 1) / p * n / b,
    "binomial scatter": lambda p, n, a, b: _lg(p) * a + (p - 1) / p * n / b,
}
PROJECT = {
    "ring allreduce": ring_allreduce, "recursive doubling allreduce": recursive_doubling_allreduce,
    "Rabenseifner allreduce": rabenseifner_allreduce, "binomial tree broadcast": binomial_tree,
    "ring allgather": ring_allgather, "binomial scatter": scatter_tree,
}
GRID = [(p, n) for p in (2, 3, 8, 12, 64, 1000) for n in (8.0, 65536.0, 1e6, 4e9)]


@pytest.mark.parametrize("name", sorted(PUBLISHED))
def test_collective_costs_follow_the_published_formulas(name: str) -> None:
    a, b = 5e-6, 12.5e9  # 5 µs, 100 Gb/s
    for p, n in GRID:
        assert PROJECT[name](p, n, a, b) == pytest.approx(PUBLISHED[name](p, n, a, b), rel=1e-12), (p, n)


def test_collective_cost_dispatch_follows_the_published_formulas() -> None:
    # Per op, the published cost of the algorithm a library would pick; allreduce the cheapest of three.
    a, b = 5e-6, 12.5e9
    cases = [(Op.ALLREDUCE, "allreduce"), (Op.BROADCAST, "binomial tree broadcast"),
             (Op.REDUCE, "binomial tree broadcast"), (Op.ALLGATHER, "ring allgather"),
             (Op.REDUCE_SCATTER, "ring allgather"), (Op.ALLTOALL, "ring allgather"),
             (Op.GATHER, "binomial scatter"), (Op.SCATTER, "binomial scatter")]
    for op, name in cases:
        for p, n in GRID:
            if name == "allreduce":
                expected = min(PUBLISHED[k](p, n, a, b) for k in ("ring allreduce", "recursive doubling allreduce",
                                                                  "Rabenseifner allreduce"))
            else:
                expected = PUBLISHED[name](p, n, a, b)
            assert collective_cost(np.array([op]), p, n, a, b)[0] == pytest.approx(expected, rel=1e-12), (op, p, n)
        # A barrier moves no data: lg p rounds of α (dissemination; Thakur et al., 2005).
    assert collective_cost(np.array([Op.BARRIER]), 12, 0, a, b)[0] == pytest.approx(4 * a)


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


def test_step_model_what_ifs_by_hand(build_transfers) -> None:
    # Two ranks on two nodes, one layer, one step. By hand:
    #   compute r0 = 3 s, r1 = 1 s → path (slowest compute) 3 s, work ΣU = 4 s; the step took 4.5 s.
    #   each rank makes one 1 GB allreduce over both ranks; r0 receives one 100 MB halo message from r1.
    # With α = 1 ms, β = 1 GB/s (n/β = 1 s): allreduce on p = 2 (Thakur et al., 2005; Patarasuk & Yuan,
    # 2009): ring 2α + n/β = 1.002, recursive doubling α + n/β = 1.001, Rabenseifner 2α + n/β = 1.002 →
    # 1.001 s; halo α + n/β = 0.101 s. Comm 1.102 s, so the unexplained residual is 4.5 − 3 − 1.102 = 0.398 s.
    tr = build_transfers([0], [1], [0], [1e8], [0.2])
    w = Window(("l",), ("n0", "n1"), np.arange(2, dtype=np.int32), np.arange(2, dtype=np.int32), np.array([0]),
               np.array([[[3.0], [1.0]]]), np.array([[[1.5], [3.5]]]), np.array([[4.5, 4.5]]), tr,
               _collectives(1, 2, 1e9))
    model = step_model(w, pop_efficiency(w, reduce_window(w)), 1e-3, 1e9)
    assert (model.path_s, model.work_s, model.measured_s) == pytest.approx((3.0, 4.0, 4.5))
    assert model.comm_s(1e-3, 1e9, 2) == pytest.approx(1.102)
    # 2× bandwidth: allreduce min(2α + 0.5, α + 0.5) = 0.501, halo 0.051 → 3 + 0.398 + 0.552 = 3.950 s.
    assert model.step_s(bandwidth_x=2.0) == pytest.approx(3.950)
    # ½ latency: allreduce 0.0005 + 1 = 1.0005, halo 0.1005 → 3 + 0.398 + 1.101 = 4.499 s.
    assert model.step_s(latency_div=2.0) == pytest.approx(4.499)
    # 2× ranks (p' = 4): compute path 3 × 2/4 = 1.5 s; the job-wide allreduce on 4 ranks: ring 6α + 1.5 =
    # 1.506, recursive doubling 2(α + 1) = 2.002, Rabenseifner 4α + 1.5 = 1.504 → 1.504; halo as measured
    # 0.101 → 1.5 + 0.398 + 1.605 = 3.503 s; projected speedup 4 / 3.503.
    assert model.step_s(workers=4) == pytest.approx(3.503)
    assert model.speedup(workers=4) == pytest.approx(4.0 / 3.503)
    # A fabric a billion times faster leaves the path and the residual: 3.398 s.
    assert model.step_s(bandwidth_x=1e9, latency_div=1e9) == pytest.approx(3.0 + 0.398)


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
    # Plus one 400 MB allreduce per step on 4 ranks (Thakur et al., 2005), n/β = 0.4 s, by hand: ring
    # 6α + 1.5 × 0.4 = 0.6006, recursive doubling 2(α + 0.4) = 0.8002, Rabenseifner 4α + 0.6 = 0.6004.
    assert model.comm_s(1e-4, 1e9, 4) == pytest.approx(3.1e-3 + 0.6004)
    # Twice the ranks: the job-wide allreduce grows to 8 ranks, the halo stays as measured: ring 14α +
    # 1.75 × 0.4 = 0.7014, recursive doubling 3(α + 0.4) = 1.2003, Rabenseifner 6α + 0.7 = 0.7006.
    assert model.comm_s(1e-4, 1e9, 8) == pytest.approx(3.1e-3 + 0.7006)


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
