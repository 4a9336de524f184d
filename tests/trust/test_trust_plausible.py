"""Plausibility at the door: frames that are well-formed but physically impossible are counted bad with a
reason and never ingested, and the efficiencies cannot be forged out of [0, 1].

Reproduced first: valid-looking forged frames with times of 2^62 ns, a step of 2^62 and a sequence jump of
10^15 gave "parallel efficiency 200%", "lost to the interconnect -1.0" and "missing 999,999,999,999,994".
"""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from agent import wire
from watchtower.ingest import Ingest
from watchtower.snapshot import build_snapshot, cluster_for

S = 1_000_000_000
T0 = 1_750_000_000 * S  # the run's start on the collector's clock
LAYERS = ("embed", "attn")


def step_frames(sender: int, seq: int, step: int, *, compute_ns: int = 3_000_000, exchange_ns: int = 1_000_000,
                duration_ns: int = 5_000_000, nbytes: int = 1 << 16, peer: int = 1) -> list[bytes]:
    layer_ns = np.array([[compute_ns, compute_ns], [exchange_ns, exchange_ns]], dtype=np.int64)
    table = np.zeros((len(wire.EXCHANGE_COLUMNS), 1), dtype=np.int64)
    table[wire.X_OP], table[wire.X_PEER], table[wire.X_NBYTES] = wire.Op.RECV, peer, nbytes
    table[wire.X_START], table[wire.X_END], table[wire.X_WAIT] = 0, exchange_ns, wire.UNKNOWN_WAIT
    return wire.encode_step(sender, seq, T0 + min(step, 10**6) * 5_000_000, step=step, duration_ns=duration_ns,
                            dropped_total=0, schema_id=1, layer_ns=layer_ns, exchanges=table)


def honest_run(steps: int = 40) -> Ingest:
    """Two ranks on two nodes, one step every 5 ms; sender r + 1 is rank r, its frame n is step n - 1."""
    ingest = Ingest()
    for rank in range(2):
        ingest.feed(T0, wire.encode_schema(rank + 1, 0, T0, schema_id=1, rank=rank, world=2, node=f"n{rank}",
                                           layers=LAYERS, job="honest"))
    for step in range(steps):
        for rank in range(2):
            ingest.feed(T0 + (step + 1) * 5_000_000, step_frames(rank + 1, step + 1, step, peer=1 - rank))
    return ingest


def snapshot(ingest: Ingest) -> dict:
    return build_snapshot(ingest, cluster_for({}, None), source={"kind": "recording", "where": "test"})


FORGED = {
    "implausible-time": lambda: step_frames(1, 41, 40, compute_ns=1 << 62, duration_ns=1 << 62),
    "implausible-step": lambda: step_frames(1, 41, 1 << 62),
    "implausible-seq": lambda: step_frames(1, 10**15, 40),
    "implausible-bytes": lambda: step_frames(1, 41, 40, nbytes=1 << 62),
}


def test_the_issues_forged_frames_are_counted_bad_by_reason_and_change_no_figure() -> None:
    honest = snapshot(honest_run())
    ingest = honest_run()
    for reason, forge in FORGED.items():
        before = ingest.ledger.bad[reason]
        assert ingest.feed(T0 + 41 * 5_000_000, forge()) is None
        assert ingest.ledger.bad[reason] == before + 1, reason
    forged = snapshot(ingest)
    assert forged["loss"]["missing"] == 0 and forged["last_step"] == 39 and forged["steps"] == 40
    for key in ("efficiency", "speedup"):
        assert forged[key] == honest[key]
    assert 0.0 <= forged["efficiency"]["parallel"] <= 1.0


def test_an_honest_next_frame_is_still_accepted_after_the_forged_ones() -> None:
    ingest = honest_run()
    for forge in FORGED.values():
        ingest.feed(T0 + 41 * 5_000_000, forge())
    assert ingest.feed(T0 + 41 * 5_000_000, step_frames(1, 41, 40)) is not None
    assert ingest.ledger.missing == 0 and ingest.store.last_step == 40


def test_a_sender_joining_late_and_a_collector_started_late_are_plausible() -> None:
    """A collector started hours into a run sees large sequence numbers, step indices and wall stamps."""
    ingest = Ingest()
    ingest.feed(T0, wire.encode_schema(7, 5_000_000, T0, schema_id=1, rank=0, world=1, node="n0", layers=LAYERS))
    assert ingest.feed(T0 + S, step_frames(7, 5_000_001, 2_000_000, duration_ns=3600 * S)) is not None
    assert ingest.ledger.bad_total == 0


SECONDS = st.integers(0, 10 * S)


@settings(max_examples=60, deadline=None, derandomize=True, database=None)
@given(st.lists(st.tuples(st.integers(0, 1), st.integers(0, 30), SECONDS, SECONDS, SECONDS, SECONDS),
                min_size=1, max_size=40))
def test_for_any_accepted_input_efficiencies_stay_in_0_1_and_the_speedup_split_is_non_negative(
        steps: list[tuple[int, int, int, int, int, int]]) -> None:
    """POP efficiencies (Wagner et al., POP CoE "Performance metrics", 2017: LB = mean U / max U,
    CommE = max U / T, each at most 1 by definition) and the split p = p·LB·CommE + p·LB·(1 − CommE) +
    p·(1 − LB), whatever times the ranks report (compute longer than the step included)."""
    ingest = Ingest()
    for rank in range(2):
        ingest.feed(T0, wire.encode_schema(rank + 1, 0, T0, schema_id=1, rank=rank, world=2, node=f"n{rank}",
                                           layers=LAYERS))
    seq = [1, 1]
    for rank, step, compute, exchange, duration, _ in steps:
        ingest.feed(T0 + 20 * S, step_frames(rank + 1, seq[rank], step, compute_ns=compute, exchange_ns=exchange,
                                             duration_ns=duration, peer=1 - rank))
        seq[rank] += 1
    snap = snapshot(ingest)
    for name, value in snap["efficiency"].items():
        assert value is None or 0.0 <= value <= 1.0, (name, value)
    speed = snap["speedup"]
    for part in ("achieved", "lost_to_interconnect", "lost_to_imbalance"):
        assert speed[part] is None or speed[part] >= 0.0, (part, speed)
