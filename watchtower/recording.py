"""Recordings: the frames a collector received, appended to a file that survives a crash.

Layout (all little-endian)::

    file   := preamble record*
    preamble := b"wtrace\\x00\\x01" u32 meta_len  meta_len bytes of UTF-8 JSON (who, when, notes)
    record := u32 body_len  u32 crc32(body)  body
    body   := i64 received_ns  u16 n_parts  (u32 part_len  part)*

Each record is written with one ``write`` on an unbuffered file, so a crash of the writer loses at most
the record being written. The reader streams records and stops at the first torn or corrupt one,
reporting the byte offset where the trouble starts; everything before it is still delivered.
"""

from __future__ import annotations

import gzip
import json
import struct
import zlib
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import BinaryIO

PREAMBLE = b"wtrace\x00\x01"
_META_LEN = struct.Struct("<I")
_RECORD = struct.Struct("<II")  # body_len, crc32
_BODY = struct.Struct("<qH")  # received_ns, n_parts
_PART = struct.Struct("<I")
MAX_META = 1 << 20
MAX_RECORD = 64 << 20  # far above any valid frame set (wire caps), far below a torn length field


class RecordingError(ValueError):
    """The file is not a Watchtower recording at all (a torn tail is not an error, see ``Tail``)."""


@dataclass
class Tail:
    """How reading ended: ``clean`` or where (byte offset) and why it stopped early."""

    records: int = 0
    offset: int | None = None
    reason: str = ""
    consumed: int = 0  # byte offset just past the last complete record

    def stop(self, reason: str) -> None:
        self.offset, self.reason = self.consumed, reason

    @property
    def clean(self) -> bool:
        return self.offset is None

    def describe(self) -> str:
        if self.clean:
            return f"{self.records} records, complete"
        return f"{self.records} complete records; stopped at byte {self.offset}: {self.reason}"


def encode_record(received_ns: int, frames: list[bytes] | list[memoryview]) -> bytes:
    parts = [_BODY.pack(received_ns, len(frames))]
    for frame in frames:
        parts.append(_PART.pack(len(frame)))
        parts.append(bytes(frame))
    body = b"".join(parts)
    return _RECORD.pack(len(body), zlib.crc32(body)) + body


class Recorder:
    """Appends records to a recording; writes the preamble first if the file or stream is empty."""

    def __init__(self, target: str | Path | BinaryIO, meta: dict | None = None) -> None:
        if isinstance(target, str | Path):
            self.path: Path | None = Path(target)
            self._file: BinaryIO = open(self.path, "ab", buffering=0)  # noqa: SIM115 - lives as long as we do
        else:  # an open binary stream, e.g. one that is compressed afterwards
            self.path, self._file = None, target
        if self._file.tell() == 0:
            blob = json.dumps(meta or {}, ensure_ascii=False).encode()
            self._file.write(PREAMBLE + _META_LEN.pack(len(blob)) + blob)
        self.records = 0

    def write(self, received_ns: int, frames: list[bytes] | list[memoryview]) -> None:
        self._file.write(encode_record(received_ns, frames))
        self.records += 1

    def write_many(self, batch: list[tuple[int, list[bytes]]]) -> None:
        """Append several records with one write call (what a collector drains at once)."""
        if batch:
            self._file.write(b"".join(encode_record(t, frames) for t, frames in batch))
            self.records += len(batch)

    def close(self) -> None:
        self._file.close()

    def __enter__(self) -> Recorder:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def read_meta(stream: BinaryIO) -> dict:
    head = stream.read(len(PREAMBLE) + _META_LEN.size)
    if len(head) < len(PREAMBLE) + _META_LEN.size or not head.startswith(PREAMBLE):
        raise RecordingError("not a Watchtower recording (bad preamble)")
    (meta_len,) = _META_LEN.unpack_from(head, len(PREAMBLE))
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


def _records(stream: BinaryIO, tail: Tail) -> Iterator[tuple[int, list[bytes]]]:
    while True:
        head = stream.read(_RECORD.size)
        if not head:
            return
        if len(head) < _RECORD.size:
            tail.stop("torn record header")
            return
        body_len, crc = _RECORD.unpack(head)
        if body_len > MAX_RECORD or body_len < _BODY.size:
            tail.stop(f"implausible record length {body_len}")
            return
        body = stream.read(body_len)
        if len(body) < body_len:
            tail.stop(f"torn record ({len(body)} of {body_len} bytes)")
            return
        if zlib.crc32(body) != crc:
            tail.stop("checksum mismatch")
            return
        record = _split_body(body)
        if record is None:
            tail.stop("malformed record body")
            return
        tail.records += 1
        tail.consumed += _RECORD.size + body_len
        yield record


def resume_records(path: str | Path, tail: Tail) -> Iterator[tuple[int, list[bytes]]]:
    """Records of an uncompressed recording from byte ``tail.consumed`` on, for following a file that a
    collector is still appending to: a half-written last record ends the pass and is read whole next time."""
    with open(path, "rb") as stream:
        stream.seek(tail.consumed)
        yield from _records(stream, tail)


def _split_body(body: bytes) -> tuple[int, list[bytes]] | None:
    received_ns, n_parts = _BODY.unpack_from(body)
    view = memoryview(body)
    pos = _BODY.size
    frames: list[bytes] = []
    for _ in range(n_parts):
        if pos + _PART.size > len(body):
            return None
        (length,) = _PART.unpack_from(body, pos)
        pos += _PART.size
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
