"""analyse() end to end: slow links among many, alerts, A/B comparison, degenerate windows."""

from __future__ import annotations

import json

import numpy as np
import pytest

from watchtower.analysis import RunSeries, Window, analyse, analysis_to_json, compare
from watchtower.cluster import Cluster

N_NODES, PER_NODE, STEPS, LAYERS = 8, 2, 6, 3


def ring_window(build_window, build_transfers, rng: np.random.Generator, *, slow_pair: int | None = 3,
                slow_layer_extra: float = 0.0) -> Window:
    """Each rank sends to the same rank slot on the next node, per layer and step, at several sizes.
    Link β is 2 GB/s ± 1 %, except node ``slow_pair`` → next at 0.5 GB/s; 30 % of transfers include waiting."""
    n_ranks = N_NODES * PER_NODE
    beta = 2e9 * rng.uniform(0.99, 1.01, N_NODES)
    if slow_pair is not None:
        beta[slow_pair] = 0.5e9
    s, layer, r = (a.ravel() for a in np.meshgrid(np.arange(STEPS), np.arange(LAYERS), np.arange(n_ranks),
                                                 indexing="ij"))
    src_node = r // PER_NODE
    dst = (r + PER_NODE) % n_ranks
    nbytes = 1e5 * 4.0 ** (layer + s % 3)
    secs = 2e-5 + nbytes / beta[src_node]
    secs = secs + (rng.random(len(secs)) < 0.3) * secs * rng.uniform(0.5, 3.0, len(secs))
    tr = build_transfers(s, r, dst, nbytes.round(), secs, layer)
    compute = rng.uniform(0.9, 1.1, size=(STEPS, n_ranks, LAYERS))
    transfer = np.full((STEPS, LAYERS), 0.2)
    transfer[:, 1] += slow_layer_extra
    return build_window(compute, transfer, ranks_per_node=PER_NODE, transfers=tr)


def test_slow_link_found_as_outlier(build_window, build_transfers, rng: np.random.Generator) -> None:
    a = analyse(ring_window(build_window, build_transfers, rng), None, Cluster(total_steps=100))
    net = [lk for lk in a.links if not lk.local]
    assert len(net) == N_NODES
    slow = [lk for lk in net if lk.slow]
    assert [(lk.src_name, lk.dst_name) for lk in slow] == [("n3", "n4")]
    assert slow[0].reason == "outlier" and slow[0].score < -3.5
    # Fitted through waits: the healthy links sit at 2 GB/s ± 1 %, the slow one at 0.5 GB/s.
    healthy = np.array([lk.bandwidth_Bps for lk in net if not lk.slow])
    assert healthy == pytest.approx(np.full(len(healthy), 2e9), rel=0.03)
    assert slow[0].bandwidth_Bps == pytest.approx(0.5e9, rel=0.03)
    assert a.hours_at_stake == pytest.approx(slow[0].hours_at_stake) and a.hours_at_stake > 0
    assert all(lk.hours_at_stake == 0.0 for lk in net if not lk.slow)  # half are below the median, none slow


def test_uniform_fleet_has_no_slow_link(build_window, build_transfers, rng: np.random.Generator) -> None:
    a = analyse(ring_window(build_window, build_transfers, rng, slow_pair=None), None, Cluster.default())
    assert not any(lk.slow for lk in a.links)
    assert a.hours_at_stake is None  # no total steps configured


def test_alerts_reach_json(build_window, build_transfers, rng: np.random.Generator) -> None:
    w = ring_window(build_window, build_transfers, rng)
    n = 100
    step = 1.0 + 0.01 * rng.standard_normal(n)
    step[70:] += 0.2
    series = RunSeries(np.arange(n), step, ((0, 1),), np.full((n, 1), 1e9), np.full((n, 1), 0.5))
    out = analysis_to_json(analyse(w, series, Cluster(total_steps=1000)))
    # Step time rises by 0.2 s at step 70 from a baseline of 1 s ± 1 %: one alert, on the job's step time,
    # placed near step 70 and seen after it, from about 1 s to about 1.2 s.
    (alert,) = out["alerts"]
    assert (alert["kind"], alert["subject"], alert["port"]) == ("step-time", "step time", None)
    assert 60 <= alert["step_began"] <= 72 and 70 <= alert["step_detected"] < 100
    assert alert["baseline"] == pytest.approx(1.0, rel=0.02) and alert["recent"] == pytest.approx(1.2, rel=0.03)
    # The ETA uses the series' recent steps: 1000 − 100 remain at about 1.2 s each.
    assert out["eta_s"] == pytest.approx(900 * np.mean(step[-50:]))


def test_compare_names_what_got_slower(build_window, build_transfers) -> None:
    a = analyse(ring_window(build_window, build_transfers, np.random.default_rng(1), slow_pair=None), None,
                Cluster.default())
    b = analyse(ring_window(build_window, build_transfers, np.random.default_rng(1), slow_layer_extra=1.0),
                None, Cluster.default())
    diff = compare(a, analysis_to_json(b))
    assert diff["step_s"]["change"] == pytest.approx(STEPS * 1.0 / STEPS)  # 1 s more per step, all in layer1
    assert diff["layers"][0]["name"] == "layer1"
    assert diff["layers"][0]["exchange_s"]["change"] == pytest.approx(STEPS * 1.0)
    worst = diff["links"][0]
    assert (worst["src"], worst["dst"]) == ("n3", "n4")
    assert worst["bandwidth_Bps"]["ratio"] == pytest.approx(0.25, rel=0.05)
    assert [(x["src"], x["dst"]) for x in diff["new_slow_links"]] == [("n3", "n4")]
    assert diff["efficiency"]["parallel"]["change"] < 0
    json.dumps(diff, allow_nan=False)


def test_serial_fraction_from_earlier_runs(build_window) -> None:
    w = build_window(np.ones((2, 4, 1)), np.zeros((2, 1)))  # perfectly parallel: S = 4
    a = analysis_to_json(analyse(w, None, Cluster.default(), runs=[(2, 1.9)]))
    # Karp & Flatt (CACM 1990): (1/1.9 − 1/2)/(1 − 1/2) = 0.05263 for p = 2; S = p gives e = 0 at p = 4.
    assert [r["workers"] for r in a["serial_fraction"]] == [2, 4]
    assert a["serial_fraction"][0]["serial_fraction"] == pytest.approx((1 / 1.9 - 0.5) / 0.5)
    assert a["serial_fraction"][1]["serial_fraction"] == pytest.approx(0.0, abs=1e-12)


@pytest.mark.parametrize("shape", [(0, 4, 3), (3, 0, 3), (3, 4, 0)])
def test_empty_windows(shape: tuple[int, int, int]) -> None:
    s, r, n_layers = shape
    w = Window(tuple(f"l{i}" for i in range(n_layers)), ("n0",), np.arange(r, dtype=np.int32), np.zeros(r, np.int32),
               np.arange(s), np.zeros(shape), np.zeros(shape), np.ones((s, r)))
    json.dumps(analysis_to_json(analyse(w, None, Cluster(total_steps=10))), allow_nan=False)


def test_window_where_nobody_reported() -> None:
    shape = (3, 4, 2)
    w = Window(("a", "b"), ("n0",), np.arange(4, dtype=np.int32), np.zeros(4, np.int32), np.arange(3),
               np.full(shape, np.nan), np.full(shape, np.nan), np.full(shape[:2], np.nan))
    out = analysis_to_json(analyse(w, None, Cluster.default()))
    assert out["efficiency"]["parallel"] is None
    assert out["layers"][0]["comm_fraction"] is None and out["layers"][0]["comm_bound"] is False
    json.dumps(out, allow_nan=False)



@pytest.mark.parametrize("shape", [(0, 0, 0), (3, 0, 2), (0, 2, 2)])
def test_empty_history_watches_nothing(shape: tuple[int, int, int]) -> None:
    s, r, n_layers = shape
    w = Window(tuple(f"l{i}" for i in range(n_layers)), ("n0",), np.arange(r, dtype=np.int32), np.zeros(r, np.int32),
               np.arange(s), np.zeros(shape), np.zeros(shape), np.ones((s, r)))
    series = RunSeries(np.arange(3), np.ones(3), (), np.zeros((3, 0)), np.zeros((3, 0)))
    assert analyse(w, series, Cluster.default(), history=w).alerts == ()
