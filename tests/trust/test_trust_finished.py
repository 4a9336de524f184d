"""A job that ends is shown as finished, not stalled: a rank whose loop closes its probe signs off (SIGN_OFF,
docs/wire.md), and silence then means what it should, a rank that was killed or hangs.

Reproduced first: a 150-step job on four namespace nodes that ran to its end was reported a minute later
with five alerts ("rank N silent for 39 s", "no rank has advanced for 39 s")."""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest

from agent import Probe, wire
from agent.clock import ManualClock
from watchtower.ingest import Ingest
from watchtower.snapshot import build_snapshot, cluster_for
from watchtower.tables import format_snapshot

STEPS = 6
STEP_NS = 50_000_000
LATER_NS = 60 * 10**9  # looked at a minute after the last step: far past "silent" (2 s at least)


def _job(signing_off: set[int], ranks: int = 2) -> tuple[Ingest, int]:
    """Two seeded ranks run STEPS steps; those in ``signing_off`` then sign off. Their frames are fed to an
    ingest in arrival order; returns it and the arrival time of the last frame."""
    rng = np.random.default_rng(7)
    clocks = [ManualClock() for _ in range(ranks)]
    probes = [Probe(r, ranks, f"n{r}", None, clock=clocks[r], sender=100 + r) for r in range(ranks)]
    for _ in range(STEPS):
        for probe, clock in zip(probes, clocks, strict=True):
            with probe.compute("layer"):
                clock.advance(int(rng.uniform(1e6, 2e6)))
            probe.end_step()
    for rank in sorted(signing_off):
        assert probes[rank].sign_off() and probes[rank].sign_off()  # once only: the second sends nothing
    ingest = Ingest()
    arrival = 0
    for frames in (f for probe in probes for f in probe.sent_frames):
        arrival += STEP_NS // ranks
        ingest.feed(arrival, frames)
    return ingest, arrival


def _later(ingest: Ingest, last_ns: int) -> dict[str, Any]:
    return build_snapshot(ingest, cluster_for({}, None), source={"kind": "live", "where": "test"},
                          now_ns=last_ns + LATER_NS)


def test_a_sign_off_says_the_last_step_published_and_the_final_drop_count() -> None:
    clock = ManualClock()
    probe = Probe(0, 1, "n0", None, clock=clock)
    for _ in range(3):
        probe.end_step()
    probe.dropped = 4  # as if four frames had found the queue full
    probe.sign_off()
    probe.sign_off()
    messages = [wire.decode(f) for f in probe.sent_frames]
    sign_offs = [m for m in messages if isinstance(m, wire.SignOff)]
    assert len(sign_offs) == 1 and messages[-1] is not None and isinstance(messages[-1], wire.SignOff)
    assert (sign_offs[0].last_step, sign_offs[0].dropped_total) == (2, 4)


def test_a_forged_sign_off_is_refused_by_reason() -> None:
    frames = wire.encode_sign_off(1, 0, 0, last_step=-2, dropped_total=0)
    with pytest.raises(wire.WireError) as refused:
        wire.decode(frames)
    assert refused.value.reason == "bad-sign-off"
    with pytest.raises(wire.WireError) as short:
        wire.decode([frames[0], frames[1][:-1]])
    assert short.value.reason == "bad-meta-size"


def test_a_job_whose_ranks_all_signed_off_is_finished_not_stalled() -> None:
    ingest, last = _job({0, 1})
    snap = _later(ingest, last)
    live = snap["liveness"]
    assert live["finished"] and not live["stalled"] and live["silent_ranks"] == []
    assert all(r["finished"] and not r["silent"] for r in live["ranks"])
    assert not {"rank-silent", "job-stalled"} & {a["kind"] for a in snap["alerts"]}
    assert snap["steps_per_s"] == 0.0 and snap["eta_s"] == 0.0
    assert "finished (every rank signed off)" in format_snapshot(snap, width=120)
    assert ingest.ledger.as_json()["rejected"] == 0


def test_a_rank_that_never_signed_off_is_still_silent_and_the_job_stalled() -> None:
    ingest, last = _job({0})  # rank 1 was killed, or hangs: it said nothing more
    live = _later(ingest, last)["liveness"]
    assert [r["finished"] for r in live["ranks"]] == [True, False]
    assert live["silent_ranks"] == [1] and live["stalled"] and not live["finished"]


def test_without_sign_offs_silence_is_judged_as_before() -> None:
    ingest, last = _job(set())
    snap = _later(ingest, last)
    assert snap["liveness"]["stalled"] and sorted(snap["liveness"]["silent_ranks"]) == [0, 1]
    assert "job-stalled" in {a["kind"] for a in snap["alerts"]}


def test_the_final_drop_count_reaches_the_ledger_even_when_the_last_frame_is_no_step() -> None:
    clock = ManualClock()
    probe = Probe(0, 1, "n0", None, clock=clock, sender=9)
    probe.end_step()
    probe.dropped = 3
    probe._schema_dirty = True  # the next frame a schema repeat: the step frames still say 0
    probe.sign_off()
    ingest = Ingest()
    for at, frames in enumerate(probe.sent_frames):
        ingest.feed(at + 1, frames)
    assert ingest.ledger.as_json()["dropped_at_senders"] == 3
