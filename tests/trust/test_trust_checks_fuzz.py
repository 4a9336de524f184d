"""Hostile pair-check frames (CHECK_HELLO, CHECK_PEERS, CHECK): nothing crashes, every frame is delivered once
or rejected with a known reason, and nothing out of range reaches the store."""

from __future__ import annotations

import json

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from test_trust_fuzz import REASONS, SENDER, feed_checked, header

from agent import wire
from watchtower.ingest import Ingest

FUZZ = settings(max_examples=800, deadline=None, derandomize=True, database=None)
CHECK_REASONS = REASONS
VALUES = np.array([-(1 << 63), -1, 0, 1, 2, 1024, 1 << 40, (1 << 63) - 1], np.int64)
FLOATS = st.sampled_from([float("nan"), float("inf"), -1.0, 0.0, 1e-9, 0.01, 1.0, 1.5, 1e300])


def daemon_schema() -> list[bytes]:
    return wire.encode_schema(SENDER, 0, 0, schema_id=1, rank=-1, world=1, node="n0", layers=())


@FUZZ
@given(st.integers(0, 6), st.integers(0, 3), FLOATS, FLOATS,
       st.lists(st.sampled_from(["n1", "n0", "", "x" * 300, 5]), max_size=4),
       st.lists(st.integers(0, len(VALUES) - 1), min_size=0, max_size=24), st.integers(-8, 8))
def test_hostile_check_results_are_rejected_or_stored_in_range(k: int, extra: int, period: float, budget: float,
                                                               peers: list, picks: list[int], skew: int) -> None:
    state = Ingest()
    feed_checked(state, daemon_schema())
    table = np.resize(VALUES[picks] if picks else VALUES[:1], 4 * k).reshape(4, k)
    names = json.dumps(peers).encode()
    frames = [header(wire.Kind.CHECK, 1, k + extra * (skew > 0), max(0, len(names) + (skew if extra == 3 else 0))),
              wire.CHECK_META.pack(period, budget, 0, 0), names, table.tobytes()]
    message = feed_checked(state, frames)
    assert set(state.ledger.bad) <= CHECK_REASONS
    checks = state.store.checks()
    if isinstance(message, wire.CheckResults) and len(checks):
        assert (checks.nbytes > 0).all() and (checks.seconds > 0).all()
        assert checks.dst.max() < len(state.store.nodes)


@FUZZ
@given(st.sampled_from([wire.Kind.CHECK_HELLO, wire.Kind.CHECK_PEERS]), st.integers(0, 5),
       st.recursive(st.one_of(st.none(), st.booleans(), st.integers(-2, 70000), st.floats(allow_nan=True),
                              st.text(max_size=20), st.just("10.0.0.1:7100")),
                    lambda inner: st.one_of(st.lists(inner, max_size=4),
                                            st.dictionaries(st.sampled_from(["node", "endpoint", "peers", "weights",
                                                                             "stamp_ns"]), inner, max_size=5)),
                    max_leaves=12))
def test_hostile_hellos_and_peer_lists_never_crash(kind: wire.Kind, count: int, body: object) -> None:
    state = Ingest()
    blob = json.dumps(body).encode()
    feed_checked(state, [header(kind, 0, count, len(blob)), blob])
    assert set(state.ledger.bad) <= CHECK_REASONS
