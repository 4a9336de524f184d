"""Recordings: the frames a collector received, appended to a file that survives a crash.

The layout and the writer live in ``agent/records.py`` (a probe's spool uses the same layout); in short::

    file   := preamble (record | resume)*
    record := u32 body_len  u32 crc32(body)  body      body := i64 received_ns  u16 n_parts  (u32 len  part)*
    resume := a 32-byte marker a restarted writer appends, naming its own byte offset

A drain's records are written with one ``os.writev`` on an unbuffered file, so a crash of the writer
loses at most the records being written. The reader streams records. At a torn, corrupt or implausible record it scans
forward for the next place where reading can safely go on: a resume marker that names its own offset (a
collector killed mid-record and restarted leaves one), or a record whose length, frame layout and CRC-32
all check out. Reading goes on there and the bytes stepped over are reported in ``Tail.skipped``; so
damage costs the damaged records and nothing else. When nothing intact follows (a torn tail, or a file
still being written) it stops, reporting the byte offset where the trouble starts.
"""

from __future__ import annotations

import contextlib
import errno
import gzip
import io
import json
import os
import time
import zlib
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, BinaryIO

import numpy as np

from agent.records import (
    BODY,
    MAX_PARTS,
    META_LEN,
    PART,
    PREAMBLE,
    RECORD,
    RESUME,
    RESUME_ESCAPE,
    NotARecording,
    RecordWriter,
    WriteFailed,
    decode_resume,
    encode_note,
    encode_record,
    encode_resume,
)

__all__ = ["PREAMBLE", "NotARecording", "Recorder", "RecordingError", "RecordingReader", "Skip", "Tail",
           "encode_record", "iter_records", "read_meta", "resume_records"]

MAX_META = 1 << 20
MAX_RECORD = 64 << 20  # far above any valid frame set (wire caps), far below a torn length field
SCAN_CHUNK = 1 << 20  # bytes read at a time while searching for a place to go on after damage
SYNC_WINDOW = RECORD.size + BODY.size  # bytes needed to tell whether a record could start at an offset
RETRY_S = 1.0  # after a failed write, how often recording tries to go on
RESUMED = "resumed"  # what _next answers for an intact resume marker


class RecordingError(ValueError):
    """The file is not a Watchtower recording at all (a torn tail is not an error, see ``Tail``)."""


class Recorder(RecordWriter):
    """Appends records to a recording; writes the preamble first if the file or stream is empty, and a
    resume marker first if it already holds data (a restart after a crash).

    A failed write (a full disk) is a state, not a crash: recording stops, ``status`` says where and why,
    and messages that arrive meanwhile are counted in ``unrecorded`` (the collector goes on ingesting and
    serving them). Every ``retry_s`` the next batch first tries a resume marker at the file's end; once it
    is written (space came back) recording goes on after it, and a reader steps over any torn record the
    failure left to that marker.
    """

    def __init__(self, target: str | Path | BinaryIO, meta: dict | None = None, *, retry_s: float = RETRY_S,
                 clock: Callable[[], float] = time.monotonic) -> None:
        super().__init__(target, meta)
        self.retry_s, self.clock = retry_s, clock
        self.unrecorded = 0  # messages that arrived while recording was stopped, or were lost in a failed write
        self.stopped_at: int | None = None  # the file's size when a write failed
        self.stop_reason = ""
        self.stops = 0
        self._retry_at = 0.0
        self._unrecorded_before = 0

    def write_many(self, batch: list[tuple[int, list[bytes]]]) -> None:
        if self.stopped_at is not None and not self._resume():
            self.unrecorded += len(batch)
            return
        try:
            super().write_many(batch)
        except WriteFailed as exc:
            self._stop(exc.__cause__)
            self.unrecorded += exc.lost

    def _stop(self, error: BaseException | None) -> None:
        self.stopped_at = self._size()
        code = getattr(error, "errno", None)
        self.stop_reason = "disk full" if code == errno.ENOSPC else (getattr(error, "strerror", None) or "write failed")
        self._unrecorded_before = self.unrecorded
        self.stops += 1
        self._retry_at = self.clock() + self.retry_s

    def _resume(self) -> bool:
        """Try to go on recording: True once a resume marker is written at the file's end."""
        if self.clock() < self._retry_at:
            return False
        at = self._size()
        _, error = self._write(encode_resume(at, time.time_ns()))
        if error is not None:
            self._retry_at = self.clock() + self.retry_s
            return False
        gap = {"stopped_at": self.stopped_at, "reason": self.stop_reason, "resumed_at": at,
               "unrecorded": self.unrecorded - self._unrecorded_before}
        self.stopped_at, self.stop_reason = None, ""
        with contextlib.suppress(WriteFailed):  # the note is a courtesy to readers; the marker is what counts
            super().write_many([(time.time_ns(), encode_note({"recording_gap": gap}))])
        return True

    def _size(self) -> int:
        try:
            return os.fstat(self._file.fileno()).st_size
        except (OSError, ValueError, io.UnsupportedOperation):
            return self._file.tell()

    def status(self) -> dict[str, Any]:
        """The recording's state for snapshots: ``recording`` or ``stopped`` (where, why), and the count of
        messages not recorded."""
        stopped = self.stopped_at is not None
        return {"state": "stopped" if stopped else "recording", "stopped_at": self.stopped_at,
                "reason": self.stop_reason or None, "unrecorded": self.unrecorded, "stops": self.stops,
                "message": f"recording stopped: {self.stop_reason} at byte {self.stopped_at}" if stopped else None}


@dataclass(frozen=True)
class Skip:
    """Bytes stepped over: damage at ``start`` up to the intact record or resume marker at ``end``."""

    start: int
    end: int
    reason: str


@dataclass
class Tail:
    """How reading ended: ``clean`` or where (byte offset) and why it stopped early, and what it skipped."""

    records: int = 0
    offset: int | None = None
    reason: str = ""
    consumed: int = 0  # byte offset just past the last complete record (or resume marker)
    resumes: int = 0  # writer restarts seen (resume markers)
    skipped: list[Skip] = field(default_factory=list)

    def stop(self, reason: str) -> None:
        self.offset, self.reason = self.consumed, reason

    @property
    def clean(self) -> bool:
        return self.offset is None and not self.skipped

    @property
    def skipped_bytes(self) -> int:
        return sum(s.end - s.start for s in self.skipped)

    def describe(self) -> str:
        skipped = "".join(f"; skipped bytes {s.start}-{s.end} ({s.reason})" for s in self.skipped)
        if self.offset is None:
            return f"{self.records} records, complete" if not skipped else f"{self.records} records{skipped}"
        return f"{self.records} complete records{skipped}; stopped at byte {self.offset}: {self.reason}"


def read_meta(stream: BinaryIO) -> dict:
    head = stream.read(len(PREAMBLE) + META_LEN.size)
    if len(head) < len(PREAMBLE) + META_LEN.size or not head.startswith(PREAMBLE):
        raise RecordingError("not a Watchtower recording (bad preamble)")
    (meta_len,) = META_LEN.unpack_from(head, len(PREAMBLE))
    if meta_len > MAX_META:
        raise RecordingError("not a Watchtower recording (metadata too large)")
    blob = stream.read(meta_len)
    if len(blob) != meta_len:
        raise RecordingError("recording ends inside its metadata")
    try:
        meta = json.loads(blob.decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError):
        raise RecordingError("recording metadata is not UTF-8 JSON") from None
    if not isinstance(meta, dict):
        raise RecordingError("recording metadata is not an object")
    return meta


def iter_records(stream: BinaryIO, tail: Tail) -> Iterator[tuple[int, list[bytes]]]:
    """Yield (received_ns, frames) from the current position; fill ``tail`` with how it ended."""
    tail.consumed = stream.tell()
    try:
        yield from _records(stream, tail)
    except (EOFError, gzip.BadGzipFile, zlib.error) as exc:  # a damaged compressed (.gz) recording
        tail.stop(f"compressed stream damaged ({exc})")


class _Source:
    """A stream with push-back, so the marker search can return what it read past the marker."""

    def __init__(self, stream: BinaryIO) -> None:
        self._stream = stream
        self._back = b""

    def read(self, n: int) -> bytes:
        if not self._back:
            return self._stream.read(n)
        data, self._back = self._back[:n], self._back[n:]
        if len(data) < n:
            data += self._stream.read(n - len(data))
        return data

    def unread(self, data: bytes) -> None:
        self._back = data + self._back


def _records(stream: BinaryIO, tail: Tail) -> Iterator[tuple[int, list[bytes]]]:
    source = _Source(stream)
    while True:
        head = source.read(RECORD.size)
        if not head:
            return
        damage, body = _next(source, head, tail)
        if damage is None:
            record = _split_body(body)
            if record is not None:
                tail.records += 1
                tail.consumed += RECORD.size + len(body)
                yield record
                continue
            damage = "malformed record body"
        elif damage == RESUMED:
            continue
        if not _resync(source, head + body, tail, damage):
            tail.stop(damage)
            return



def _next(source: _Source, head: bytes, tail: Tail) -> tuple[str | None, bytes]:
    """Read what follows a record header: (None, body) for an intact record, (``RESUMED``, marker rest)
    for an intact resume marker (consumed here), else (what is wrong, the bytes read after ``head``)."""
    if len(head) < RECORD.size:
        return "torn record header", b""
    body_len, crc = RECORD.unpack(head)
    if body_len == RESUME_ESCAPE:
        rest = source.read(RESUME.size - len(head))
        if decode_resume(head + rest, tail.consumed):
            tail.resumes += 1
            tail.consumed += RESUME.size
            return RESUMED, rest
        return ("torn resume marker" if len(rest) < RESUME.size - len(head) else "bad resume marker"), rest
    if body_len > MAX_RECORD or body_len < BODY.size:
        return f"implausible record length {body_len}", b""
    body = source.read(body_len)
    if len(body) < body_len:
        return f"torn record ({len(body)} of {body_len} bytes)", body
    if zlib.crc32(body) != crc:
        return "checksum mismatch", body
    return None, body


def _resync(source: _Source, seen: bytes, tail: Tail, reason: str) -> bool:
    """After damage at ``tail.consumed`` (``seen`` = the bytes read from there), find the first later offset
    holding an intact resume marker that names its own offset, or an intact record; note the skip and
    return True with the source positioned there. Reads ``SCAN_CHUNK`` bytes at a time and keeps only
    what a candidate needs, so a long damaged stretch costs time, not memory."""
    start = tail.consumed
    base, data = start + 1, seen[1:]
    while True:
        if len(data) < SYNC_WINDOW:
            more = source.read(SCAN_CHUNK)
            if not more:
                return False
            data += more
            continue
        limit = len(data) - SYNC_WINDOW + 1
        for i in _candidates(data, limit):
            found, data = _intact_at(source, data, i, base + i)
            if found is None:
                continue
            tail.skipped.append(Skip(start, base + i, reason))
            if found == RESUMED:
                source.unread(data[i + RESUME.size:])
                tail.resumes += 1
                tail.consumed = base + i + RESUME.size
            else:
                source.unread(data[i:])
                tail.consumed = base + i
            return True
        base, data = base + limit, data[limit:]


def _candidates(data: bytes, limit: int) -> list[int]:
    """Offsets below ``limit`` where a resume marker or a record could start: a plausible length (or the
    marker's escape) and, for a record, a plausible frame count. Vectorised: most offsets fail at once."""
    a = np.frombuffer(data, dtype=np.uint8)
    length = (a[0:limit].astype(np.uint32) | a[1:limit + 1].astype(np.uint32) << 8
              | a[2:limit + 2].astype(np.uint32) << 16 | a[3:limit + 3].astype(np.uint32) << 24)
    at = RECORD.size + BODY.size - 2  # n_parts, the body's last field
    parts = a[at:limit + at].astype(np.uint16) | a[at + 1:limit + at + 1].astype(np.uint16) << 8
    record = (length >= BODY.size) & (length <= MAX_RECORD) & (parts <= MAX_PARTS)
    return np.flatnonzero(record | (length == RESUME_ESCAPE)).tolist()


def _intact_at(source: _Source, data: bytes, i: int, offset: int) -> tuple[str | None, bytes]:
    """Whether an intact resume marker (``RESUMED``) or record (``"record"``) starts at ``data[i]`` (file
    byte ``offset``), reading more into ``data`` as the candidate needs; returns the verdict and ``data``."""
    body_len, crc = RECORD.unpack_from(data, i)
    need = i + (RESUME.size if body_len == RESUME_ESCAPE else RECORD.size + body_len)
    while len(data) < need:
        more = source.read(need - len(data))
        if not more:
            return None, data
        data += more
    if body_len == RESUME_ESCAPE:
        return (RESUMED if decode_resume(data[i:need], offset) else None), data
    body = data[i + RECORD.size:need]
    if zlib.crc32(body) != crc or _split_body(body) is None:
        return None, data
    return "record", data


def resume_records(path: str | Path, tail: Tail) -> Iterator[tuple[int, list[bytes]]]:
    """Records of an uncompressed recording from byte ``tail.consumed`` on, for following a file that a
    collector is still appending to: a half-written last record ends the pass and is read whole next time."""
    with open(path, "rb") as stream:
        stream.seek(tail.consumed)
        yield from _records(stream, tail)


def _split_body(body: bytes) -> tuple[int, list[bytes]] | None:
    received_ns, n_parts = BODY.unpack_from(body)
    view = memoryview(body)
    pos = BODY.size
    frames: list[bytes] = []
    for _ in range(n_parts):
        if pos + PART.size > len(body):
            return None
        (length,) = PART.unpack_from(body, pos)
        pos += PART.size
        if pos + length > len(body):
            return None
        frames.append(view[pos:pos + length])
        pos += length
    if pos != len(body):
        return None
    return received_ns, frames


class RecordingReader:
    """Streams a recording: ``meta`` at once, then records by iteration; ``tail`` says how it ended."""

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        try:
            # A gzip-compressed recording (the bundled demo) streams the same way.
            opener = gzip.open if self.path.suffix == ".gz" else open
            self._file: BinaryIO = opener(self.path, "rb")  # type: ignore[assignment]
        except OSError as exc:
            raise RecordingError(f"cannot open {self.path}: {exc.strerror}") from None
        try:
            self.meta = read_meta(self._file)
        except RecordingError:
            self._file.close()
            raise
        except (gzip.BadGzipFile, EOFError, zlib.error):
            self._file.close()
            raise RecordingError(f"{self.path} is not a readable compressed recording") from None
        self.tail = Tail()

    def __iter__(self) -> Iterator[tuple[int, list[bytes]]]:
        return iter_records(self._file, self.tail)

    def close(self) -> None:
        self._file.close()

    def __enter__(self) -> RecordingReader:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
