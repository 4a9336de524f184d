"""Helpers for the node-side tests (a module of its own: importing from conftest is ambiguous)."""

from __future__ import annotations

import time
from collections.abc import Callable

import zmq

from agent import wire

DEADLINE_S = 10.0  # generous bound for anything that must arrive; tests return as soon as it does


class FakeCollector:
    """A ROUTER bound to ``endpoint`` (default: a random loopback port), decoding what agents send it."""

    def __init__(self, ctx: zmq.Context, endpoint: str | None = None) -> None:
        self.sock = ctx.socket(zmq.ROUTER)
        self.sock.setsockopt(zmq.LINGER, 0)
        if endpoint is None:
            endpoint = f"tcp://127.0.0.1:{self.sock.bind_to_random_port('tcp://127.0.0.1')}"
        else:
            self.sock.bind(endpoint)
        self.endpoint = endpoint
        self.messages: list[tuple[list[bytes], wire.Message]] = []
        self.batches = 0

    def receive_until(self, done: Callable[[list[wire.Message]], bool],
                      deadline_s: float = DEADLINE_S) -> list[wire.Message]:
        """Receive until ``done(messages so far)`` holds; fail the test at the deadline."""
        end = time.monotonic() + deadline_s
        while not done([m for _, m in self.messages]):
            remaining = end - time.monotonic()
            assert remaining > 0, f"timed out; got {[type(m).__name__ for _, m in self.messages]}"
            if self.sock.poll(int(remaining * 1000) + 1):
                frames = self.sock.recv_multipart()
                envelope = frames[: frames.index(b"") + 1]  # everything up to the empty delimiter
                frames = frames[len(envelope):]
                if wire.peek_kind(frames[0]) == wire.Kind.BATCH:  # a node daemon's: each message as if alone
                    self.batches += 1
                    self.messages.extend((envelope, wire.decode(inner)) for inner in wire.unpack_batch(frames))
                else:
                    self.messages.append((envelope, wire.decode(frames)))
        return [m for _, m in self.messages]

    def reply(self, envelope: list[bytes], frames: list[bytes]) -> None:
        self.sock.send_multipart([*envelope, *frames])
