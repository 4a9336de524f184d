"""One path from raw frames to state, shared by the live collector and replay.

``Ingest.feed`` validates a message, accounts for it (sequence gaps, bad frames by reason) and folds it
into the store. A record without frames is the collector's clock tick: it only moves the feed's "now", so
a recording shows silence as time passing with nobody speaking. Live and replay differ only in where the
frames come from.
"""

from __future__ import annotations

import json
from collections.abc import Iterable

import numpy as np

from agent import wire
from agent.records import NOTE_MAGIC, is_note
from watchtower.ledger import Ledger
from watchtower.store import Store

# Plausibility at the door (common practice, no source): what no real run can produce.
TIME_GRACE_NS = 86_400 * 10**9  # a step may last as long as the run has been watched, plus a day
MAX_FRAME_RATE = 1_000_000  # frames per second any one sender could number (a send costs microseconds)
SEQ_SLACK = 1 << 20  # sequence numbers a sender may jump at once, whatever the time (a burst of drops)
MAX_FIRST_SEQ = 1 << 40  # a sender first heard of: 35 years of frames at 1000 a second
MAX_STEP = 1 << 40  # a step index beyond any run
STEP_LEAP = 1_000_000  # steps a rank may be ahead of the newest step the others reported
MAX_EXCHANGE_BYTES = 1 << 40  # one exchange of a terabyte
MAX_NIC_BPS = 1e13  # 80 Tb/s through one NIC: beyond any interface
MAX_FOREIGN_SENDERS = 1 << 16  # senders of other jobs remembered
MAX_GAPS = 100  # recording gaps kept from the collector's notes


class Ingest:
    """Decode, account and store. ``feed`` returns the decoded message, or None when it was rejected."""

    def __init__(self, store: Store | None = None, ledger: Ledger | None = None) -> None:
        self.store = store or Store()
        self.ledger = ledger or Ledger()
        self.steps = 0
        self.last_received_ns = 0  # the feed's "now": wall clock when live, the recording's clock on replay
        self.first_received_ns: int | None = None  # the run's start as this ingest saw it
        self.recording_gaps: list[dict[str, int | str]] = []  # from the collector's notes: recording stopped
        self.foreign_jobs: dict[str, int] = {}  # other jobs' names -> frames refused (one job per recording)
        self._foreign_senders: dict[int, str] = {}

    def feed(self, received_ns: int, frames: list[bytes] | list[memoryview]) -> wire.Message | None:
        self.last_received_ns = max(self.last_received_ns, received_ns)
        if self.first_received_ns is None:
            self.first_received_ns = received_ns
        if not frames:  # a collector's clock tick (see watchtower.collector): time passes, nobody spoke
            return None
        if len(frames) == 1 and is_note(frames):
            self._note(frames[0])
            return None
        try:
            message = wire.decode(frames)
        except wire.WireError as exc:
            self.ledger.reject(exc.reason)
            return None
        header = message.header
        if header.kind in (wire.Kind.CLOCK_PONG, wire.Kind.CHECK_PEERS):  # only the collector sends these
            self.ledger.reject("unexpected-kind")
            return None
        if (self._foreign_senders or isinstance(message, wire.Schema)) and self._foreign(message):
            self.ledger.reject("other-job")
            return None
        implausible = self._implausible(message, received_ns)
        if implausible:
            self.ledger.reject(implausible)
            return None
        if not self.ledger.accept(header.sender, header.seq, received_ns):
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
        elif isinstance(message, wire.CheckResults) and not self.store.add_checks(message, received_ns):
            self.ledger.reject("unknown-schema")
        return message

    @property
    def has_foreign(self) -> bool:
        """Whether any sender of another job has been refused (then ``foreign`` is worth asking)."""
        return bool(self._foreign_senders)

    def foreign(self, sender: int | None) -> bool:
        """Whether a sender belongs to another job than the one this ingest (and its recording) holds."""
        return sender in self._foreign_senders

    def _foreign(self, message: wire.Message) -> bool:
        """One job per recording: the first job named owns it; a sender that names another is refused, its
        frames counted bad (``other-job``), never merged with this job's."""
        sender = message.header.sender
        if isinstance(message, wire.Schema) and message.job:
            job = self.store.job
            if job and message.job != job:
                if len(self._foreign_senders) < MAX_FOREIGN_SENDERS:
                    self._foreign_senders[sender] = message.job
                self.foreign_jobs[message.job] = self.foreign_jobs.get(message.job, 0) + 1
                return True
            self._foreign_senders.pop(sender, None)
            return False
        name = self._foreign_senders.get(sender)
        if name is not None:
            self.foreign_jobs[name] += 1
            return True
        return False

    def _note(self, frame: bytes | memoryview) -> None:
        """A collector's note in a recording (live, the collector refuses frames that look like one):
        handshakes it refused, and gaps in recording (a full disk)."""
        try:
            note = json.loads(bytes(frame[len(NOTE_MAGIC):]))
        except (UnicodeDecodeError, json.JSONDecodeError):
            self.ledger.reject("bad-note")
            return
        refused = note.get("refused") if isinstance(note, dict) else None
        if isinstance(refused, dict):
            for reason, count in refused.items():
                if isinstance(count, int) and count > 0:
                    self.ledger.rejected[str(reason)[:64]] += count
        gap = note.get("recording_gap") if isinstance(note, dict) else None
        if isinstance(gap, dict) and len(self.recording_gaps) < MAX_GAPS:
            self.recording_gaps.append({key: gap.get(key) for key in ("stopped_at", "reason", "resumed_at",
                                                                      "unrecorded")})

    def _implausible(self, message: wire.Message, received_ns: int) -> str:
        """Why a well-formed message cannot be real (a reason tag), or "": a sequence number past what its
        sender could have numbered, times longer than the run, a step far past the others, absurd bytes."""
        header = message.header
        sender = self.ledger.senders.get(header.sender)
        if sender is None:
            if header.seq > MAX_FIRST_SEQ:
                return "implausible-seq"
        elif header.seq - sender.next_seq > SEQ_SLACK + MAX_FRAME_RATE * max(0, received_ns - sender.last_ns) // 10**9:
            return "implausible-seq"
        if isinstance(message, wire.Step):
            longest = received_ns - (self.first_received_ns or received_ns) + TIME_GRACE_NS
            newest = self.store.last_step
            if message.step > MAX_STEP or (newest >= 0 and message.step > newest + STEP_LEAP):
                return "implausible-step"
            if message.duration_ns > longest or (message.layer_ns.size and message.layer_ns.max() > longest):
                return "implausible-time"
            table = message.exchanges
            if table.shape[1]:
                nbytes, _, end = table[wire.X_NBYTES:wire.X_END + 1].max(axis=1).tolist()  # one reduction
                if end > longest:
                    return "implausible-time"
                if nbytes > MAX_EXCHANGE_BYTES:
                    return "implausible-bytes"
        elif isinstance(message, wire.NodeSample) and message.nic_values.size and \
                float(np.max(message.nic_values[:2])) > MAX_NIC_BPS:
            return "implausible-bytes"
        return ""

    def feed_all(self, records: Iterable[tuple[int, list[bytes]]]) -> int:
        """Feed every (received_ns, frames) record, e.g. a recording being read; returns how many."""
        count = 0
        for received_ns, frames in records:
            self.feed(received_ns, frames)
            count += 1
        return count
