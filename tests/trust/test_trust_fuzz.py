"""Hostile input: whatever arrives, nothing crashes, every frame is either delivered once, counted as a
duplicate, or rejected and counted with its reason; names are kept literally and shown inert."""

from __future__ import annotations

import math
import random
import struct
import threading
import unicodedata
from pathlib import Path

import numpy as np
import pytest
import zmq
from hypothesis import given, settings
from hypothesis import strategies as st
from trust_helpers import ingest, wait_for

from agent import wire
from watchtower import ingest as ingest_mod
from watchtower.collector import Collector
from watchtower.console.format import literal
from watchtower.ingest import Ingest
from watchtower.ledger import LATE_MEMORY, Ledger
from watchtower.recording import Recorder

FUZZ = settings(max_examples=1500, deadline=None, derandomize=True, database=None)
U32 = st.integers(0, (1 << 32) - 1)
SENDER = 77
UNSAFE = {"Cc", "Cf", "Zl", "Zp"}  # control and format characters, line and paragraph separators
REASONS = {"empty", "bad-header-size", "bad-magic", "bad-version", "bad-kind", "bad-part-count", "bad-meta-size",
           "bad-length", "oversize", "bad-text", "bad-name", "bad-schema", "bad-step", "bad-timing", "bad-exchange",
           "bad-sample", "bad-check", "unexpected-kind", "unknown-schema", "implausible-time", "implausible-step",
           "implausible-seq", "implausible-bytes", "bad-note"}


def header(kind: int, seq: int, count_a: int, count_b: int, magic: bytes = wire.MAGIC, version: int = 1) -> bytes:
    return wire.HEADER.pack(magic, version, kind, SENDER, seq, 0, count_a, count_b)


def schema(layers: int = 3, seq: int = 0) -> list[bytes]:
    return wire.encode_schema(SENDER, seq, 0, schema_id=1, rank=0, world=2, node="n0",
                              layers=[f"l{i}" for i in range(layers)])


def feed_checked(state: Ingest, frames: list[bytes]) -> wire.Message | None:
    """Feed one message; exactly one of delivered / duplicate / rejected (with a known reason) must move."""
    ledger = state.ledger
    before = (ledger.frames, ledger.duplicates, ledger.bad_total)
    message = state.feed(1, frames)
    after = (ledger.frames, ledger.duplicates, ledger.bad_total)
    moved = [b - a for a, b in zip(before, after, strict=True)]
    if not frames:  # a record without frames is the collector's clock tick (the collector refuses empty messages)
        assert moved == [0, 0, 0] and message is None
        return message
    # a STEP whose schema is unknown is delivered by sequence *and* rejected: it counts in both
    assert sum(moved) in (1, 2) and all(m in (0, 1) for m in moved), moved
    assert set(ledger.bad) <= REASONS
    return message


# ------------------------------------------------------------------------------------------ any bytes

frames_anything = st.lists(st.binary(max_size=64), max_size=6)
header_like = st.builds(header, st.integers(0, 8), st.integers(0, 5), U32, U32,
                        st.sampled_from([wire.MAGIC, b"wtwX"]), st.sampled_from([1, 1, 1, 2]))


@settings(FUZZ, max_examples=1000)
@given(st.lists(st.one_of(frames_anything, st.tuples(header_like, frames_anything).map(lambda t: [t[0], *t[1]])),
                min_size=1, max_size=8))
def test_arbitrary_frames_never_crash_and_are_all_accounted(messages: list[list[bytes]]) -> None:
    state = Ingest()
    feed_checked(state, schema())
    for frames in messages:
        feed_checked(state, frames)


# ------------------------------------------------------------------------------------------ steps

EXTREMES = np.array([-(1 << 63), -1, 0, 1, (1 << 63) - 1], np.int64)
OPS = np.array([*(int(op) for op in wire.Op), -1, 2, 255, 256], np.int64)
PEERS = np.array([-(1 << 63), -5, -1, 0, 1, 2, 1 << 20, 1 << 62], np.int64)


@st.composite
def hostile_step(draw: st.DrawFn) -> list[bytes]:
    """A STEP whose structure may be right while its figures are not: huge counts, negative times,
    ends before starts, wild peers and ops, INT64 extremes; lengths sometimes off by a little. Mostly
    plausible, so the later checks (and the store) are reached too. Array contents come from a drawn seed
    (fast to generate, still reproducible)."""
    layers = draw(st.sampled_from([3, 3, 3, 3, 0, 1, 4, wire.MAX_LAYERS + 1, (1 << 32) - 1]))
    exchanges = draw(st.sampled_from([0, 1, 2, 5, 8, wire.MAX_EXCHANGES + 1, (1 << 32) - 1]))
    real_l, real_e = min(layers, 8), min(exchanges, 8)
    meta = wire.STEP_META.pack(draw(st.sampled_from([0, 5, 1 << 40, -3])), draw(st.sampled_from([0, 7, 1 << 40, -5])),
                               draw(st.integers(0, (1 << 64) - 1)), draw(st.sampled_from([1, 1, 1, 0, 2])), 0)
    rng = np.random.default_rng(draw(st.integers(0, 1 << 32)))
    extreme = draw(st.sampled_from([0.0, 0.0, 0.02, 0.3]))  # share of cells holding INT64 extremes
    layer_ns = rng.integers(0, 10_000, (2, real_l)) - (rng.random((2, real_l)) < 0.05)
    table = rng.integers(0, 3000, (8, real_e))
    table[wire.X_LAYER] = np.where(rng.random(real_e) < 0.9, rng.integers(0, max(real_l, 1), real_e), real_l)
    table[wire.X_OP] = rng.choice(OPS, real_e)
    table[wire.X_PEER] = rng.choice(PEERS, real_e)
    table[wire.X_END] = table[wire.X_START] + rng.integers(-1, 1000, real_e)
    table[wire.X_WAIT] = np.where(rng.random(real_e) < 0.5, wire.UNKNOWN_WAIT, rng.integers(-500, 500, real_e))
    for array in (layer_ns, table):
        mask = rng.random(array.shape) < extreme
        array[mask] = rng.choice(EXTREMES, int(mask.sum()))
    slack = draw(st.sampled_from([0, 0, 0, 0, 1, -1]))
    layer_bytes = layer_ns.astype(np.int64).tobytes()
    return [header(wire.Kind.STEP, 0, layers, exchanges), meta,
            layer_bytes[: max(0, len(layer_bytes) + slack)], table.astype(np.int64).tobytes()]


@FUZZ
@given(st.lists(hostile_step(), min_size=1, max_size=5))
def test_hostile_steps_are_rejected_or_stored_sanely(steps: list[list[bytes]]) -> None:
    state = Ingest()
    feed_checked(state, schema())
    for seq, frames in enumerate(steps, start=1):
        frames[0] = frames[0][:16] + struct.pack("<Q", seq) + frames[0][24:]  # new frames, not duplicates
        message = feed_checked(state, frames)
        if isinstance(message, wire.Step):  # accepted: the checks the docs promise did hold
            assert message.duration_ns >= 0 and (message.layer_ns >= 0).all()
            ex = message.exchanges
            assert (ex[wire.X_END] >= ex[wire.X_START]).all() and (ex[wire.X_NBYTES] >= 0).all()
            assert message.duration_ns <= ingest_mod.TIME_GRACE_NS and message.step <= ingest_mod.MAX_STEP
            assert (ex[wire.X_NBYTES] <= ingest_mod.MAX_EXCHANGE_BYTES).all()
    state.store.window()
    state.store.series()


def test_frames_at_the_size_caps() -> None:
    """The largest STEP the format allows is accepted; one more layer or exchange is refused before any
    array is built, whatever the frames carry."""
    state = Ingest()
    names = [f"layer.{i}" for i in range(wire.MAX_LAYERS)]
    feed_checked(state, wire.encode_schema(SENDER, 0, 0, schema_id=1, rank=0, world=2, node="n", layers=names))
    table = np.zeros((8, wire.MAX_EXCHANGES), np.int64)
    table[wire.X_OP] = wire.Op.RECV
    table[wire.X_PEER] = 1
    step = wire.encode_step(SENDER, 1, 0, step=0, duration_ns=1, dropped_total=0, schema_id=1,
                            layer_ns=np.ones((2, wire.MAX_LAYERS), np.int64), exchanges=table)
    assert isinstance(feed_checked(state, step), wire.Step)
    for count_a, count_b in ((wire.MAX_LAYERS + 1, 0), (0, wire.MAX_EXCHANGES + 1), ((1 << 32) - 1, (1 << 32) - 1)):
        feed_checked(state, [header(wire.Kind.STEP, 2, count_a, count_b), step[1], b"", b""])
    assert state.ledger.bad["oversize"] == 3


# ------------------------------------------------------------------------------------------ node samples

floats = st.one_of(st.floats(allow_nan=True, allow_infinity=True), st.sampled_from([-1.0, 0.0, 50.0]))


@FUZZ
@given(floats, floats, floats, st.lists(floats, min_size=4, max_size=4))
def test_node_figures_nan_inf_and_negative(cpu: float, memory: float, interval: float, nic: list[float]) -> None:
    state = Ingest()
    feed_checked(state, wire.encode_schema(SENDER, 0, 0, schema_id=1, rank=-1, world=1, node="n0", layers=()))
    frames = [header(wire.Kind.NODE, 1, 1, len(b'["eth0"]')), wire.NODE_META.pack(cpu, memory, interval),
              b'["eth0"]', np.array(nic, np.float64).tobytes()]
    message = feed_checked(state, frames)
    sane = all(math.isfinite(x) for x in (cpu, memory, interval)) and interval > 0 and \
        all(math.isfinite(x) and x >= 0 for x in nic)
    plausible = max(nic[:2]) <= ingest_mod.MAX_NIC_BPS  # faster than any interface: counted bad, not shown
    assert (message is not None) == (sane and plausible)
    if not sane:
        assert state.ledger.bad == {"bad-sample": 1}
    elif not plausible:
        assert state.ledger.bad == {"implausible-bytes": 1}


# ------------------------------------------------------------------------------------------ names

hostile_text = st.lists(st.one_of(st.sampled_from(["[bold red]", "[/]", "\x1b[2J", "\x1b]0;pwned\x07", "\r", "\b",
                                                   "\u202e", "\u200b", "\x00", "\x9b31m", "é", "𝕏"]),
                                  st.characters(codec="utf-8")), max_size=40).map("".join)  # what a str can send


@FUZZ
@given(hostile_text, st.lists(hostile_text, max_size=4, unique=True), hostile_text)
def test_names_with_markup_and_escapes_are_kept_literally_and_shown_inert(node: str, layers: list[str],
                                                                          job: str) -> None:
    state = Ingest()
    frames = wire.encode_schema(SENDER, 0, 0, schema_id=1, rank=0, world=1, node=node, layers=layers, job=job) \
        if all(len(s.encode()) <= wire.MAX_NAME_BYTES for s in (node, job, *layers)) else \
        [header(wire.Kind.SCHEMA, 0, len(layers), 0)]
    message = feed_checked(state, frames)
    if message is None:
        return
    assert state.store.nodes[0].name == node and state.store.layers == layers and state.store.job == job
    for name in (node, job, *layers):
        shown = literal(name)
        assert not any(unicodedata.category(c) in UNSAFE for c in shown.plain)  # no control reaches the screen
        assert not shown.spans  # and no markup was interpreted


def test_an_overlong_name_is_refused_with_its_reason() -> None:
    state = Ingest()
    blob = ('{"schema_id":1,"rank":0,"world":1,"node":"' + "n" * (wire.MAX_NAME_BYTES + 1) + '","layers":[]}').encode()
    feed_checked(state, [header(wire.Kind.SCHEMA, 0, 0, len(blob)), blob])
    assert state.ledger.bad == {"bad-name": 1}


# ------------------------------------------------------------------------------------------ sequences

@FUZZ
@given(st.lists(st.integers(0, 300), max_size=400))
def test_duplicates_and_out_of_order_sequences_are_counted_exactly(arrivals: list[int]) -> None:
    ledger = Ledger()
    delivered = [seq for seq in arrivals if ledger.accept(SENDER, seq)]
    distinct = set(arrivals)
    assert sorted(delivered) == sorted(distinct)  # each frame once, whatever the order
    assert ledger.duplicates == len(arrivals) - len(distinct)
    assert ledger.missing == (max(arrivals) + 1 - len(distinct) if arrivals else 0)
    assert max(arrivals, default=0) < LATE_MEMORY  # (the exactness above holds within the late memory)


# ------------------------------------------------------------------------------------------ over a socket

def test_a_hostile_stream_over_the_wire_loses_nothing_already_recorded(endpoint: str, tmp_path: Path,
                                                                        zmq_context: zmq.Context) -> None:
    """Good frames interleaved with garbage: every good one is recorded and delivered; replaying the
    recording gives the same accounts as the live collector."""
    path = tmp_path / "run.wtrace"
    collector = Collector(endpoint, Ingest(), Recorder(path), context=zmq_context)
    stop = threading.Event()
    thread = threading.Thread(target=collector.run, args=(stop,))
    thread.start()
    rng = random.Random(7)
    agent = zmq_context.socket(zmq.DEALER)
    agent.setsockopt(zmq.LINGER, 0)
    agent.connect(endpoint)
    good = [schema(2)]
    for seq in range(1, 200):
        good.append(wire.encode_step(SENDER, seq, 0, step=seq, duration_ns=5, dropped_total=0, schema_id=1,
                                     layer_ns=np.ones((2, 2), np.int64), exchanges=np.zeros((8, 0), np.int64)))
    sent = 0
    try:
        for frames in good:
            for _ in range(rng.randrange(3)):
                junk = [rng.randbytes(rng.randrange(60)) for _ in range(rng.randrange(1, 5))]
                if rng.random() < 0.5:
                    junk[0] = header(rng.randrange(8), rng.randrange(300), rng.randrange(1 << 32), rng.randrange(9))
                agent.send_multipart([b"", *junk])
                sent += 1
            agent.send_multipart([b"", *frames])
            sent += 1
        wait_for(lambda: collector.recorder.records == sent, "every message recorded")  # type: ignore[union-attr]
    finally:
        stop.set()
        thread.join()
        agent.close()
        collector.close()
    live = collector.ingest.ledger.as_json()
    assert collector.ingest.steps == 199 and live["missing"] == 0
    assert ingest(path).ledger.as_json() == live


@pytest.mark.parametrize("blob", [b"", b"\x00" * 40, struct.pack("<4sHH", b"wtwr", 1, 2)])
def test_short_and_empty_frames(blob: bytes) -> None:
    state = Ingest()
    feed_checked(state, [blob] if blob else [])
