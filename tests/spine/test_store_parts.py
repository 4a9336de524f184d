"""A gathered window (``Store.window_parts``) is what the store held when it was taken, while ingest goes on.

`collect` takes it between drains and stacks it on the publisher's thread; ingest then writes to copies of
the steps it holds (copy on write), so the figures are those of one moment, never half of a later frame."""

from __future__ import annotations

import numpy as np

from agent import wire
from watchtower.ingest import Ingest

LAYERS = ["a", "b", "c"]


def step_frames(rank: int, seq: int, step: int, compute_ns: int) -> list[bytes]:
    layer_ns = np.array([[compute_ns] * len(LAYERS), [1_000] * len(LAYERS)], np.int64)
    return wire.encode_step(rank + 1, seq, 1_000_000_000 * (step + 1), step=step, duration_ns=5_000_000,
                            dropped_total=0, schema_id=1, layer_ns=layer_ns,
                            exchanges=np.zeros((len(wire.EXCHANGE_COLUMNS), 0), np.int64))


def test_a_gathered_window_keeps_its_moment_while_ingest_writes_on() -> None:
    ingest = Ingest()
    for rank in range(2):
        ingest.feed(1, wire.encode_schema(rank + 1, 0, 1, schema_id=1, rank=rank, world=3, node=f"n{rank}",
                                          layers=LAYERS))
        for step in range(2):
            ingest.feed(2, step_frames(rank, step + 1, step, 2_000_000))
    parts = ingest.store.window_parts()
    # a late frame rewrites a held step, and a third rank joins (every step's arrays grow)
    ingest.feed(3, step_frames(0, 3, 0, 7_000_000))
    ingest.feed(4, wire.encode_schema(3, 0, 1, schema_id=1, rank=2, world=3, node="n2", layers=LAYERS))
    ingest.feed(5, step_frames(2, 1, 1, 3_000_000))
    then, now = parts.build(), ingest.store.window()
    assert then.steps.tolist() == [0, 1] and then.ranks.tolist() == [0, 1]
    np.testing.assert_array_equal(then.compute_s, np.full((2, 2, 3), 2e-3))  # as gathered: 2 ms everywhere
    assert now.ranks.tolist() == [0, 1, 2] and now.compute_s[0, 0, 0] == 7e-3  # the store moved on
    assert now.compute_s[1, 2, 0] == 3e-3 and np.isnan(now.compute_s[0, 2, 0])
