"""Buckets traced to layers: the schema's ``carries`` from probe to snapshot, report and Layers view."""

from __future__ import annotations

import pytest

from agent import Probe, wire
from agent.clock import ManualClock
from watchtower.buckets import carried_label
from watchtower.cluster import Cluster
from watchtower.ingest import Ingest
from watchtower.snapshot import build_snapshot
from watchtower.tables import format_snapshot

BLOCKS = [f"encoder.layers.{i}.{part}" for i in range(12) for part in ("attn", "mlp")]


@pytest.mark.parametrize(("names", "label"), [
    (["encoder.layers.10.attn", "encoder.layers.10.mlp", "encoder.layers.11.attn"], "encoder.layers.10–11"),
    (["encoder.layers.3.mlp"], "encoder.layers.3.mlp"),  # one module: said whole
    (["embed", "encoder.layers.0.attn", "encoder.layers.1.mlp", "encoder.layers.3.attn", "head"],
     "embed, encoder.layers.0–1, encoder.layers.3 +1 more"),
    (["0", "2", "3"], "0, 2–3"),  # a bare nn.Sequential's leaves
])
def test_carried_label_folds_numbered_blocks(names: list[str], label: str) -> None:
    assert carried_label(names) == label


def test_schema_carries_survive_the_wire_and_bad_ones_are_refused() -> None:
    frames = wire.encode_schema(1, 0, 0, schema_id=1, rank=0, world=1, node="n", layers=["a", "b", "bucket"],
                                carries=[(2, (0, 1))])
    assert wire.decode(frames).carries == ((2, (0, 1)),)
    plain = wire.encode_schema(1, 0, 0, schema_id=1, rank=0, world=1, node="n", layers=["a"])
    assert b"carries" not in plain[1]  # a schema without buckets is byte-for-byte as before
    for bad in ([[2, [0, 5]]], [[2, [2]]], [[2, [0]], [2, [1]]], [[2, 0]], {"2": [0]}):
        body = plain[1].replace(b'"layers":["a"]', b'"layers":["a","b","c"]').replace(
            b'"job":""', b'"job":"","carries":' + str(bad).replace("'", '"').encode())
        header = wire.HEADER.pack(wire.MAGIC, wire.VERSION, wire.Kind.SCHEMA, 1, 0, 0, 3, len(body))
        with pytest.raises(wire.WireError, match="carries"):
            wire.decode([header, body])


def test_a_late_bucket_reads_as_the_layers_whose_gradients_it_carries() -> None:
    clock = ManualClock(1_000)
    probe = Probe(0, 1, "node-a", None, layers=BLOCKS, clock=clock, wall_clock=clock)
    probe.carries("ddp.bucket.3", BLOCKS[-4:])  # the last two blocks' gradients
    probe.carries("ddp.bucket.0", BLOCKS[:2])
    for _ in range(3):
        for name in BLOCKS:
            with probe.compute(name):
                clock.advance(1_000_000)
        probe.record_transfer("ddp.bucket.3", op=wire.Op.ALLREDUCE, group=1, nbytes=1 << 20,
                              start_ns=clock(), end_ns=clock() + 40_000_000, exposed_ns=40_000_000)
        clock.advance(40_000_000)
        probe.end_step()
    ingest = Ingest()
    for frames in probe.sent_frames:
        ingest.feed(clock(), frames)
    snapshot = build_snapshot(ingest, Cluster.default(), source={"kind": "recording", "where": "test"})
    layers = {layer["name"]: layer for layer in snapshot["layers"]}
    assert layers["ddp.bucket.3"]["carries"] == "encoder.layers.10–11"
    assert layers["ddp.bucket.0"]["carries"] == "encoder.layers.0"
    assert layers[BLOCKS[0]]["carries"] is None
    assert layers["ddp.bucket.3"]["exchange_s"] == pytest.approx(3 * 0.040)
    report = format_snapshot(snapshot)
    assert "ddp.bucket.3 (gradients of encoder.layers.10–11)" in report
