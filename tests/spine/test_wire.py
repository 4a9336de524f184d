"""The wire format: round trips, and the decoder rejecting every kind of malformed frame with a reason."""

from __future__ import annotations

import struct

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from agent import wire


def step_frames(layers: int = 3, n_exchanges: int = 2, **overrides: object) -> list[bytes]:
    layer_ns = np.arange(2 * layers, dtype=np.int64).reshape(2, layers) * 1000
    table = np.zeros((len(wire.EXCHANGE_COLUMNS), n_exchanges), dtype=np.int64)
    table[wire.X_OP] = wire.Op.RECV
    table[wire.X_NBYTES] = 4096
    table[wire.X_START] = 10
    table[wire.X_END] = 500
    table[wire.X_WAIT] = 100
    args = dict(step=7, duration_ns=123_456, dropped_total=2, schema_id=1, layer_ns=layer_ns, exchanges=table)
    args.update(overrides)
    return wire.encode_step(42, 9, 1_700_000_000_000_000_000, **args)  # type: ignore[arg-type]


def test_step_round_trip_keeps_every_field() -> None:
    message = wire.decode(step_frames())
    assert isinstance(message, wire.Step)
    assert (message.header.sender, message.header.seq, message.step) == (42, 9, 7)
    assert message.duration_ns == 123_456 and message.dropped_total == 2
    assert message.layer_ns.tolist() == [[0, 1000, 2000], [3000, 4000, 5000]]
    assert message.exchanges[wire.X_WAIT].tolist() == [100, 100]


def test_schema_round_trip_keeps_unicode_and_markup_literally() -> None:
    names = ["embed", "[bold red]attn[/]", "\x1b[31mmlp", "ffn·7"]
    frames = wire.encode_schema(5, 0, 0, schema_id=3, rank=2, world=4, node="n1", layers=names, job="j")
    message = wire.decode(frames)
    assert isinstance(message, wire.Schema)
    assert message.layers == tuple(names) and message.rank == 2 and message.world == 4


def test_node_sample_and_clock_round_trip() -> None:
    values = np.array([[1.0, 2.0], [3.0, 4.0], [5.0, 6.0], [7.0, 8.0]])
    node = wire.decode(wire.encode_node(1, 2, 3, cpu_percent=50.0, memory_percent=25.0, interval_s=1.0,
                                        nics=["eth0", "lo"], nic_values=values))
    assert isinstance(node, wire.NodeSample) and node.nics == ("eth0", "lo")
    assert node.nic_values.tolist() == values.tolist()
    pong = wire.decode(wire.encode_pong(1, 2, t0=10, t1=20, t2=30))
    assert isinstance(pong, wire.ClockPong) and (pong.t0, pong.t1, pong.t2) == (10, 20, 30)


def test_clock_offset_is_the_ntp_estimate() -> None:
    # RFC 5905 §8: offset = ((T2 - T1) + (T3 - T4)) / 2, delay = (T4 - T1) - (T3 - T2); here t0..t3 = T1..T4.
    # Peer clock 500 ns ahead, 100 ns each way, 40 ns of processing at the peer:
    t0 = 1000
    t1 = t0 + 100 + 500
    t2 = t1 + 40
    t3 = t2 - 500 + 100
    assert wire.clock_offset(t0, t1, t2, t3) == (500, 200)


@pytest.mark.parametrize(
    ("frames", "reason"),
    [
        ([], "empty"),
        ([b"short"], "bad-header-size"),
        ([b"x" * 40], "bad-magic"),
        ([struct.pack("<4sHHQQqII", wire.MAGIC, 99, 2, 0, 0, 0, 0, 0)], "bad-version"),
        ([struct.pack("<4sHHQQqII", wire.MAGIC, 1, 77, 0, 0, 0, 0, 0)], "bad-kind"),
        (step_frames()[:3], "bad-part-count"),
        ([*step_frames()[:2], step_frames()[2][:-8], step_frames()[3]], "bad-length"),
        ([step_frames()[0], step_frames()[1][:-1], *step_frames()[2:]], "bad-meta-size"),
        ([wire._header(wire.Kind.STEP, 1, 1, 0, wire.MAX_LAYERS + 1, 0), *step_frames()[1:]], "oversize"),
        ([wire._header(wire.Kind.STEP, 1, 1, 0, 3, wire.MAX_EXCHANGES + 1), *step_frames()[1:]], "oversize"),
        (step_frames(duration_ns=-1), "bad-timing"),
        (step_frames(step=-3), "bad-step"),
        (step_frames(layer_ns=-np.ones((2, 3), dtype=np.int64)), "bad-timing"),
        ([wire._header(wire.Kind.SCHEMA, 1, 1, 0, 1, 3), b"{]!"], "bad-text"),
        ([wire._header(wire.Kind.SCHEMA, 1, 1, 0, 0, 2), b"[]"], "bad-schema"),
    ],
)
def test_decoder_rejects_with_a_reason(frames: list[bytes], reason: str) -> None:
    with pytest.raises(wire.WireError) as caught:
        wire.decode(frames)
    assert caught.value.reason == reason


def test_exchange_table_checks() -> None:
    table = np.zeros((len(wire.EXCHANGE_COLUMNS), 1), dtype=np.int64)
    table[wire.X_END] = 5
    # layer 3 of 3, negative bytes, end before start, wait longer than the exchange, unknown operation
    for column, value, reason in [(wire.X_LAYER, 3, "bad-exchange"), (wire.X_NBYTES, -1, "bad-exchange"),
                                  (wire.X_START, 9, "bad-timing"), (wire.X_WAIT, 6, "bad-timing"),
                                  (wire.X_OP, 99, "bad-exchange")]:
        bad = table.copy()
        bad[column] = value
        with pytest.raises(wire.WireError) as caught:
            wire.decode(step_frames(exchanges=bad))
        assert caught.value.reason == reason


def test_schema_rejects_rank_outside_world_and_long_names() -> None:
    bad_rank = wire.encode_schema(1, 0, 0, schema_id=0, rank=4, world=4, node="n", layers=["a"])
    long_name = wire.encode_schema(1, 0, 0, schema_id=0, rank=0, world=4, node="n" * 300, layers=["a"])
    duplicate = wire.encode_schema(1, 0, 0, schema_id=0, rank=0, world=4, node="n", layers=["a", "a"])
    for frames, reason in [(bad_rank, "bad-schema"), (long_name, "bad-name"), (duplicate, "bad-schema")]:
        with pytest.raises(wire.WireError) as caught:
            wire.decode(frames)
        assert caught.value.reason == reason


@settings(max_examples=1500, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(st.binary(max_size=96), min_size=0, max_size=6))
def test_random_frames_never_escape_as_anything_but_wire_error(frames: list[bytes]) -> None:
    try:
        wire.decode(frames)
    except wire.WireError as exc:
        assert exc.reason
    # a random list that happens to decode is fine; no other exception may escape


@settings(max_examples=1500, deadline=None)
@given(st.data())
def test_mutated_valid_frames_are_rejected_or_decode_cleanly(data: st.DataObject) -> None:
    frames = [bytearray(f) for f in step_frames()]
    part = data.draw(st.integers(0, len(frames) - 1))
    if frames[part]:
        position = data.draw(st.integers(0, len(frames[part]) - 1))
        frames[part][position] = data.draw(st.integers(0, 255))
    cut = data.draw(st.integers(0, len(frames[part])))
    frames[part] = frames[part][:cut] if data.draw(st.booleans()) else frames[part]
    try:
        message = wire.decode([bytes(f) for f in frames])
    except wire.WireError as exc:
        assert exc.reason
    else:
        assert isinstance(message, wire.Step)
        assert message.layer_ns.min() >= 0 and message.duration_ns >= 0
