"""Batched decode and recording give exactly what one message at a time gives.

The same seeded stream (schemas, steps of several ranks with point-to-point and collective exchanges,
node samples, clock offsets, ticks and notes, and hostile messages: malformed, duplicated, reordered,
implausible, oversize, from unknown senders) goes through ``Ingest.feed`` one by one and through
``Ingest.feed_many`` in drains of random sizes. The ledger (per sender and bad frames by reason) and every
store figure must be identical: bit for bit, NaNs in the same places. Recording a drain with one
``os.writev`` must write the bytes that one ``encode_record`` per message writes.
"""

from __future__ import annotations

import contextlib
import io
import os
import random
from pathlib import Path

import numpy as np
import pytest

from agent import records, wire
from agent.records import encode_note, encode_record, fits
from watchtower.ingest import Ingest
from watchtower.recording import Recorder, Tail, iter_records, read_meta

RANKS, NODES, LAYERS = 8, 3, 6


def _step(rng: np.random.Generator, sender: int, seq: int, rank: int, step: int, wall: int) -> list[bytes]:
    n = int(rng.integers(0, 12))
    table = np.zeros((len(wire.EXCHANGE_COLUMNS), n), np.int64)
    table[wire.X_LAYER] = rng.integers(0, LAYERS, n)
    ops = rng.choice([wire.Op.SEND, wire.Op.RECV, wire.Op.RECV, wire.Op.ALLREDUCE, wire.Op.BROADCAST], n)
    table[wire.X_OP] = ops
    collective = np.isin(ops, [wire.Op.ALLREDUCE, wire.Op.BROADCAST])
    table[wire.X_PEER] = np.where(collective, wire.NO_PEER, (rank + rng.integers(1, RANKS, n)) % RANKS)
    table[wire.X_GROUP] = np.where(collective, RANKS, 0)
    table[wire.X_NBYTES] = rng.integers(1, 1 << 24, n)
    table[wire.X_START] = rng.integers(0, 10**6, n)
    table[wire.X_END] = table[wire.X_START] + rng.integers(1, 10**6, n)
    table[wire.X_WAIT] = np.where(rng.random(n) < 0.3, wire.UNKNOWN_WAIT, rng.integers(-1000, 1000, n))
    layer_ns = rng.integers(0, 10**6, (2, LAYERS))
    return wire.encode_step(sender, seq, wall, step=step, duration_ns=int(rng.integers(1, 10**7)),
                            dropped_total=seq // 50, schema_id=1, layer_ns=layer_ns, exchanges=table)


def _spoil(rng: np.random.Generator, frames: list[bytes]) -> list[bytes]:
    """One of the ways a message goes wrong on the wire (each refused by ``decode`` with its own reason)."""
    frames = list(frames)
    how = int(rng.integers(0, 9))
    if how == 0:
        frames[3] = frames[3][:-8]  # truncated table
    elif how == 1:
        frames[0] = b"xxxx" + frames[0][4:]  # bad magic
    elif how == 2 and len(frames[3]) >= 64:  # negative byte count in the first exchange
        table = np.frombuffer(frames[3], np.int64).reshape(8, -1).copy()
        table[wire.X_NBYTES, 0] = -1
        frames[3] = table.tobytes()
    elif how == 3 and len(frames[3]) >= 64:  # an unknown operation
        table = np.frombuffer(frames[3], np.int64).reshape(8, -1).copy()
        table[wire.X_OP, -1] = 99
        frames[3] = table.tobytes()
    elif how == 4:
        frames = frames[:3]  # a part missing
    elif how == 5:  # a negative layer time
        layers = np.frombuffer(frames[2], np.int64).copy()
        layers[-1] = -5
        frames[2] = layers.tobytes()
    elif how == 6:  # a step ahead of the others by more than any run
        meta = list(wire.STEP_META.unpack(frames[1]))
        meta[0] += 10**7
        frames[1] = wire.STEP_META.pack(*meta)
    elif how == 7:  # lying layer count
        head = list(wire.HEADER.unpack(frames[0]))
        head[6] += 1
        frames[0] = wire.HEADER.pack(*head)
    else:  # an absurd exchange size: implausible, not malformed
        if len(frames[3]) >= 64:
            table = np.frombuffer(frames[3], np.int64).reshape(8, -1).copy()
            table[wire.X_NBYTES, 0] = 1 << 45
            frames[3] = table.tobytes()
    return frames


def stream(seed: int, count: int = 1500) -> list[tuple[int, list[bytes]]]:
    """A seeded stream of records as a collector receives them (time, frames), hostile ones mixed in."""
    rng = np.random.default_rng(seed)
    names = [f"layer.{i}" for i in range(LAYERS)]
    seqs = [0] * RANKS
    out: list[tuple[int, list[bytes]]] = []
    now = 1_700_000_000_000_000_000
    daemon = 1000
    pending: list[tuple[int, list[bytes]]] = []  # held back, delivered later (reordering)

    def send(rank: int) -> int:
        seqs[rank] += 1
        return seqs[rank] - 1

    for rank in range(RANKS - 1):  # the last rank announces itself late: its first steps are unknown-schema
        layers = names if rank % 2 else names[::-1]  # two layer orders: the store maps columns
        out.append((now, wire.encode_schema(rank + 1, send(rank), now, schema_id=1, rank=rank, world=RANKS,
                                            node=f"node-{rank % NODES}", layers=layers, job="job")))
    out.append((now, wire.encode_schema(daemon, 0, now, schema_id=1, rank=-1, world=1, node="node-0", layers=())))
    daemon_seq = 1
    step = 0
    while len(out) < count:
        now += int(rng.integers(1, 10**6))
        kind = rng.random()
        rank = int(rng.integers(0, RANKS))
        if kind < 0.72:
            frames = _step(rng, rank + 1, send(rank), rank, step + int(rng.integers(0, 3)), now)
            if rng.random() < 0.08:
                frames = _spoil(rng, frames)
            if rng.random() < 0.05:
                pending.append((now, frames))
                continue
            out.append((now, frames))
            if rng.random() < 0.04:
                out.append((now + 1, frames))  # a duplicate
            if rng.random() < 0.1:
                step += 1
        elif kind < 0.76 and rank == RANKS - 1 and seqs[rank] > 5:
            out.append((now, wire.encode_schema(rank + 1, send(rank), now, schema_id=1, rank=rank, world=RANKS,
                                                node=f"node-{rank % NODES}", layers=names, job="job")))
        elif kind < 0.8:
            out.append((now, wire.encode_offset(rank + 1, send(rank), now, int(rng.integers(-10**6, 10**6)), 5000)))
        elif kind < 0.84:
            out.append((now, wire.encode_node(daemon, daemon_seq, now, cpu_percent=10.0, memory_percent=20.0,
                                              interval_s=1.0, nics=("eth0",), nic_values=rng.random((4, 1)) * 1e6)))
            daemon_seq += 1
        elif kind < 0.86:
            out.append((now, []))  # a tick
        elif kind < 0.87:
            out.append((now, encode_note({"refused": {"unlisted-key": 2}})))
        elif kind < 0.9:
            send(rank)  # a frame lost on the way: a gap
        elif kind < 0.92:
            out.append((now, [b"\x00" * int(rng.integers(0, 50))]))
        elif kind < 0.93:
            out.append((now, [wire.HEADER.pack(wire.MAGIC, 1, wire.Kind.STEP, rank + 1, send(rank), now, 1, 1),
                              b"\x00" * 32, b"\x00" * 16, b"\x00" * (records.MAX_MESSAGE_BYTES + 1)]))  # oversize
        elif pending:
            out.append(pending.pop(0))  # a late one fills its gap
    return out


def one_by_one(records_: list[tuple[int, list[bytes]]]) -> Ingest:
    ingest = Ingest()
    for t, frames in records_:
        ingest.feed(t, frames)
    return ingest


def batched(records_: list[tuple[int, list[bytes]]], seed: int) -> Ingest:
    rng = random.Random(seed)
    ingest = Ingest()
    at = 0
    while at < len(records_):
        n = rng.choice([1, 2, 7, 64, 300])
        ingest.feed_many(records_[at:at + n])
        at += n
    return ingest


def assert_same(a: Ingest, b: Ingest) -> None:
    assert a.ledger.as_json() == b.ledger.as_json()
    assert a.ledger.bad == b.ledger.bad
    assert a.ledger.senders == b.ledger.senders  # next_seq, received, missing, duplicates, gaps, drops, times
    assert (a.steps, a.last_received_ns, a.first_received_ns) == (b.steps, b.last_received_ns, b.first_received_ns)
    sa, sb = a.store, b.store
    assert (sa.layers, sa.world, sa.job, sa.steps_seen, sa.last_step, sa.unknown_sender_steps, sa.epoch_ns) == \
        (sb.layers, sb.world, sb.job, sb.steps_seen, sb.last_step, sb.unknown_sender_steps, sb.epoch_ns)
    assert sa.ranks.keys() == sb.ranks.keys()
    for rank, info in sa.ranks.items():
        other = sb.ranks[rank]
        assert (info.last_wall_ns, info.last_step, info.last_heard_ns, info.step_s, info.offset_ns) == \
            (other.last_wall_ns, other.last_step, other.last_heard_ns, other.step_s, other.offset_ns)
    assert [(n.name, n.last_heard_ns, n.offset_ns) for n in sa.nodes] == [(n.name, n.last_heard_ns, n.offset_ns)
                                                                         for n in sb.nodes]
    for x, y in zip(sa.totals_ns(), sb.totals_ns(), strict=True):
        np.testing.assert_array_equal(x, y)
    wa, wb = sa.window(), sb.window()
    for field in ("ranks", "rank_node", "steps", "compute_s", "exchange_s", "step_s"):
        np.testing.assert_array_equal(getattr(wa, field), getattr(wb, field))
    for part in ("transfers", "collectives"):
        pa, pb = getattr(wa, part), getattr(wb, part)
        for field in pa.__dataclass_fields__:
            np.testing.assert_array_equal(getattr(pa, field), getattr(pb, field), err_msg=f"{part}.{field}")
    ra, rb = sa.series(), sb.series()
    assert ra.links == rb.links
    for field in ("steps", "step_s", "link_bytes", "link_transfer_s", "link_watch_Bps"):
        np.testing.assert_array_equal(getattr(ra, field), getattr(rb, field))


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_a_hostile_stream_gives_the_same_ledger_and_figures_batched_or_one_by_one(seed: int) -> None:
    records_ = stream(seed)
    alone, together = one_by_one(records_), batched(records_, seed)
    assert_same(alone, together)
    bad = alone.ledger.bad  # the stream exercised what it claims to: each hostile kind was refused
    for reason in ("bad-length", "bad-magic", "bad-exchange", "bad-part-count", "bad-timing", "implausible-step",
                   "implausible-bytes", "unknown-schema", "bad-header-size"):
        assert bad[reason] > 0, (reason, dict(bad))
    assert alone.ledger.duplicates > 0 and alone.ledger.missing > 0 and alone.steps > 500
    assert len(alone.store.series().links) > 1 and alone.store.window().collectives.step.size > 0


def _steps_with(sender: int, seq: int, step: int, recv_from: list[int] | None = None) -> list[bytes]:
    table = np.zeros((len(wire.EXCHANGE_COLUMNS), len(recv_from or [])), np.int64)
    table[wire.X_OP] = wire.Op.RECV
    table[wire.X_PEER] = recv_from or []
    table[wire.X_NBYTES] = 1000
    table[wire.X_END] = 500
    return wire.encode_step(sender, seq, 10**18 + seq, step=step, duration_ns=1000, dropped_total=0, schema_id=1,
                            layer_ns=np.ones((2, 1), np.int64), exchanges=table)


def _schema(sender: int, rank: int, node: str, seq: int = 0) -> list[bytes]:
    return wire.encode_schema(sender, seq, 10**18, schema_id=1, rank=rank, world=3, node=node, layers=["l"])


def test_checks_that_depend_on_order_see_the_messages_before_them_in_the_same_drain() -> None:
    """In one drain: a step far past a step stored just before it is implausible; a step before its sender's
    schema is unknown, one after it is stored; a repeat is a duplicate; a link first seen first stays first
    even when its step's slab comes later in the drain."""
    drain = [
        (10**18, _steps_with(3, 0, 0)),  # rank 2's schema has not come yet: unknown-schema
        (10**18, _schema(1, 0, "a")), (10**18, _schema(2, 1, "b")), (10**18, _schema(3, 2, "c", seq=1)),
        (10**18 + 1, _steps_with(1, 1, 0)),
        (10**18 + 2, _steps_with(2, 1, 2_000_000)),  # more than 10^6 steps past step 0: implausible-step
        (10**18 + 3, _steps_with(3, 2, 5, recv_from=[0])),  # link a -> c, step 5
        (10**18 + 4, _steps_with(2, 2, 4, recv_from=[0])),  # link a -> b, step 4
        (10**18 + 5, _steps_with(1, 2, 5, recv_from=[1])),  # link b -> a, step 5 again
        (10**18 + 6, _steps_with(1, 2, 5, recv_from=[1])),  # a repeat: duplicate
    ]
    alone, together = one_by_one(drain), Ingest()
    together.feed_many(drain)
    assert_same(alone, together)
    assert dict(alone.ledger.bad) == {"unknown-schema": 1, "implausible-step": 1} and alone.ledger.duplicates == 1
    nodes = [n.name for n in alone.store.nodes]
    assert [(nodes[s], nodes[d]) for s, d in together.store.series().links] == [("a", "c"), ("a", "b"), ("b", "a")]


def test_decode_steps_decodes_what_decode_does_and_leaves_the_rest() -> None:
    """The batched decoder returns for each plainly valid STEP the very fields and arrays ``decode`` returns,
    and leaves every other message (any kind, anything malformed) to ``decode``."""
    records_ = stream(4, 800)
    batch = wire.decode_steps([frames for _, frames in records_])
    decoded = 0
    for (_, frames), step in zip(records_, batch.steps, strict=True):
        if step is None:
            continue
        alone = wire.decode(frames)
        assert isinstance(alone, wire.Step) and alone.header == step.header
        assert (alone.step, alone.duration_ns, alone.dropped_total, alone.schema_id) == \
            (step.step, step.duration_ns, step.dropped_total, step.schema_id)
        np.testing.assert_array_equal(alone.layer_ns, step.layer_ns)
        np.testing.assert_array_equal(alone.exchanges, step.exchanges)
        decoded += 1
    steps_decodable = 0
    for _, frames in records_:
        with contextlib.suppress(wire.WireError):
            steps_decodable += isinstance(wire.decode(frames), wire.Step)
    assert decoded == steps_decodable > 400  # nothing valid was left out


def test_a_drain_recorded_with_one_writev_holds_the_bytes_of_one_record_per_message(tmp_path: Path) -> None:
    records_ = stream(5, 600)
    path = tmp_path / "batched.wtrace"
    recorder = Recorder(path, {"who": "test"})
    calls = []
    real = os.writev

    def counting(fd: int, buffers: list) -> int:
        calls.append(len(buffers))
        return real(fd, buffers)

    os.writev = counting
    try:
        for at in range(0, len(records_), 100):
            recorder.write_many(records_[at:at + 100])
    finally:
        os.writev = real
    recorder.close()
    assert len(calls) == 6  # one writev per drain
    blob = path.read_bytes()
    start = blob.index(b"}") + 1  # after the preamble's metadata
    assert blob[start:] == b"".join(encode_record(t, frames) for t, frames in records_ if fits(frames))
    stream_ = io.BytesIO(blob)
    read_meta(stream_)
    tail = Tail()
    back = [(t, [bytes(f) for f in frames]) for t, frames in iter_records(stream_, tail)]
    assert tail.clean and back == [(t, [bytes(f) for f in frames]) for t, frames in records_ if fits(frames)]
    assert_same(one_by_one([r for r in records_ if fits(r[1])]), _replayed(path))  # oversize: never recorded


def _replayed(path: Path) -> Ingest:
    """The recording through ``feed_all`` (batched), as ``report`` and replay read it."""
    with open(path, "rb") as stream_:
        read_meta(stream_)
        ingest = Ingest()
        ingest.feed_all(iter_records(stream_, Tail()), batch=97)
    return ingest


def test_writev_goes_on_after_short_writes_and_past_the_iov_limit(tmp_path: Path, monkeypatch: pytest.MonkeyPatch
                                                                    ) -> None:
    """A writev may write less than asked (a signal, a nearly full disk) and takes at most IOV_MAX buffers:
    the writer goes on from the exact byte where it stopped."""
    monkeypatch.setattr(records, "IOV_MAX", 5)
    real = os.writev

    def short(fd: int, buffers: list) -> int:
        return real(fd, [memoryview(b"".join(buffers))[:37]])  # 37 bytes at most, splitting pieces anywhere

    monkeypatch.setattr(os, "writev", short)
    records_ = stream(6, 200)
    path = tmp_path / "short.wtrace"
    with Recorder(path, {}) as recorder:
        recorder.write_many(records_)
    blob = path.read_bytes()
    assert blob[blob.index(b"}") + 1:] == b"".join(encode_record(t, f) for t, f in records_ if fits(f))


def test_a_full_disk_mid_writev_stops_recording_and_resumes_after_a_marker(tmp_path: Path,
                                                                          monkeypatch: pytest.MonkeyPatch) -> None:
    """ENOSPC in the middle of a drain's writev: the records that reached the file whole are counted, the rest
    are unrecorded, and recording resumes after a marker that lets a reader step over the torn one."""
    room = [3000]
    real = os.writev

    def filling(fd: int, buffers: list) -> int:
        if room[0] <= 0:
            raise OSError(28, os.strerror(28))
        data = memoryview(b"".join(buffers))[:room[0]]
        room[0] -= len(data)
        return real(fd, [data])

    monkeypatch.setattr(os, "writev", filling)
    now = [0.0]
    path = tmp_path / "full.wtrace"
    recorder = Recorder(path, {}, retry_s=1.0, clock=lambda: now[0])
    messages = [(i, [b"m" * 90]) for i in range(60)]  # 108 bytes a record
    recorder.write_many(messages)
    assert recorder.status()["state"] == "stopped" and recorder.status()["reason"] == "disk full"
    whole = recorder.records
    assert whole == 3000 // len(encode_record(0, [b"m" * 90])) and path.stat().st_size > 0
    assert recorder.unrecorded == 60 - whole
    room[0] = 10_000
    now[0] = 2.0
    recorder.write_many([(100, [b"after"])])
    assert recorder.status()["state"] == "recording"
    recorder.close()
    stream_ = io.BytesIO(path.read_bytes())
    read_meta(stream_)
    tail = Tail()
    times = [t for t, frames in iter_records(stream_, tail) if frames and bytes(frames[0][:2]) != b"wt"]
    assert times == [*range(whole), 100] and tail.resumes == 1 and tail.offset is None
