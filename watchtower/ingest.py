"""One path from raw frames to state, shared by the live collector and replay.

``Ingest.feed`` validates a message, accounts for it (sequence gaps, bad frames by reason) and folds it
into the store. A record without frames is the collector's clock tick: it only moves the feed's "now", so
a recording shows silence as time passing with nobody speaking. Live and replay differ only in where the
frames come from.
"""

from __future__ import annotations

from collections.abc import Iterable

from agent import wire
from watchtower.ledger import Ledger
from watchtower.store import Store


class Ingest:
    """Decode, account and store. ``feed`` returns the decoded message, or None when it was rejected."""

    def __init__(self, store: Store | None = None, ledger: Ledger | None = None) -> None:
        self.store = store or Store()
        self.ledger = ledger or Ledger()
        self.steps = 0
        self.last_received_ns = 0  # the feed's "now": wall clock when live, the recording's clock on replay

    def feed(self, received_ns: int, frames: list[bytes] | list[memoryview]) -> wire.Message | None:
        self.last_received_ns = max(self.last_received_ns, received_ns)
        if not frames:  # a collector's clock tick (see watchtower.collector): time passes, nobody spoke
            return None
        try:
            message = wire.decode(frames)
        except wire.WireError as exc:
            self.ledger.reject(exc.reason)
            return None
        header = message.header
        if header.kind is wire.Kind.CLOCK_PONG:  # only the collector sends these
            self.ledger.reject("unexpected-kind")
            return None
        if not self.ledger.accept(header.sender, header.seq):
            return None
        if isinstance(message, wire.Schema):
            self.store.add_schema(message)
        elif isinstance(message, wire.Step):
            self.ledger.senders[header.sender].dropped_at_sender = message.dropped_total
            if self.store.add_step(message, received_ns):
                self.steps += 1
            else:
                self.ledger.reject("unknown-schema")
        elif isinstance(message, wire.NodeSample):
            if not self.store.add_node_sample(message, received_ns):
                self.ledger.reject("unknown-schema")
        elif isinstance(message, wire.ClockOffset):
            self.store.add_offset(message)
        return message

    def feed_all(self, records: Iterable[tuple[int, list[bytes]]]) -> int:
        """Feed every (received_ns, frames) record, e.g. a recording being read; returns how many."""
        count = 0
        for received_ns, frames in records:
            self.feed(received_ns, frames)
            count += 1
        return count
