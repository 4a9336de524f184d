"""A tiny window, 2 nodes × 2 ranks × 3 layers × 4 steps, whose every figure is worked out by hand below."""

from __future__ import annotations

import json

import numpy as np
import pytest

from watchtower.analysis import Transfers, Window, analyse, analysis_to_json
from watchtower.cluster import Cluster

# Ranks 0, 1 on node n0; ranks 2, 3 on n1. Every step, per layer (a, b, c):
#   compute  r0, r1, r2 = (1, 2, 1) s;  r3 = (2, 2, 2) s           → slowest compute per layer = (2, 2, 2)
#   exchange = (slowest − own) + transfer, transfer = (0, 1, 3) s:
#            r0, r1, r2 = (1, 1, 4) s;  r3 = (0, 1, 3) s            → every step takes 10 s
# Two irregularities: in step 0 rank 2 waits 1 s more in layer a (its step takes 11 s), and rank 1 did not
# report step 3 (NaN).
C = np.array([[1.0, 2.0, 1.0]] * 3 + [[2.0, 2.0, 2.0]])
E = np.array([[1.0, 1.0, 4.0]] * 3 + [[0.0, 1.0, 3.0]])


def tiny_window() -> Window:
    compute = np.repeat(C[None], 4, axis=0)
    exchange = np.repeat(E[None], 4, axis=0)
    exchange[0, 2, 0] += 1.0
    compute[3, 1], exchange[3, 1] = np.nan, np.nan
    step = (compute + exchange).sum(axis=2)

    # Layer c transfers each step s, message size n_s = (s + 1) MB, exact Hockney times:
    #   n0→n1 (0→2, 1→3): α = 100 µs, β = 1 GB/s;  n1→n0 (2→0, 3→1): α = 100 µs, β = 0.5 GB/s;
    #   n0→n0 (0→1, node-local): α = 10 µs, β = 10 GB/s.
    rows = []
    for s in range(4):
        n = (s + 1) * 1e6
        rows += [(s, 0, 2, n, 1e-4 + n / 1e9), (s, 1, 3, n, 1e-4 + n / 1e9),
                 (s, 2, 0, n, 1e-4 + n / 5e8), (s, 3, 1, n, 1e-4 + n / 5e8), (s, 0, 1, n, 1e-5 + n / 1e10)]
    st, src, dst, nb, secs = (np.array(col) for col in zip(*rows, strict=True))
    k = len(st)
    # Each transfer in its own 10 s slot, so none shares a port with another (concurrency: test_ports.py).
    start = 10.0 * np.arange(k)
    transfers = Transfers(st.astype(np.int64), np.full(k, 2, np.int32), src.astype(np.int32), dst.astype(np.int32),
                          nb.astype(np.int64), start, start + secs, np.full(k, np.nan))
    return Window(("a", "b", "c"), ("n0", "n1"), np.arange(4, dtype=np.int32), np.array([0, 0, 1, 1], np.int32),
                  np.arange(4, dtype=np.int64), compute, exchange, step, transfers)


CLUSTER = Cluster(name="tiny", total_steps=1000, nic_Bps=1.25e9)


@pytest.fixture(scope="module")
def result() -> dict:
    return analysis_to_json(analyse(tiny_window(), None, CLUSTER))


def test_layers(result: dict) -> None:
    # Window sums per rank (r1 has 3 steps): C r0 = r2 = (4, 8, 4), r1 = (3, 6, 3), r3 = (8, 8, 8);
    # E r0 = (4, 4, 16), r1 = (3, 3, 12), r2 = (5, 4, 16), r3 = (0, 4, 12).
    # Mean rank: C = (19/4, 30/4, 19/4) = (4.75, 7.5, 4.75); E = (12/4, 15/4, 56/4) = (3, 3.75, 14).
    # Fraction E/(C+E): a = 3/7.75 = 12/31, b = 3.75/11.25 = 1/3, c = 14/18.75 = 56/75.
    # Worst rank: a = r2 with 5/9 (above 0.5, yet the layer's mean is not); b = 1/3 (a tie); c = 16/20 = 0.8.
    layers = result["layers"]
    assert [x["name"] for x in layers] == ["a", "b", "c"]
    assert [x["compute_s"] for x in layers] == pytest.approx([4.75, 7.5, 4.75])
    assert [x["exchange_s"] for x in layers] == pytest.approx([3.0, 3.75, 14.0])
    assert [x["comm_fraction"] for x in layers] == pytest.approx([12 / 31, 1 / 3, 56 / 75])
    assert [x["comm_fraction_worst"] for x in layers] == pytest.approx([5 / 9, 1 / 3, 0.8])
    assert layers[0]["worst_rank"] == 2
    assert [x["comm_bound"] for x in layers] == [False, False, True]


def test_efficiency_and_speedup(result: dict) -> None:
    # U = (16, 12, 16, 24): mean 17, max 24 → LB = 17/24. T = 11 + 10 + 10 + 10 = 41 → CommE = 24/41,
    # PE = 17/41. T_ideal = 4 steps × (2 + 2 + 2) = 24 → SerE = 24/24 = 1, TE = 24/41.
    eff = result["efficiency"]
    assert eff["load_balance"] == pytest.approx(17 / 24)
    assert eff["communication"] == pytest.approx(24 / 41)
    assert eff["parallel"] == pytest.approx(17 / 41)
    assert eff["serialisation"] == pytest.approx(1.0)
    assert eff["transfer"] == pytest.approx(24 / 41)
    # S = 4 × 17/41 = 68/41; imbalance 4 × 7/24 = 7/6; interconnect 4 × 17/24 × 17/41 = 289/246; sum 4.
    sp = result["speedup"]
    assert sp["workers"] == 4
    assert sp["achieved"] == pytest.approx(68 / 41)
    assert sp["lost_to_imbalance"] == pytest.approx(7 / 6)
    assert sp["lost_to_interconnect"] == pytest.approx(289 / 246)
    assert sp["percent"]["achieved"] == pytest.approx(100 * 17 / 41)
    assert result["stragglers"] == []  # r3's score: log 1.5 / (median |dev| / 0.6745) = 1.90 < 3.5


def test_links(result: dict) -> None:
    # n0→n1: 8 transfers, 2 × (1+2+3+4) MB = 20 MB; busy = 2 × (4 × 100 µs + 10 MB / 1 GB/s) = 20.8 ms,
    # throughput = 20e6 / 0.0208; of nominal = that throughput / 1.25e9 B/s.
    # n1→n0: β = 0.5 GB/s, busy = 2 × (0.4 ms + 20 ms) = 40.8 ms; 0.5 GB/s < 0.5 × 1.25 GB/s → slow.
    # Scores: two links, log β differ by log 2, so M = ±0.6745 (each is one MAD from the median).
    links = {(lk["src"], lk["dst"]): lk for lk in result["links"]}
    assert set(links) == {("n0", "n1"), ("n1", "n0")}
    fwd, back = links["n0", "n1"], links["n1", "n0"]
    assert (fwd["bytes"], fwd["transfers"]) == (20_000_000, 8)
    assert fwd["bandwidth_Bps"] == pytest.approx(1e9)
    assert fwd["latency_s"] == pytest.approx(1e-4)
    assert fwd["throughput_Bps"] == pytest.approx(20e6 / 0.0208)
    assert fwd["nominal_Bps"] == pytest.approx(1.25e9)
    assert fwd["of_nominal"] == pytest.approx(20e6 / 0.0208 / 1.25e9)
    assert not fwd["latency_clamped"]  # α = 100 µs was fitted, not clamped
    assert fwd["score"] == pytest.approx(0.6745) and not fwd["slow"]
    assert back["bandwidth_Bps"] == pytest.approx(5e8)
    assert back["throughput_Bps"] == pytest.approx(20e6 / 0.0408)
    assert back["score"] == pytest.approx(-0.6745)
    assert back["slow"] and back["reason"] == "below-nominal"
    # Node-local pairs are reported apart: n0→n0 fitted at α = 10 µs, β = 10 GB/s, never judged.
    (local,) = result["local_links"]
    assert (local["src"], local["dst"]) == ("n0", "n0")
    assert local["bandwidth_Bps"] == pytest.approx(1e10)
    assert local["latency_s"] == pytest.approx(1e-5)
    assert local["nominal_Bps"] is None and not local["slow"]


def test_projections(result: dict) -> None:
    # Steps 0..3 done of 1000 → 996 remain; recent step = 41/4 = 10.25 s → ETA = 10209 s.
    assert result["remaining_steps"] == 996
    assert result["eta_s"] == pytest.approx(996 * 10.25)
    # Hours at stake of n1→n0 (DESIGN §3: remaining steps × (predicted step now − predicted step with the link
    # at the median β of its class's healthy links), a step-time difference in which α stays as it is). The
    # class's one healthy link, n0→n1, runs at 1 GB/s. The only network messages are layer c's, one per rank
    # and direction; the layer waits for the busiest rank, counting what it receives and what it sends: on
    # n1→n0, now Σ over the 4 steps of (100 µs + (s + 1) MB / 0.5 GB/s) = 0.4 ms + 20 ms = 20.4 ms; fixed
    # 0.4 ms + 10 MB / 1 GB/s = 10.4 ms, the same as n0→n1. Saving 10 ms per 4 steps = 2.5 ms per step.
    saving = (20.4e-3 - (0.4e-3 + 10e6 / 1e9)) / 4
    assert saving == pytest.approx(2.5e-3, rel=1e-9)
    links = {(lk["src"], lk["dst"]): lk for lk in result["links"]}
    assert links["n1", "n0"]["hours_at_stake"] == pytest.approx(996 * saving / 3600)
    assert links["n0", "n1"]["hours_at_stake"] == 0.0
    assert result["hours_at_stake"] == pytest.approx(996 * saving / 3600)
    # "Slow links fixed": the measured 10.25 s step less that saving; speedup = work per step (Σ U / steps =
    # 68 / 4 = 17 s) over it.
    fixed = [w for w in result["whatif"] if w["slow_fixed"]]
    assert len(fixed) == 1 and fixed[0]["label"] == "slow links fixed"
    assert fixed[0]["step_s"] == pytest.approx(10.25 - saving)
    assert fixed[0]["speedup"] == pytest.approx(17 / (10.25 - saving))
    # The step model reproduces the measured 10.25 s step; more bandwidth only helps.
    assert result["model"]["measured_step_s"] == pytest.approx(10.25)
    whatif = {w["label"]: w for w in result["whatif"]}
    assert whatif["2× bandwidth"]["step_s"] < 10.25
    assert whatif["2× ranks"]["workers"] == 8


def test_what_if_by_hand(result: dict) -> None:
    # The model's fabric is the network links' median: α = 100 µs, β = (1 + 0.5)/2 = 0.75 GB/s. No
    # collectives; the halo model (per step and layer, max over receiving ranks of Σ α + n/β) sees, in step s,
    # each of r0..r3 receive one (s + 1) MB message over the network: 4 steps give 4α + 10 MB/β = 0.4 ms +
    # 13.333 ms, 3.4333 ms per step. Path = T_ideal / steps = 24/4 = 6 s; measured 41/4 = 10.25 s; so the
    # unexplained residual is 10.25 − 6 − 0.0034333 = 4.2465667 s (Thakur et al. 2005 for the α–β costs).
    model = result["model"]
    assert (model["alpha_s"], model["bandwidth_Bps"]) == pytest.approx((1e-4, 7.5e8))
    assert model["path_s"] == pytest.approx(6.0)
    whatif = {w["label"]: w for w in result["whatif"]}
    # 2× bandwidth halves the 13.333 ms / 4 per step: 10.25 − 0.0016667 = 10.2483333 s.
    assert whatif["2× bandwidth"]["step_s"] == pytest.approx(10.25 - 10e6 / 7.5e8 / 4 / 2, rel=1e-9)
    assert whatif["2× bandwidth"]["step_s"] == pytest.approx(10.2483333, abs=1e-7)
    # ½ latency halves the 0.4 ms / 4 per step: 10.25 − 0.00005 = 10.24995 s.
    assert whatif["½ latency"]["step_s"] == pytest.approx(10.24995, rel=1e-9)
    # 2× ranks: the compute path halves to 3 s, the halo stays as measured: 3 + 4.2465667 + 0.0034333 =
    # 7.25 s; projected speedup = work per step (ΣU / steps = 68/4 = 17 s) / 7.25 s.
    assert whatif["2× ranks"]["workers"] == 8
    assert whatif["2× ranks"]["step_s"] == pytest.approx(7.25, rel=1e-9)
    assert whatif["2× ranks"]["speedup"] == pytest.approx(17 / 7.25, rel=1e-9)


def test_json_is_plain(result: dict) -> None:
    text = json.dumps(result, allow_nan=False)  # raises on NaN or infinity
    assert json.loads(text) == result

    def walk(x: object) -> None:
        if isinstance(x, dict):
            assert all(isinstance(k, str) for k in x)
            for v in x.values():
                walk(v)
        elif isinstance(x, list):
            for v in x:
                walk(v)
        else:
            assert x is None or type(x) in (int, float, str, bool)

    walk(result)
    assert result["job"] == "tiny" and result["alerts"] == [] and result["serial_fraction"] is None
    assert result["window"] == {"first_step": 0, "last_step": 3, "steps": 4, "workers": 4, "nodes": ["n0", "n1"],
                                "wall_s": 41.0, "step_s": 10.25}
    # Every figure names its source beside its definition; spot checks against the papers cited.
    how = result["how"]
    assert all(set(v) == {"definition", "source"} and v["definition"] and v["source"] for v in how.values())
    assert how["efficiency.load_balance"]["source"] == "POP metrics (Wagner et al., 2017)"
    assert how["links.bandwidth_Bps"]["source"].startswith("Hockney (1994)")
    assert how["links.score"]["source"] == how["stragglers"]["source"] == "Iglewicz & Hoaglin (1993)"
    assert how["serial_fraction"]["source"] == "Karp & Flatt (1990)"
    assert how["layers.comm_bound"]["source"] == "common practice, no source"
