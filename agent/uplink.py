"""The node daemon's relay: local probes' messages to the collector in batches, replies back to the probes.

A step ends on every rank of a node at about the same time, so the daemon holds what its ROUTER receives
for at most ``flush_s`` (or until ``max_messages`` or ``max_bytes`` are held) and sends it as one BATCH
(``agent.wire.encode_batch``): each message keeps its own header, so the collector accounts every sender's
sequence numbers exactly, while it handles one message per node and flush instead of one per rank.

Messages that ask for an answer (a clock ping, a pair-check hello) go alone and at once, with the envelope
the ROUTER put in front (the probe's identity), so the answer finds its way back; whatever the collector
sends back is forwarded to the frontend by that envelope, as a plain ZeroMQ proxy would.

Backpressure as in a proxy: while the uplink's queue is full (collector away) the held batch waits and the
frontend is not read, so the probes' own queues fill and they drop and count (never blocking training).
"""

from __future__ import annotations

import contextlib
import secrets
import time

import zmq

from agent import wire

FLUSH_S = 0.005  # longest a message waits for others to share its uplink message
MAX_MESSAGES = 256  # messages in one batch (the wire's cap is wire.MAX_BATCH_MESSAGES)
MAX_BYTES = 1 << 20  # bytes in one batch; a larger message goes in a batch of its own
RETRY_S = 0.01  # while the uplink is full, how often sending is tried again
_ANSWERED = (wire.Kind.CLOCK_PING, wire.Kind.CHECK_HELLO)
_TERMINATE = b"TERMINATE"


class BatchingRelay:
    """Relays ``frontend`` (ROUTER, local probes) to ``backend`` (DEALER, the collector) until ``control``
    (a PAIR) receives ``TERMINATE``; then it sends what it holds and returns."""

    def __init__(self, frontend: zmq.Socket, backend: zmq.Socket, control: zmq.Socket, *,
                 flush_s: float = FLUSH_S, max_messages: int = MAX_MESSAGES, max_bytes: int = MAX_BYTES) -> None:
        self.frontend, self.backend, self.control = frontend, backend, control
        self.flush_s, self.max_messages, self.max_bytes = flush_s, max_messages, max_bytes
        self.sender = secrets.randbits(63)  # names the batches, not a sender of frames (nothing accounts it)
        self.batches = 0
        self._held: list[list[bytes]] = []
        self._size = 0
        self._due: float | None = None
        self._out: list[list[bytes]] = []  # messages the full uplink did not take yet, oldest first

    def run(self) -> None:
        poller = zmq.Poller()
        poller.register(self.control, zmq.POLLIN)
        poller.register(self.backend, zmq.POLLIN)
        poller.register(self.frontend, zmq.POLLIN)
        reading = True
        while True:
            timeout = None if self._due is None else max(0, int((self._due - time.monotonic()) * 1000) + 1)
            events = dict(poller.poll(timeout))
            if self.control in events and self.control.recv() == _TERMINATE:
                self._flush()
                return
            if self.backend in events:
                self._replies()
            if self.frontend in events:
                self._take()
            if self._due is not None and time.monotonic() >= self._due:
                self._flush()
            if reading != (not self._out):  # stop reading the probes while the uplink is full
                reading = not self._out
                poller.modify(self.frontend, zmq.POLLIN if reading else 0)

    def _replies(self) -> None:
        while True:
            try:
                reply = self.backend.recv_multipart(flags=zmq.NOBLOCK)
            except zmq.Again:
                return
            with contextlib.suppress(zmq.ZMQError):  # the probe is gone: its answer has nowhere to go
                self.frontend.send_multipart(reply, flags=zmq.NOBLOCK)

    def _take(self) -> None:
        """Read what the probes sent (a bounded number at a time, so replies and the timer are served)."""
        for _ in range(self.max_messages):
            if self._out:
                return
            try:
                raw = self.frontend.recv_multipart(flags=zmq.NOBLOCK, copy=True)
            except zmq.Again:
                return
            cut = raw.index(b"") + 1 if b"" in raw else 1  # the envelope: up to the empty delimiter
            frames = raw[cut:]
            kind = wire.peek_kind(frames[0]) if frames else None
            if kind is None or kind in _ANSWERED or not 0 < len(frames) <= wire.MAX_BATCH_PARTS:
                self._flush()  # keep each sender's order
                self._send(raw)  # with its envelope, so that an answer finds the probe
                continue
            self._held.append(frames)
            self._size += sum(map(len, frames))
            if self._due is None:
                self._due = time.monotonic() + self.flush_s
            if len(self._held) >= self.max_messages or self._size >= self.max_bytes:
                self._flush()

    def _flush(self) -> None:
        if self._held:
            self._send([b"", *wire.encode_batch(self.sender, self.batches, time.time_ns(), self._held)])
            self.batches += 1
            self._held, self._size = [], 0
        self._due = None
        self._pump()

    def _send(self, frames: list[bytes]) -> None:
        self._out.append(frames)
        self._pump()

    def _pump(self) -> None:
        """Send what waits, in order, as far as the uplink takes it; if it is full, try again shortly."""
        while self._out:
            try:
                self.backend.send_multipart(self._out[0], flags=zmq.NOBLOCK, copy=False)
            except zmq.Again:
                self._due = time.monotonic() + RETRY_S
                return
            self._out.pop(0)
