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
FEED_CHUNK = 256  # records decoded and stored at once: measured fastest here (bench_ingest.py; 4096 is 2x slower)


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
        elif isinstance(message, wire.SignOff):
            self.ledger.senders[header.sender].dropped_at_sender = message.dropped_total
            if not self.store.add_sign_off(message, received_ns):
                self.ledger.reject("unknown-schema")
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
        if reason := self._implausible_seq(message.header, received_ns):
            return reason
        if isinstance(message, wire.Step):
            table = message.exchanges
            nbytes, _, end = table[wire.X_NBYTES:wire.X_END + 1].max(axis=1).tolist() if table.shape[1] \
                else (0, 0, 0)  # one reduction
            layer_max = int(message.layer_ns.max()) if message.layer_ns.size else 0
            return self._implausible_step(message, received_ns, self.store.last_step, layer_max, end, nbytes)
        if isinstance(message, wire.NodeSample) and message.nic_values.size and \
                float(np.max(message.nic_values[:2])) > MAX_NIC_BPS:
            return "implausible-bytes"
        return ""

    def _implausible_seq(self, header: wire.Header, received_ns: int) -> str:
        sender = self.ledger.senders.get(header.sender)
        if sender is None:
            if header.seq > MAX_FIRST_SEQ:
                return "implausible-seq"
        elif header.seq - sender.next_seq > SEQ_SLACK + MAX_FRAME_RATE * max(0, received_ns - sender.last_ns) // 10**9:
            return "implausible-seq"
        return ""

    def _implausible_step(self, message: wire.Step, received_ns: int, newest: int, layer_max: int, end_max: int,
                          nbytes_max: int) -> str:
        """The STEP part of ``_implausible``, given the newest step stored and the message's maxima (of its
        layer times, exchange ends and byte counts; looked at only where it has layers or exchanges)."""
        longest = received_ns - (self.first_received_ns or received_ns) + TIME_GRACE_NS
        if message.step > MAX_STEP or (newest >= 0 and message.step > newest + STEP_LEAP):
            return "implausible-step"
        if message.duration_ns > longest or (message.header.count_a and layer_max > longest):
            return "implausible-time"
        if message.header.count_b:
            if end_max > longest:
                return "implausible-time"
            if nbytes_max > MAX_EXCHANGE_BYTES:
                return "implausible-bytes"
        return ""

    def feed_many(self, records: list[tuple[int, list[bytes]]] | list[tuple[int, list[memoryview]]]
                  ) -> list[wire.Message | None]:
        """Feed a batch of records (what a collector drains at once) with exactly the outcome of ``feed``
        on each in turn, and its answers: STEP messages are validated together (``wire.decode_steps``) and
        each run of them between other messages goes into the store at once (``Store.add_steps``); the
        per-message part is only the loss accounting and the plausibility checks, which depend on order.
        A long drain goes ``FEED_CHUNK`` records at a time, so the arrays it stacks stay in the CPU's cache."""
        if len(records) > FEED_CHUNK:
            return [m for at in range(0, len(records), FEED_CHUNK) for m in self.feed_many(records[at:at + FEED_CHUNK])]
        batch = wire.decode_steps([frames for _, frames in records])
        out: list[wire.Message | None] = []
        run: list[tuple[wire.Step, int]] = []  # accepted steps (and when received) held for the store
        newest = self.store.last_step
        for i, (received_ns, frames) in enumerate(records):
            step = batch.steps[i]
            if step is None:
                self._store_run(run)
                out.append(self.feed(received_ns, frames))
                newest = self.store.last_step
                continue
            self.last_received_ns = max(self.last_received_ns, received_ns)
            if self.first_received_ns is None:
                self.first_received_ns = received_ns
            out.append(step)
            header = step.header
            if self._foreign_senders and self._foreign(step):
                self.ledger.reject("other-job")
                out[-1] = None
                continue
            implausible = self._implausible_seq(header, received_ns) or self._implausible_step(
                step, received_ns, newest, int(batch.layer_max[i]), int(batch.end_max[i]), int(batch.nbytes_max[i]))
            if implausible:
                self.ledger.reject(implausible)
                out[-1] = None
                continue
            if not self.ledger.accept(header.sender, header.seq, received_ns):
                out[-1] = None
                continue
            self.ledger.senders[header.sender].dropped_at_sender = step.dropped_total
            if self.store.step_rank(step) is not None:
                newest = max(newest, step.step)
            run.append((step, received_ns))
        self._store_run(run)
        return out

    def _store_run(self, run: list[tuple[wire.Step, int]]) -> None:
        """Hand a run of accepted steps to the store at once, and count them as ``feed`` would."""
        if not run:
            return
        for stored in self.store.add_steps(run):
            if stored:
                self.steps += 1
            else:
                self.ledger.reject("unknown-schema")
        run.clear()

    def feed_all(self, records: Iterable[tuple[int, list[bytes]]], batch: int = 1024) -> int:
        """Feed every (received_ns, frames) record, e.g. a recording being read, ``batch`` at a time through
        ``feed_many``; returns how many."""
        count = 0
        chunk: list[tuple[int, list[bytes]]] = []
        for record in records:
            chunk.append(record)
            if len(chunk) >= batch:
                count += len(self.feed_many(chunk))
                chunk = []
        return count + len(self.feed_many(chunk)) if chunk else count
