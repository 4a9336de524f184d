"""A deterministic job snapshot for the console tests, shaped exactly as docs/snapshot.md says.

Six nodes of four ranks, twelve layers (three comm-bound, one just under the threshold), one slow link
node-c→node-d explained by node-c's outgoing port, one straggler rank, an alert on that link and one on step
time, some lost frames. The layers' comm fractions and comm-bound verdicts come from the analysis itself
(``analyse``), so a wrong threshold there shows on screen.
"""

from __future__ import annotations

import copy
from typing import Any

import numpy as np

from watchtower.analysis import Window, analyse, analysis_to_json
from watchtower.analysis.summary import HOW
from watchtower.cluster import Cluster

NODES = ["node-a", "node-b", "node-c", "node-d", "node-e", "node-f"]
RANKS_PER_NODE = 4
LAYERS = [
    # name, compute_s, exchange_s (summed over the window on the mean rank)
    ("embed", 0.80, 0.10),
    ("block0.attn", 2.40, 0.60),
    ("block0.mlp", 3.10, 0.40),
    ("block1.attn", 2.40, 2.90),
    ("block1.mlp", 3.10, 0.50),
    ("block2.attn", 2.40, 0.70),
    ("block2.mlp", 3.10, 3.60),
    ("block3.attn", 2.40, 0.60),
    ("block3.mlp", 3.10, 0.45),
    ("norm", 0.20, 0.02),
    ("head", 1.10, 0.85),  # comm fraction 0.44: near the 0.5 threshold, not above it
    ("grad.allreduce", 0.30, 4.20),
]
NOMINAL = 12.5e9
STEPS = 200  # steps in the window
SLOW = ("node-c", "node-d")


def _analysed_layers(exchange: list[float]) -> list[dict[str, Any]]:
    """The layers as ``analyse`` sees them: one rank, one step holding the window's sums."""
    compute = np.array([[[c for _, c, _ in LAYERS]]])
    window = Window(tuple(name for name, _, _ in LAYERS), ("node-a",), np.array([0], np.int32),
                    np.array([0], np.int32), np.array([0]), compute, np.array([[exchange]]),
                    compute.sum(axis=2) + sum(exchange))
    return analysis_to_json(analyse(window, None, Cluster()))["layers"]


def _layers(step: int) -> list[dict[str, Any]]:
    drift = (step % 100) / 1000.0
    analysed = _analysed_layers([round(exchange + drift, 6) for _, _, exchange in LAYERS])
    layers = []
    for index, (name, compute, exchange) in enumerate(LAYERS):
        exchange = round(exchange + drift, 6)
        worst = []
        for k in range(3):
            rank = (index * 5 + k * 7) % 24
            w_exchange = exchange * (1.6 - 0.2 * k)
            worst.append(
                {
                    "rank": rank,
                    "node": NODES[rank // RANKS_PER_NODE],
                    "compute_s": compute,
                    "exchange_s": round(w_exchange, 6),
                    "comm_fraction": w_exchange / (compute + w_exchange),
                    "compute_step_s": compute / STEPS,
                    "exchange_step_s": round(w_exchange / STEPS, 9),
                    "waits_on": {"rank": 8 + k, "node": NODES[2]} if k < 2 else None,
                }
            )
        layers.append(
            {
                "name": name,
                "compute_s": compute,
                "exchange_s": exchange,
                "comm_fraction": analysed[index]["comm_fraction"],
                "comm_fraction_worst": worst[0]["comm_fraction"],
                "comm_bound": analysed[index]["comm_bound"],
                "per_step": {"compute_s": compute / STEPS, "exchange_s": exchange / STEPS,
                             "compute_worst_s": compute * 1.2 / STEPS, "exchange_worst_s": exchange * 1.6 / STEPS},
                "worst_ranks": worst,
            }
        )
    return layers


def _links() -> list[dict[str, Any]]:
    links = []
    for i, src in enumerate(NODES):
        for j, dst in enumerate(NODES):
            if src == dst:
                continue
            slow = (src, dst) == SLOW
            beta = 2.1e9 if slow else 11.0e9 - 0.35e9 * ((i + 2 * j) % 5)
            throughput = beta * (0.62 if slow else 0.55)
            links.append(
                {
                    "src": src,
                    "dst": dst,
                    "bytes": 40_000_000_000 + 1_000_000 * (i * 6 + j),
                    "transfers": 2_400 + 10 * i + j,
                    "bandwidth_Bps": beta,
                    "latency_s": 0.0 if slow else 1.2e-5 + 1e-6 * ((i + j) % 3),
                    "latency_clamped": slow,
                    "throughput_Bps": throughput,
                    "nominal_Bps": NOMINAL,
                    "of_nominal": throughput / NOMINAL,
                    "slow": slow,
                    "score": -6.3 if slow else round(0.4 - 0.3 * ((i + 2 * j) % 5), 2),
                    "hours_at_stake": 1.3 if slow else 0.0,
                    "port": "node-c out" if slow else None,
                    "unexplained": False,
                }
            )
    return links


def _ports() -> list[dict[str, Any]]:
    """Every node's way out and in; node-c's way out is slow and explains the slow link."""
    ports = []
    for name in NODES:
        for direction in ("out", "in"):
            slow = (name, direction) == (SLOW[0], "out")
            ports.append({"node": name, "direction": direction, "capacity_Bps": 2.2e9 if slow else 11.0e9,
                          "slow": slow, "reason": "outlier" if slow else "", "score": -5.9 if slow else 0.1,
                          "explains": [list(SLOW)] if slow else [], "links": 5, "lower_bound": name == "node-f",
                          "nominal_Bps": NOMINAL, "nic_Bps": None, "nic_disagrees": False, "shadowed_by": None})
    return ports


def _nodes() -> list[dict[str, Any]]:
    return [
        {
            "name": name,
            "ranks": list(range(i * RANKS_PER_NODE, (i + 1) * RANKS_PER_NODE)),
            "cpu_percent": 62.0 + 3 * i,
            "memory_percent": 41.0 + i,
            "nic_out_Bps": (1.3e9 if name == "node-c" else 6.1e9) + 1e7 * i,
            "nic_in_Bps": (1.4e9 if name == "node-d" else 6.0e9) + 1e7 * i,
            "clock_offset_s": (-1) ** i * 2.0e-5 * (i + 1),
            "last_heard_s": 0.2 + 0.1 * i,
            "straggler": name == "node-d",
        }
        for i, name in enumerate(NODES)
    ]




def make_snapshot(step: int = 1210, *, replay: bool = False, **overrides: Any) -> dict[str, Any]:
    """The scenario at `step`; `overrides` replace top-level keys (after a deep copy)."""
    snapshot: dict[str, Any] = {
        "job": "llm-pretrain-7b",
        "source": {"kind": "replay" if replay else "live", "where": "tcp://10.0.0.1:5555"},
        "invented": True,
        "note": "demo scenario: a tired optic on node-c",
        "ranks": 24,
        "world": 24,
        "steps": step + 1,
        "last_step": step,
        "steps_per_s": round(2.31 - (step % 100) / 1000, 3),
        "window": {"first_step": step - 199, "last_step": step, "steps": 200},
        "layers": _layers(step),
        "links": _links(),
        "ports": _ports(),
        "nodes": _nodes(),
        "stragglers": [{"rank": 13, "node": "node-d", "compute_s": 0.41, "score": 4.8}],
        "efficiency": {
            "load_balance": 0.92,
            "communication": 0.77,
            "parallel": 0.7084,
            "serialisation": 0.85,
            "transfer": 0.906,
        },
        "speedup": {"workers": 24, "achieved": 17.0, "lost_to_interconnect": 5.08, "lost_to_imbalance": 1.92},
        "step_time": {
            "recent_s": 0.433,
            "trend": [0.40, 0.41, 0.40, 0.42, 0.41, 0.40, 0.43, 0.45, 0.47, 0.46, 0.48, 0.47, 0.44, 0.43],
        },
        "alerts": [
            {
                "kind": "link_bandwidth",
                "subject": "node-c→node-d",
                "step_began": 1180,
                "step_detected": 1204,
                "message": "β on node-c→node-d fell from 10.9 GB/s to 2.1 GB/s.",
            },
            {
                "kind": "step_time",
                "subject": "job",
                "step_began": 1185,
                "step_detected": 1209,
                "message": "Step time rose from 405 ms to 433 ms.",
            },
        ],
        "eta_s": 11_520.0,
        "hours_at_stake": 1.3,
        "loss": {
            "frames": 48_213,
            "missing": 3,
            "bad": 2,
            "bad_reasons": {"size cap": 1, "version": 1},
            "duplicates": 0,
            "dropped_at_senders": 5,
            "senders": 30,
        },
        "security": {
            "mode": "insecure",
            "warning": "listening on 0.0.0.0:5555 without CURVE keys (--insecure)",
        },
        "how": {key: {"definition": text, "source": source} for key, (text, source) in HOW.items()},
        "replay": (
            {"step": step, "first_step": 0, "last_step": 2400, "speed": 2.0, "paused": False} if replay else None
        ),
    }
    for key, value in overrides.items():
        snapshot[key] = copy.deepcopy(value)
    return snapshot
