"""``watchtower merge``: join the head's recording and agents' spools into one trace, each frame once.

A frame is known by its sender and sequence number (its header). Inputs are streamed side by side in time
order (each input is in time order as written: receive time at the head, send time in a spool) and the
first copy of each frame is kept; later copies are duplicates. A record whose first frame is not a valid
header (a frame the collector rejected) cannot be matched and is kept as it is, so replaying the merged
trace counts it again. Memory grows by one bit per frame per sender, never with the frames themselves.
"""

from __future__ import annotations

import heapq
import os
from collections.abc import Iterator
from dataclasses import dataclass, field
from operator import itemgetter
from pathlib import Path

from agent import wire
from agent.records import RecordWriter
from watchtower.errors import UsageError
from watchtower.recording import RecordingError, RecordingReader

SPARSE_AFTER = 1 << 20  # a sequence number this far past a sender's bitmap goes to a set (hostile numbering)


class _Seen:
    """Which (sender, seq) pairs were written: a growing bitmap per sender, a set for outlandish numbers."""

    def __init__(self) -> None:
        self._bits: dict[int, bytearray] = {}
        self._sparse: dict[int, set[int]] = {}

    def add(self, sender: int, seq: int) -> bool:
        """Note the pair; False if it was already there."""
        bits = self._bits.setdefault(sender, bytearray())
        if seq >= len(bits) * 8 + SPARSE_AFTER:
            sparse = self._sparse.setdefault(sender, set())
            if seq in sparse:
                return False
            sparse.add(seq)
            return True
        byte, bit = divmod(seq, 8)
        if byte >= len(bits):
            bits.extend(bytes(byte + 1 - len(bits)))
        if bits[byte] >> bit & 1:
            return False
        bits[byte] |= 1 << bit
        return True


@dataclass
class InputSummary:
    path: Path
    records: int = 0
    duplicates: int = 0
    ending: str = ""


@dataclass
class MergeResult:
    out: Path
    written: int = 0
    duplicates: int = 0
    inputs: list[InputSummary] = field(default_factory=list)

    def lines(self) -> list[str]:
        """What ``watchtower merge`` prints: one line per input, then the total."""
        rows = [f"{s.path}: {s.records} records, {s.duplicates} already in the trace; {s.ending}"
                for s in self.inputs]
        rows.append(f"{self.out}: {self.written} records written, {self.duplicates} duplicates left out")
        return rows


def merge(out: Path, inputs: list[Path]) -> MergeResult:
    """Write the union of ``inputs`` to ``out`` (which must not exist) in time order, without duplicates."""
    if out.exists():
        raise UsageError(f"{out} exists; merge writes a new file")
    if any(path.resolve() == out.resolve() for path in inputs):
        raise UsageError(f"{out} is also an input")
    readers: list[RecordingReader] = []
    try:
        for path in inputs:
            readers.append(RecordingReader(path))
        return _merge(out, readers)
    except RecordingError as exc:
        raise UsageError(str(exc)) from None
    finally:
        for reader in readers:
            reader.close()


def _merge(out: Path, readers: list[RecordingReader]) -> MergeResult:
    result = MergeResult(out, inputs=[InputSummary(reader.path) for reader in readers])
    meta = {**readers[0].meta, "tool": "watchtower merge", "merged_from": [str(r.path) for r in readers]}
    partial = out.with_name(out.name + ".partial")  # renamed at the end: no half-merged file under OUT
    seen = _Seen()
    try:
        with RecordWriter(partial, meta) as writer:
            streams = [_tagged(reader, i) for i, reader in enumerate(readers)]
            for time_ns, index, frames in heapq.merge(*streams, key=itemgetter(0)):
                summary = result.inputs[index]
                summary.records += 1
                key = _identity(frames)
                if key is not None and not seen.add(*key):
                    summary.duplicates += 1
                    result.duplicates += 1
                    continue
                writer.write(time_ns, frames)
                result.written += 1
        os.replace(partial, out)
    except OSError as exc:
        partial.unlink(missing_ok=True)
        raise UsageError(f"cannot write {out}: {exc.strerror}") from None
    for summary, reader in zip(result.inputs, readers, strict=True):
        summary.ending = reader.tail.describe()
    return result


def _tagged(reader: RecordingReader, index: int) -> Iterator[tuple[int, int, list[memoryview]]]:
    for time_ns, frames in reader:
        yield time_ns, index, frames


def _identity(frames: list[memoryview]) -> tuple[int, int] | None:
    """(sender, seq) of a message, or None when its first frame is not a valid header."""
    if not frames:
        return None
    try:
        header = wire.decode_header(frames[0])
    except wire.WireError:
        return None
    return header.sender, header.seq
