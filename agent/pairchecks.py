"""Pair checks between node daemons: a small point-to-point protocol over plain TCP, and the checker thread.

Protocol (docs/wire.md, "Pair-check protocol"): the checking daemon keeps one TCP connection to each peer's
check listener and, per message, sends a 16-byte request ``<4sIQ`` (magic ``wtpc``, sequence number, payload
bytes) followed by the payload; the listener reads it all and answers with a 16-byte reply ``<4sIQ`` (magic
``wtpa``, the same sequence number, the bytes it received). The checker times from just before the request
until the reply has arrived: t(n) = α + n/β, where α is the round trip of a small message. Payloads are
zeros and never interpreted; a listener closes any connection that breaks the protocol or asks to send
more than ``MAX_PAYLOAD``.

The checker runs in its own thread of the node daemon, never in a training process. It follows the plan of
``agent.checkplan``, backs off while the node's NIC counters show the job's own traffic, and hands its
results to the daemon through a queue (the daemon owns the uplink socket).
"""

from __future__ import annotations

import contextlib
import queue
import selectors
import socket
import struct
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import psutil

from agent import wire
from agent.checkplan import MAX_LARGE_BYTES, Sizes, WeightBook, assignment, period_seconds, rounds_per_cycle

REQUEST = struct.Struct("<4sIQ")
REQUEST_MAGIC = b"wtpc"
REPLY = struct.Struct("<4sIQ")
REPLY_MAGIC = b"wtpa"
MAX_PAYLOAD = MAX_LARGE_BYTES
CHUNK = 1 << 16
IO_TIMEOUT_S = 5.0  # a check that takes longer is abandoned (the peer is gone or the link is down)
BUSY_WINDOW_S = 0.01  # how long the NIC counters are watched at a time before a message
BUSY_SHARE = 0.05  # the job's traffic above this share of nominal defers a check; common practice, no source
JUST_ENDED_S = 0.1  # a slot's first message goes within this long after the job's exchange ended; no source
IDLE_S = 2.0  # or after this long without any job exchange (a job that sends nothing, or none at all)
OVERHEAD = 1.06  # NIC counters see headers too: check payload × this is taken as the checks' own traffic
_ZEROS = bytes(CHUNK)


class CheckProtocolError(RuntimeError):
    """The other side broke the pair-check protocol or went away."""


def _recv_exact(sock: socket.socket, size: int) -> bytes:
    parts, left = [], size
    while left:
        chunk = sock.recv(min(left, CHUNK))
        if not chunk:
            raise CheckProtocolError("connection closed")
        parts.append(chunk)
        left -= len(chunk)
    return b"".join(parts)


class CheckListener:
    """Answers other daemons' checks: accepts connections and acknowledges every payload received.

    Runs one selector thread; the bytes it moved are counted (``bytes_moved``) so the back-off can tell the
    checks' traffic from the job's."""

    def __init__(self, host: str = "0.0.0.0", port: int = 0) -> None:
        self._sock = socket.create_server((host, port), reuse_port=False)
        self._sock.setblocking(False)
        self.port = self._sock.getsockname()[1]
        self.bytes_moved = 0
        self._sink = bytearray(CHUNK)  # payloads are read into it and forgotten
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._serve, name="watchtower-check-listener", daemon=True)
        self._thread.start()

    def _serve(self) -> None:
        sel = selectors.DefaultSelector()
        sel.register(self._sock, selectors.EVENT_READ)
        try:
            while not self._stop.is_set():
                for key, _ in sel.select(0.1):
                    if key.fileobj is self._sock:
                        with contextlib.suppress(OSError):
                            conn, _ = self._sock.accept()
                            conn.setblocking(True)
                            conn.settimeout(IO_TIMEOUT_S)
                            conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
                            sel.register(conn, selectors.EVENT_READ)
                        continue
                    conn = key.fileobj  # type: ignore[assignment]
                    try:
                        self._answer(conn)  # type: ignore[arg-type]
                    except (OSError, CheckProtocolError):
                        sel.unregister(conn)
                        conn.close()  # type: ignore[union-attr]
        finally:
            for key in list(sel.get_map().values()):
                key.fileobj.close()  # type: ignore[union-attr]
            sel.close()

    def _answer(self, conn: socket.socket) -> None:
        magic, seq, nbytes = REQUEST.unpack(_recv_exact(conn, REQUEST.size))
        if magic != REQUEST_MAGIC or nbytes > MAX_PAYLOAD:
            raise CheckProtocolError("not a pair-check request")
        left = nbytes
        while left:
            got = conn.recv_into(self._sink, min(left, CHUNK))
            if not got:
                raise CheckProtocolError("connection closed")
            left -= got
            self.bytes_moved += got
        conn.sendall(REPLY.pack(REPLY_MAGIC, seq, nbytes))

    def close(self) -> None:
        self._stop.set()
        self._thread.join()


class CheckClient:
    """Times messages to peers' listeners over one kept-open connection per peer."""

    def __init__(self) -> None:
        self._conns: dict[str, socket.socket] = {}
        self._seq = 0
        self.bytes_moved = 0

    def _conn(self, endpoint: str) -> socket.socket:
        conn = self._conns.get(endpoint)
        if conn is None:
            host, _, port = endpoint.rpartition(":")
            conn = socket.create_connection((host.strip("[]"), int(port)), timeout=IO_TIMEOUT_S)
            conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            self._conns[endpoint] = conn
        return conn

    def measure(self, endpoint: str, nbytes: int) -> int | None:
        """Nanoseconds from the request's first byte until the reply arrived; None if the check failed
        (the connection is dropped and made again next time)."""
        self._seq = (self._seq + 1) & 0xFFFFFFFF
        try:
            conn = self._conn(endpoint)
            start = time.perf_counter_ns()
            conn.sendall(REQUEST.pack(REQUEST_MAGIC, self._seq, nbytes))
            left = nbytes
            while left:
                sent = conn.send(_ZEROS[:min(left, CHUNK)])
                left -= sent
                self.bytes_moved += sent
            magic, seq, got = REPLY.unpack(_recv_exact(conn, REPLY.size))
            elapsed = time.perf_counter_ns() - start
        except (OSError, CheckProtocolError, ValueError):
            self.drop(endpoint)
            return None
        if magic != REPLY_MAGIC or seq != self._seq or got != nbytes:
            self.drop(endpoint)
            return None
        return max(elapsed, 1)

    def drop(self, endpoint: str) -> None:
        conn = self._conns.pop(endpoint, None)
        if conn is not None:
            conn.close()

    def close(self) -> None:
        for endpoint in list(self._conns):
            self.drop(endpoint)


def _nic_bytes() -> int:
    """Bytes moved so far, both ways, by every NIC but loopback."""
    counters = psutil.net_io_counters(pernic=True)
    return sum(c.bytes_sent + c.bytes_recv for name, c in counters.items() if name != "lo")


@dataclass
class CheckConfig:
    node: str
    sizes: Sizes
    slot_s: float
    budget: float
    nominal_Bps: float
    busy_share: float = BUSY_SHARE


class PairChecker:
    """Runs this node's part of the plan in a thread; results come out of ``results`` as wire frames' parts.

    ``endpoints`` maps node name → HOST:PORT of its listener (updated by the daemon as the collector or
    the cluster file tells); ``book`` holds the node lists and weights to plan with.
    """

    def __init__(self, config: CheckConfig, book: WeightBook, listener: CheckListener, *,
                 nic_bytes: Callable[[], int] = _nic_bytes, clock_ns: Callable[[], int] = time.time_ns) -> None:
        self.config = config
        self.book = book
        self.listener = listener
        self.endpoints: dict[str, str] = {}
        self.results: queue.Queue[tuple[str, int, int, int]] = queue.Queue(maxsize=wire.MAX_CHECK_RESULTS)
        self.deferred = 0
        self.nodes_planned = 0
        self._weights: dict[tuple[str, str], float] = {}
        self._busy_at = -IDLE_S  # monotonic time the job's traffic was last seen
        self._client = CheckClient()
        self._nic_bytes = nic_bytes
        self._clock_ns = clock_ns
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    @property
    def period_s(self) -> float:
        return period_seconds(max(self.nodes_planned, 2), self.config.slot_s)

    def start(self) -> None:
        self._thread = threading.Thread(target=self._run, name="watchtower-pair-checks", daemon=True)
        self._thread.start()

    def stop(self) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join()
        self._client.close()

    def _run(self) -> None:
        slot_ns = int(self.config.slot_s * 1e9)
        while not self._stop.is_set():
            now = self._clock_ns()
            slot = now // slot_ns + 1
            if self._stop.wait((slot * slot_ns - now) / 1e9):
                return
            self.run_slot(int(slot), slot_ns)

    def run_slot(self, slot: int, slot_ns: int) -> int:
        """Do this node's checks of ``slot``; returns how many messages were timed."""
        nodes = self._plan_nodes(slot, slot_ns)
        self.nodes_planned = len(nodes)
        job = assignment(nodes, self.config.node, slot, self._weights)
        if job is None or job.target not in self.endpoints:
            return 0
        endpoint = self.endpoints[job.target]
        end_ns = (slot + 1) * slot_ns
        timed = 0
        sizes = self.config.sizes
        for k, nbytes in enumerate([sizes.small, sizes.large] * sizes.repeats):
            if not self._quiet(end_ns, first=k == 0):
                self.deferred += 1
                break
            start = self._clock_ns()
            elapsed = self._client.measure(endpoint, nbytes)
            if elapsed is None:
                break
            with contextlib.suppress(queue.Full):  # the daemon is far behind: drop rather than hold the thread
                self.results.put_nowait((job.target, nbytes, start, elapsed))
            timed += 1
        return timed

    def _plan_nodes(self, slot: int, slot_ns: int) -> tuple[str, ...]:
        """The node list (and weights) of the cycle ``slot`` belongs to, as every daemon sees it."""
        nodes, _ = self.book.for_cycle(slot * slot_ns)  # the newest usable list sets the cycle's length
        per_cycle = max(rounds_per_cycle(len(nodes)), 1)
        older, weights = self.book.for_cycle((slot - slot % per_cycle) * slot_ns)
        if len(older) == len(nodes):  # same cycle length: plan the whole cycle with what held at its start
            nodes = older
        else:
            _, weights = self.book.for_cycle(slot * slot_ns)
        self._weights = weights
        return nodes

    def _quiet(self, end_ns: int, first: bool) -> bool:
        """Wait (until ``end_ns`` at most) for a moment the job's own traffic leaves the port alone.

        Every message waits until the NIC counters, less the checks' own bytes, show under ``busy_share`` of
        nominal. A slot's first message also waits for the job's exchange to have *just* ended (or for the
        job to have been quiet for ``IDLE_S``): a synchronous job computes between its exchanges, so that
        is when a check has the longest time before the next exchange, and the least chance to delay it."""
        limit = self.config.busy_share * self.config.nominal_Bps * BUSY_WINDOW_S
        window_ns = int(BUSY_WINDOW_S * 1e9)
        while not self._stop.is_set() and self._clock_ns() < end_ns - 2 * window_ns:
            ours = self._client.bytes_moved + self.listener.bytes_moved
            before = self._nic_bytes()
            time.sleep(BUSY_WINDOW_S)
            ours = (self._client.bytes_moved + self.listener.bytes_moved - ours) * OVERHEAD
            now = time.monotonic()
            if self._nic_bytes() - before - ours > limit:
                self._busy_at = now
                continue
            if not first or now - self._busy_at <= JUST_ENDED_S or now - self._busy_at >= IDLE_S:
                return True
        return False

    def drain(self) -> tuple[tuple[str, ...], np.ndarray]:
        """Results gathered since the last call, as (peer names, int64 [4, K]) for ``wire.encode_checks``."""
        rows: list[tuple[str, int, int, int]] = []
        with contextlib.suppress(queue.Empty):
            while len(rows) < wire.MAX_CHECK_RESULTS:
                rows.append(self.results.get_nowait())
        peers = tuple(sorted({r[0] for r in rows}))
        index = {p: i for i, p in enumerate(peers)}
        table = np.array([[index[r[0]] for r in rows], [r[1] for r in rows], [r[2] for r in rows],
                          [r[3] for r in rows]], dtype=np.int64).reshape(len(wire.CHECK_COLUMNS), len(rows))
        return peers, table
