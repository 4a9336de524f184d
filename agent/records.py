"""The record layout of recordings and spools, and the append-only writer both use.

It lives on the node side so a probe can spool frames locally in exactly the layout the head's
recordings use (``watchtower/recording.py`` reads both and re-exports these names). Layout, little-endian::

    file     := preamble (record | resume)*
    preamble := b"wtrace\\x00\\x01" u32 meta_len  meta_len bytes of UTF-8 JSON (who, when, notes)
    record   := u32 body_len  u32 crc32(body)  body
    body     := i64 time_ns  u16 n_parts  (u32 part_len  part)*
    resume   := u32 0xFFFFFFFF  8s b"wtresume"  u64 at  i64 wall_ns  u32 crc32(the 28 bytes before it)

A writer that opens a file that already holds data (a collector restarted after a crash) first appends a
``resume`` marker whose ``at`` is its own byte offset. A writer killed mid-record leaves a torn record;
the next writer's marker follows it directly, so a reader that meets damage can search forward for a
marker that names its own offset, or for the next record whose length and checksum hold, and go on
reading there (see ``watchtower.recording``).

A writer never writes a record a reader would reject: a message of more than ``MAX_PARTS`` frames or
more than ``MAX_MESSAGE_BYTES`` bytes (the largest message the wire format admits) is not written but
counted in ``RecordWriter.refused``; the collector counts it bad (``oversize-message``).
"""

from __future__ import annotations

import io
import itertools
import json
import os
import struct
import time
import zlib
from pathlib import Path
from typing import BinaryIO

from agent import wire

PREAMBLE = b"wtrace\x00\x01"
META_LEN = struct.Struct("<I")
RECORD = struct.Struct("<II")  # body_len, crc32
BODY = struct.Struct("<qH")  # time_ns, n_parts
PART = struct.Struct("<I")
RESUME = struct.Struct("<I8sQqI")  # escape, magic, at, wall_ns, crc32
RESUME_ESCAPE = 0xFFFF_FFFF  # where a record's body_len would be: no record is that long
RESUME_MAGIC = b"wtresume"
RESUME_PREFIX = RECORD.pack(RESUME_ESCAPE, 0)[:4] + RESUME_MAGIC
MAX_PARTS = 64  # frames per record; a wire message has at most 4, a reader's resynchronisation trusts <= 64
# The largest message the wire format admits: a STEP at its caps (a SCHEMA or NODE at theirs is smaller).
MAX_MESSAGE_BYTES = (wire.HEADER.size + wire.STEP_META.size + 2 * 8 * wire.MAX_LAYERS
                     + len(wire.EXCHANGE_COLUMNS) * 8 * wire.MAX_EXCHANGES)


NOTE_MAGIC = b"wtnote\x00\x01"  # a record of one frame starting so is the collector's note, never a message


def encode_note(note: dict) -> list[bytes]:
    """The frames of a collector's note to its recording (handshakes it refused, a gap in recording): what
    a reader of the file could not otherwise know. Not a wire message; readers that do not know it count it
    bad, as any frame without the wire magic."""
    return [NOTE_MAGIC + json.dumps(note, separators=(",", ":")).encode()]


def is_note(frames: list[bytes] | list[memoryview]) -> bool:
    return len(frames) == 1 and bytes(frames[0][: len(NOTE_MAGIC)]) == NOTE_MAGIC


def fits(frames: list[bytes] | list[memoryview]) -> bool:
    """Whether a message may be recorded: no more frames and bytes than any valid message could have."""
    return len(frames) <= MAX_PARTS and sum(map(len, frames)) <= MAX_MESSAGE_BYTES


def encode_record(time_ns: int, frames: list[bytes] | list[memoryview]) -> bytes:
    """One record: the frames of one message and when it was received (or, in a spool, sent)."""
    return b"".join(record_pieces(time_ns, frames))


def record_pieces(time_ns: int, frames: list[bytes] | list[memoryview]) -> list[bytes | memoryview]:
    """The bytes of one record as pieces that join to ``encode_record``, the frames themselves uncopied, so
    a batch of records can go out in one ``os.writev``. The CRC-32 runs over the pieces in turn."""
    body = BODY.pack(time_ns, len(frames))
    crc, size = zlib.crc32(body), BODY.size
    pieces: list[bytes | memoryview] = [b"", body]  # the record header goes first, once the CRC is known
    for frame in frames:
        length = PART.pack(len(frame))
        crc = zlib.crc32(frame, zlib.crc32(length, crc))
        size += PART.size + len(frame)
        pieces.append(length)
        pieces.append(frame)
    pieces[0] = RECORD.pack(size, crc)
    return pieces


def encode_resume(at: int, wall_ns: int) -> bytes:
    """The marker a writer appends before its first record when the file already holds data."""
    head = RESUME.pack(RESUME_ESCAPE, RESUME_MAGIC, at, wall_ns, 0)[:-4]
    return head + struct.pack("<I", zlib.crc32(head))


def decode_resume(blob: bytes, at: int) -> bool:
    """Whether ``blob`` (RESUME.size bytes) is an intact marker written at byte ``at``."""
    if len(blob) != RESUME.size:
        return False
    escape, magic, where, _, crc = RESUME.unpack(blob)
    return escape == RESUME_ESCAPE and magic == RESUME_MAGIC and where == at and zlib.crc32(blob[:-4]) == crc


class WriteFailed(OSError):
    """A write to the file failed (``__cause__`` is the OS error): ``written`` bytes of the batch reached the
    file, holding ``whole`` complete records; ``lost`` records of the batch are not in it."""

    def __init__(self, written: int, whole: int, lost: int) -> None:
        super().__init__(f"write failed after {written} bytes")
        self.written, self.whole, self.lost = written, whole, lost


IOV_MAX = os.sysconf("SC_IOV_MAX") if hasattr(os, "sysconf") else 1024  # buffers one writev takes


def _real_fd(stream: BinaryIO) -> int | None:
    """The descriptor of an unbuffered OS file, or None for anything else (a compressed or in-memory
    stream, a test's simulated disk): only there may writes bypass the stream's own ``write``."""
    if not isinstance(stream, io.FileIO):
        return None
    try:
        return stream.fileno()
    except (OSError, ValueError):
        return None


class NotARecording(ValueError):
    """Appending would damage a file that is not a recording (the message is one line for the user)."""


def _check_appendable(path: Path) -> None:
    """Refuse to append records to a file that holds something else (a mistyped path)."""
    try:
        with open(path, "rb") as stream:
            head = stream.read(len(PREAMBLE))
    except FileNotFoundError:
        return
    if head and head != PREAMBLE[: len(head)]:
        raise NotARecording(f"{path} is not a Watchtower recording; not appending to it")


class RecordWriter:
    """Appends records; writes the preamble into an empty file, a resume marker into a non-empty one.

    A batch of records goes out in one ``os.writev`` on an unbuffered file (a Python stream gets their
    joined bytes in one ``write``), so a crash loses at most the records being written, and the next
    writer's marker lets readers step over a torn one.
    """

    def __init__(self, target: str | Path | BinaryIO, meta: dict | None = None) -> None:
        if isinstance(target, str | Path):
            self.path: Path | None = Path(target)
            _check_appendable(self.path)
            self._file: BinaryIO = open(self.path, "ab", buffering=0)  # noqa: SIM115 - lives as long as we do
        else:  # an open binary stream, e.g. one that is compressed afterwards
            self.path, self._file = None, target
        self._fd = _real_fd(self._file)  # writev needs a file descriptor; a Python stream gets joined bytes
        at = self._file.tell()
        if at == 0:
            blob = json.dumps(meta or {}, ensure_ascii=False).encode()
            self._file.write(PREAMBLE + META_LEN.pack(len(blob)) + blob)
        else:
            self._file.write(encode_resume(at, time.time_ns()))
        self.records = 0
        self.refused = 0  # messages too large to record (see ``fits``)

    def write(self, time_ns: int, frames: list[bytes] | list[memoryview]) -> None:
        self.write_many([(time_ns, frames)])

    def write_many(self, batch: list[tuple[int, list[bytes]]]) -> None:
        """Append several records with one ``os.writev`` (what a collector drains at once; still one
        checksummed record per message on disk); a message that does not ``fit`` is left out and counted
        in ``refused``. A failed write raises ``WriteFailed`` saying how many of the batch's records
        reached the file whole."""
        records = [record_pieces(t, frames) for t, frames in batch if fits(frames)]
        self.refused += len(batch) - len(records)
        if records:
            sizes = [sum(map(len, pieces)) for pieces in records]
            pieces = [piece for record in records for piece in record]
            if self._fd is None:
                done, error = self._write(b"".join(pieces))
            else:
                done, error = self._writev(pieces)
            whole = sum(1 for end in itertools.accumulate(sizes) if end <= done)
            self.records += whole
            if error is not None:
                raise WriteFailed(done, whole, len(records) - whole) from error

    def _writev(self, pieces: list[bytes | memoryview]) -> tuple[int, OSError | None]:
        """Write all ``pieces`` with as few ``os.writev`` calls as the system's IOV_MAX allows; a short
        write goes on from where it stopped (the retry reports the real error, e.g. ENOSPC). Returns the
        bytes that reached the file and the error that stopped it, if any."""
        views, done, at = list(pieces), 0, 0
        try:
            while at < len(views):
                n = os.writev(self._fd, views[at:at + IOV_MAX])
                done += n
                while at < len(views) and n >= len(views[at]):
                    n -= len(views[at])
                    at += 1
                if n:  # a short write stopped inside this piece: go on from its first byte not written
                    views[at] = memoryview(views[at]).cast("B")[n:]
        except OSError as exc:
            return done, exc
        return done, None

    def _write(self, blob: bytes) -> tuple[int, OSError | None]:
        """Write all of ``blob``; a short write is retried (the retry reports the real error, e.g. ENOSPC).
        Returns the bytes that reached the file and the error that stopped it, if any."""
        view, done = memoryview(blob), 0
        try:
            while done < len(blob):
                n = self._file.write(view[done:])
                done += len(blob) - done if n is None else n
        except OSError as exc:
            return done, exc
        return done, None

    def close(self) -> None:
        self._file.close()

    def __enter__(self) -> RecordWriter:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
