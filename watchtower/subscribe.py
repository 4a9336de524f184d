"""An attached console's feed: the newest snapshot its ``collect`` publishes (``watchtower.publish``), drawn as is.

The console process reads no recording and analyses nothing: it receives one JSON message per snapshot on a
conflating SUB socket (only the newest waits; a console that falls behind skips). When no snapshot comes for
a while it asks the collector's beacon whether it still runs (a build can be slow on a large job); when it does
not answer, the console keeps the last figures and says so in one line, and looks every second for a
``collect`` on the same recording (a restarted one), to subscribe there.
"""

from __future__ import annotations

import json
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import zmq

from watchtower.console.feed import Deliver

STOPPED_AFTER_S = 3.0  # silence after which the beacon is asked (snapshots come every quarter second)
LOOK_EVERY_S = 1.0  # how often a console whose collector stopped looks for it again
POLL_MS = 100


@dataclass(frozen=True)
class Publisher:
    """A running collect as a console subscribes to it."""

    pid: int
    snapshots: str  # the endpoint its snapshots are published on
    ask: Callable[[], dict[str, Any] | None]  # its beacon's answer, None when it does not answer


def subscribe(context: zmq.Context, endpoint: str) -> zmq.Socket:
    """A SUB socket that keeps only the newest message (ZMQ_CONFLATE must be set before connecting)."""
    socket = context.socket(zmq.SUB)
    socket.setsockopt(zmq.LINGER, 0)
    socket.setsockopt(zmq.CONFLATE, 1)
    socket.setsockopt(zmq.SUBSCRIBE, b"")
    socket.connect(endpoint)
    return socket


def decode(message: bytes) -> dict[str, Any] | None:
    """A published snapshot, or None for a message that is not one."""
    try:
        snapshot = json.loads(message)
    except (ValueError, UnicodeDecodeError):
        return None
    return snapshot if isinstance(snapshot, dict) and isinstance(snapshot.get("layers"), list) else None


class SubscribedFeed:
    """Snapshots published by a running ``collect`` (``watchtower watch`` attached)."""

    controls = None

    def __init__(self, publisher: Publisher, *, where: str, find: Callable[[], Publisher | None] | None = None,
                 context: zmq.Context | None = None, stopped_after_s: float = STOPPED_AFTER_S,
                 clock: Callable[[], float] = time.monotonic) -> None:
        """``where``: what the console names as its source (the recording); ``find``: a collect on the same
        recording, for reconnecting after a restart."""
        self.publisher, self.where, self.find = publisher, where, find
        self.context = context or zmq.Context.instance()
        self.stopped_after_s, self.clock = stopped_after_s, clock
        self.received = 0
        self.bad = 0
        self._stop = threading.Event()

    def start(self, deliver: Deliver) -> None:
        socket = subscribe(self.context, self.publisher.snapshots)
        heard, looked = self.clock(), -float("inf")
        last: dict[str, Any] | None = None
        stopped = False
        try:
            while not self._stop.is_set():
                if socket.poll(POLL_MS, zmq.POLLIN):
                    snapshot = decode(socket.recv())
                    if snapshot is None:
                        self.bad += 1
                        continue
                    self.received += 1
                    heard, stopped = self.clock(), False
                    snapshot["source"] = {"kind": "attached", "where": self.where}
                    last = snapshot
                    deliver(snapshot)
                    continue
                now = self.clock()
                if not stopped:
                    if now - heard < self.stopped_after_s:
                        continue
                    if self.publisher.ask() is not None:
                        heard = now  # it runs, only slow to build: wait on
                        continue
                    stopped = True
                    if last is not None:
                        deliver({**last, "attached": {"state": "stopped", "message": self._stopped_line()}})
                elif self.find is not None and now - looked >= LOOK_EVERY_S:
                    looked = now
                    found = self.find()
                    if found is not None:
                        socket.close()
                        self.publisher, socket = found, subscribe(self.context, found.snapshots)
                        heard, stopped = self.clock(), False
        finally:
            socket.close()

    def _stopped_line(self) -> str:
        at = time.strftime("%H:%M:%S")
        return (f"collect (pid {self.publisher.pid}) stopped answering at {at}: these are its last figures; "
                f"a collect restarted on {self.where} is picked up")

    def stop(self) -> None:
        self._stop.set()
