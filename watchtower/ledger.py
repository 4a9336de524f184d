"""Exact loss accounting: sequence gaps per sender and bad frames by reason.

Every sender numbers its frames from 0, including the ones it had to drop, so a gap in the numbers is a
frame that never arrived, wherever it was lost. A late frame that fills a gap is taken back off the
missing count; a repeated number is counted as a duplicate and not delivered twice.

``missing`` is what the senders' own drops and any loss on the way add up to (a sender numbers the
frames it dropped too); ``dropped_at_senders`` is the senders' own share of it, never to be added to it.
``rejected`` counts connections the collector refused at the CURVE handshake (no frame was read).
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass, field

LATE_MEMORY = 4096  # gaps remembered per sender so a late arrival can be reconciled


@dataclass
class SenderLedger:
    next_seq: int = 0
    received: int = 0
    missing: int = 0
    duplicates: int = 0
    dropped_at_sender: int = 0  # the sender's own running count, from its step frames
    last_ns: int = 0  # when its newest frame was received: how far its numbers can have moved since
    gaps: set[int] = field(default_factory=set)

    def accept(self, seq: int) -> bool:
        """Note ``seq``; False when it is a duplicate that must not be delivered again."""
        if seq == self.next_seq:
            self.next_seq += 1
        elif seq > self.next_seq:
            skipped = seq - self.next_seq
            self.missing += skipped
            if skipped <= LATE_MEMORY:
                self.gaps.update(range(self.next_seq, seq))
                if len(self.gaps) > LATE_MEMORY:
                    self.gaps = set(sorted(self.gaps)[-LATE_MEMORY:])
            self.next_seq = seq + 1
        elif seq in self.gaps:
            self.gaps.discard(seq)
            self.missing -= 1
        else:
            self.duplicates += 1
            return False
        self.received += 1
        return True


@dataclass
class Ledger:
    """Loss figures for the whole job."""

    senders: dict[int, SenderLedger] = field(default_factory=dict)
    bad: Counter[str] = field(default_factory=Counter)
    rejected: Counter[str] = field(default_factory=Counter)

    def accept(self, sender: int, seq: int, received_ns: int = 0) -> bool:
        ledger = self.senders.get(sender)
        if ledger is None:
            ledger = self.senders[sender] = SenderLedger()
        ledger.last_ns = max(ledger.last_ns, received_ns)
        return ledger.accept(seq)

    def reject(self, reason: str) -> None:
        self.bad[reason] += 1

    def refuse(self, reason: str) -> None:
        """Count a handshake the collector refused (see ``watchtower.collector.refusal_reason``)."""
        self.rejected[reason] += 1

    @property
    def frames(self) -> int:
        return sum(s.received for s in self.senders.values())

    @property
    def missing(self) -> int:
        return sum(s.missing for s in self.senders.values())

    @property
    def duplicates(self) -> int:
        return sum(s.duplicates for s in self.senders.values())

    @property
    def bad_total(self) -> int:
        return sum(self.bad.values())

    @property
    def dropped_at_senders(self) -> int:
        return sum(s.dropped_at_sender for s in self.senders.values())

    def as_json(self) -> dict:
        return {
            "frames": self.frames,
            "missing": self.missing,
            "bad": self.bad_total,
            "bad_reasons": dict(sorted(self.bad.items())),
            "duplicates": self.duplicates,
            "dropped_at_senders": self.dropped_at_senders,
            "senders": len(self.senders),
            "rejected": sum(self.rejected.values()),
            "rejected_reasons": dict(sorted(self.rejected.items())),
        }
