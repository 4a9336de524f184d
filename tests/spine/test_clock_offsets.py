"""How the collector uses a rank's clock offset (the NTP estimate, RFC 5905) to line its records up."""

from __future__ import annotations

from agent import wire
from watchtower.store import Store

MS = 1_000_000


def test_the_collector_applies_an_offset_only_beyond_its_error_bound() -> None:
    """NTP's estimate is within half the round trip of the truth: one that cannot be told from 0 is not
    applied (the hosts' clocks agree as far as the exchange can tell), a larger one is."""
    store = Store()
    store.add_schema(wire.decode(wire.encode_schema(7, 0, 0, schema_id=1, rank=0, world=1, node="n0",
                                                    layers=("l",), job="j")))
    info = store.ranks[0]
    # A ping queued 60 ms behind a choked way out and answered at once: the estimate is −30 ms, bound 30 ms.
    store.add_offset(wire.decode(wire.encode_offset(7, 1, 0, -30 * MS, 60 * MS)))
    assert store.offset_ns(info) == 0
    # A clock 3 s behind, measured with a 60 ms round trip: corrected.
    store.add_offset(wire.decode(wire.encode_offset(7, 2, 0, 3_000 * MS, 60 * MS)))
    assert store.offset_ns(info) == 3_000 * MS
    store.add_offset(wire.decode(wire.encode_offset(7, 3, 0, 31 * MS, 60 * MS)))
    assert store.offset_ns(info) == 31 * MS
