"""The live collector: binds one ZeroMQ ROUTER socket, answers clock pings, records and ingests frames.

Agents connect out with DEALER sockets and send ``[b"", header, ...]``; a relay in between adds its own
routing frames in front, so everything up to the first empty frame is the return address. Frames are
appended to the recording before they are interpreted, so a frame that our decoder later rejects is still
kept (and counted the same way on replay). The one exception is a message larger than any valid message
(``agent.records.fits``): it is counted bad (``oversize-message``) and neither recorded nor ingested, so
a recording never holds a record its readers would refuse. Every second the collector also records an
empty record, its clock tick: a recording then shows silence as time passing with nobody speaking.

With keys (``watchtower.keys``) the socket is a CURVE server: traffic is encrypted, and a ZAP handler
admits only agents whose public key is in the allow-list. A refused handshake never reaches the socket
as a message, so a monitor on the socket counts each one in the ledger (``rejected`` by reason); they
are not frames, so the collector notes them in its recording (``agent.records.encode_note``) for readers.
"""

from __future__ import annotations

import contextlib
import ipaddress
import re
import secrets
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import TypeVar

import zmq
from zmq.auth.thread import ThreadAuthenticator
from zmq.utils.monitor import recv_monitor_message

from agent import wire
from agent.records import encode_note, fits, is_note
from watchtower.attach import Beacon
from watchtower.checkdir import CheckDirectory
from watchtower.ingest import Ingest
from watchtower.keys import AllowList, HeadKeys
from watchtower.recording import Recorder

TICK_S = 1.0  # how often the collector records its clock, so silence shows in a recording as time passing
MAX_MESSAGE_BYTES = 64 << 20  # ZeroMQ drops peers that send more in one message (wire caps are far lower)
DRAIN_BATCH = 4096

_TCP = re.compile(r"^tcp://(?P<host>\[[0-9a-fA-F:.]+\]|[^:/\s]+):(?P<port>\d{1,5})$")
_IPC = re.compile(r"^ipc://(?P<path>\S+)$")
_REFUSALS = zmq.EVENT_HANDSHAKE_FAILED_NO_DETAIL | zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL | zmq.EVENT_HANDSHAKE_FAILED_AUTH
_PROTOCOL_REASONS = {
    zmq.PROTOCOL_ERROR_ZMTP_MECHANISM_MISMATCH: "no-curve",  # an agent started without keys
    zmq.PROTOCOL_ERROR_ZMTP_CRYPTOGRAPHIC: "wrong-server-key",  # it cannot decrypt: it trusts another head
}

_Kind = TypeVar("_Kind", wire.ClockPing, wire.CheckHello)  # the messages the collector answers

class EndpointError(ValueError):
    """An endpoint string we cannot use; the message is one line for the user."""


@dataclass(frozen=True)
class Endpoint:
    url: str
    loopback: bool


def parse_endpoint(url: str, *, binding: bool) -> Endpoint:
    """Check ``tcp://HOST:PORT`` or ``ipc://PATH`` before ZeroMQ sees it, and tell if it stays on this host."""
    if match := _IPC.match(url):
        return Endpoint(url, loopback=True)
    match = _TCP.match(url)
    if not match:
        raise EndpointError(f"bad endpoint {url!r}: expected tcp://HOST:PORT or ipc://PATH")
    port = int(match["port"])
    if not 0 < port < 65536:
        raise EndpointError(f"bad endpoint {url!r}: port {port} out of range")
    host = match["host"].strip("[]")
    if host == "*":
        if not binding:
            raise EndpointError(f"bad endpoint {url!r}: '*' is only for listening")
        return Endpoint(url, loopback=False)
    if host == "localhost":
        return Endpoint(url, loopback=True)
    try:
        return Endpoint(url, loopback=ipaddress.ip_address(host).is_loopback)
    except ValueError:
        if binding:
            raise EndpointError(f"bad endpoint {url!r}: listen on an IP address, '*' or localhost") from None
        return Endpoint(url, loopback=False)


def refusal_reason(event: int, value: int) -> str:
    """The tag a refused handshake is counted under, from a socket monitor event and its value."""
    if event == zmq.EVENT_HANDSHAKE_FAILED_AUTH:
        return "unlisted-key" if value == 400 else f"auth-{value}"  # 400: the ZAP handler said no
    if event == zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL:
        return _PROTOCOL_REASONS.get(value, "protocol")
    return "handshake"


def _sender(frame: bytes) -> int | None:
    """The sender id of a header frame without validating the rest (None if it is no header)."""
    if wire.peek_kind(frame) is None:
        return None
    return int.from_bytes(frame[8:16], "little")


def split_envelope(frames: list[bytes]) -> tuple[list[bytes], list[bytes]]:
    """Split a ROUTER message into (return address, payload) at the first empty frame."""
    for i, frame in enumerate(frames):
        if not frame:
            return frames[: i + 1], frames[i + 1:]
    return frames[:1], frames[1:]


class Collector:
    """Receives agent frames on ``listen``; see the module docstring for the protocol."""

    def __init__(
        self,
        listen: str,
        ingest: Ingest,
        recorder: Recorder | None = None,
        *,
        context: zmq.Context | None = None,
        on_message: Callable[[int, list[bytes], wire.Message | None], None] | None = None,
        keys: HeadKeys | None = None,
        on_foreign_job: Callable[[str, str], None] | None = None,
    ) -> None:
        self.endpoint = parse_endpoint(listen, binding=True)
        self.ingest = ingest
        self.recorder = recorder
        self.on_message = on_message
        self.on_foreign_job = on_foreign_job  # (refused job, the recording's job): tell the user once per job
        self.sender = secrets.randbits(63)
        self._next_tick = time.monotonic() + TICK_S
        self._seq = 0
        self.check_directory = CheckDirectory(ingest.store, self.sender)
        self._ctx = context or zmq.Context.instance()
        self.socket = self._ctx.socket(zmq.ROUTER)
        self.socket.setsockopt(zmq.LINGER, 0)
        self.socket.setsockopt(zmq.MAXMSGSIZE, MAX_MESSAGE_BYTES)
        self.socket.setsockopt(zmq.RCVHWM, 100_000)
        self.allow_list: AllowList | None = None
        self.authenticator: ThreadAuthenticator | None = None
        self._monitor: zmq.Socket | None = None
        if keys is not None:
            self._secure(keys)
        try:
            self.socket.bind(listen)
        except zmq.ZMQError as exc:
            self._close_sockets()
            raise EndpointError(f"cannot listen on {listen}: {exc.strerror}") from None
        self.bound = self.socket.getsockopt_string(zmq.LAST_ENDPOINT)

    def _secure(self, keys: HeadKeys) -> None:
        """Make the socket a CURVE server that admits listed agents only, and watch for refusals."""
        self.allow_list = AllowList(keys.agents)
        self.authenticator = ThreadAuthenticator(self._ctx)
        self.authenticator.start()
        self.authenticator.configure_curve_callback("*", self.allow_list)
        self.socket.curve_server = True
        self.socket.curve_publickey = keys.public
        self.socket.curve_secretkey = keys.secret
        self._monitor = self.socket.get_monitor_socket(_REFUSALS)

    def _count_refusals(self) -> None:
        if self._monitor is None:
            return
        refused: dict[str, int] = {}
        while self._monitor.poll(0):
            event = recv_monitor_message(self._monitor)
            reason = refusal_reason(event["event"], event["value"])
            self.ingest.ledger.refuse(reason)
            refused[reason] = refused.get(reason, 0) + 1
        if refused and self.recorder is not None:  # handshakes are not frames: note them for readers of the file
            self.recorder.write_many([(time.time_ns(), encode_note({"refused": refused}))])

    def drain(self, timeout_ms: int) -> int:
        """Wait up to ``timeout_ms`` for traffic, then take everything waiting (bounded batch)."""
        self._count_refusals()
        if not self.socket.poll(timeout_ms, zmq.POLLIN):
            self._count_refusals()
            return 0
        batch: list[tuple[int, list[bytes]]] = []
        while len(batch) < DRAIN_BATCH:
            try:
                raw = self.socket.recv_multipart(flags=zmq.NOBLOCK)
            except zmq.Again:
                break
            received_ns = time.time_ns()
            envelope, frames = split_envelope(raw)
            if frames and wire.peek_kind(frames[0]) == wire.Kind.BATCH:  # a node daemon's: each message as if alone
                try:
                    inner = wire.unpack_batch(frames)
                except wire.WireError as exc:  # refused whole; what came before it is already in the batch
                    self.ingest.ledger.reject(exc.reason)
                    continue
                for message in inner:
                    self._admit(batch, envelope, message, received_ns)
            else:
                self._admit(batch, envelope, frames, received_ns)
        if self.recorder is not None:
            self.recorder.write_many(batch)
        known = len(self.ingest.foreign_jobs)
        messages = self.ingest.feed_many(batch)
        if self.on_message is not None:
            for (received_ns, frames), message in zip(batch, messages, strict=True):
                self.on_message(received_ns, frames, message)
        if len(self.ingest.foreign_jobs) > known and self.on_foreign_job is not None:
            for job in list(self.ingest.foreign_jobs)[known:]:
                self.on_foreign_job(job, self.ingest.store.job)
        return len(batch)

    def _admit(self, batch: list[tuple[int, list[bytes]]], envelope: list[bytes], frames: list[bytes],
               received_ns: int) -> None:
        """Add one message to the drain's batch unless it is refused at the door, answering it if it asks."""
        if self.ingest.has_foreign and frames and self.ingest.foreign(_sender(frames[0])):  # one job per file
            self.ingest.ledger.reject("other-job")
            return
        if not frames or not fits(frames) or (len(frames) == 1 and is_note(frames)):  # a tick or a note?
            self.ingest.ledger.reject("empty" if not frames else "bad-magic" if is_note(frames) else "oversize-message")
            return
        batch.append((received_ns, frames))
        kind = wire.peek_kind(frames[0])
        if kind == wire.Kind.CLOCK_PING:
            self._answer_ping(envelope, frames, received_ns)
        elif kind == wire.Kind.CHECK_HELLO:
            self._answer_hello(envelope, frames, received_ns)

    @staticmethod
    def _decoded(frames: list[bytes], kind: type[_Kind]) -> _Kind | None:
        """The message if it decodes as ``kind``; a bad one is counted when the batch is ingested."""
        try:
            message = wire.decode(frames)
        except wire.WireError:
            return None
        return message if isinstance(message, kind) else None

    def _answer_ping(self, envelope: list[bytes], frames: list[bytes], t1: int) -> None:
        ping = self._decoded(frames, wire.ClockPing)
        if ping is None:
            return
        pong = wire.encode_pong(self.sender, self._seq, ping.t0, t1, time.time_ns())
        self._seq += 1
        with contextlib.suppress(zmq.Again):  # the agent pings again later; never block on an agent
            self.socket.send_multipart([*envelope, *pong], flags=zmq.NOBLOCK)

    def _answer_hello(self, envelope: list[bytes], frames: list[bytes], now_ns: int) -> None:
        """A daemon running pair checks: tell it where the others' listeners are (never blocking)."""
        hello = self._decoded(frames, wire.CheckHello)
        if hello is None:
            return
        reply = self.check_directory.answer(hello, now_ns, self._seq)
        self._seq += 1
        with contextlib.suppress(zmq.Again):
            self.socket.send_multipart([*envelope, *reply], flags=zmq.NOBLOCK)

    def run(self, stop: threading.Event, duration_s: float | None = None,
            beacon: Beacon | None = None, tick: Callable[[], None] | None = None) -> None:
        """Collect until ``stop`` is set or ``duration_s`` has passed, answering ``beacon`` queries too.

        ``tick`` is called between drains (at least every 100 ms), off the receive path: for work such as
        building a snapshot for the metrics, which must not run on another thread while the store changes."""
        deadline = None if duration_s is None else time.monotonic() + duration_s
        while not stop.is_set():
            timeout = 100
            if deadline is not None:
                left = deadline - time.monotonic()
                if left <= 0:
                    break
                timeout = max(1, min(timeout, int(left * 1000)))
            if beacon is not None:
                beacon.info["job"] = self.ingest.store.job
                if self.recorder is not None:
                    beacon.info["recorder"] = self.recorder.status()
                beacon.answer()
            self.drain(timeout)
            self.tick()
            if tick is not None:
                tick()

    def tick(self) -> None:
        """Every ``TICK_S``: record the clock (an empty record) and move the ingest's "now", so ages keep
        growing in silence, in this process and in a recording."""
        if time.monotonic() < self._next_tick:
            return
        self._next_tick = time.monotonic() + TICK_S
        now = time.time_ns()
        self.ingest.feed(now, [])
        if self.recorder is not None:
            self.recorder.write_many([(now, [])])

    def close(self) -> None:
        self._close_sockets()
        if self.recorder is not None:
            self.recorder.close()

    def _close_sockets(self) -> None:
        if self._monitor is not None:
            self._count_refusals()
            self.socket.disable_monitor()
            self._monitor.close()
            self._monitor = None
        self.socket.close()
        if self.authenticator is not None:
            self.authenticator.stop()
            self.authenticator = None
