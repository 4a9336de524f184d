"""A real miniature model-parallel job for Watchtower to watch: a ring of ranks exchanging halos over TCP.

Each rank owns a slab of an L-layer network. Per layer it computes (matrix products repeated until
``compute_ms`` has passed on the clock, so every layer of every step costs what the flag says), then
exchanges a halo with its ring neighbours (rank ± 1 mod world): it sends
its halo to each and receives theirs, all at once from one thread with non-blocking sockets, as real halo
exchanges overlap their transfers. Halo sizes vary by layer (``exchange_bytes`` × a factor from 1/8 to 2,
the same for every rank) so that link models t = α + n/β can be fitted from the records.

Records (see ``agent.probe``), one per message; the layer's exchange time is the whole halo phase:

- SEND to a neighbour: from the start of the send until the last byte of the message was accepted by the
  kernel; ``nbytes`` is the halo (the 32-byte message header is not counted).
- RECV from a neighbour: the bytes on the wire, from when they could start moving (the neighbour's
  ``time.time_ns()`` stamp at the start of its send, or the previous message's arrival on the same
  connection if that was later) until the kernel's arrival stamp of the last byte (SO_TIMESTAMPNS; the
  time of the read where the kernel gives none). The stamps compare wall clocks, which holds on one host
  or NTP-synchronised hosts.

World 1 has no neighbours: layers only compute. World 2 has one neighbour on both sides: the halo is
exchanged once per layer with it (one SEND and one RECV), not twice.

``collective=True`` makes it a job that only uses collectives, as data-parallel training does: the layers
only compute, and each step ends with a ring allreduce of an ``exchange_bytes`` gradient (float64) over the
same ring connections (reduce-scatter then allgather, 2(p − 1) chunk exchanges; Patarasuk & Yuan, 2009).
It is recorded as one ALLREDUCE of the group, with no peer: the probe cannot tell which hop was slow, which
is what the node daemons' pair checks are for.
"""

from __future__ import annotations

import contextlib
import selectors
import socket
import struct
import time
from dataclasses import dataclass

import numpy as np
import zmq

from agent import wire
from agent.probe import Probe
from agent.records import NotARecording

SLAB = 64  # side of each rank's square slab; a 64×64 float64 product takes tens of microseconds
MAX_HALO_BYTES = 1 << 30
HELLO = struct.Struct("<4sII")  # magic, rank, world: the first bytes on a new link
HELLO_MAGIC = b"wtlk"
HALO = struct.Struct("<4sIIqQI")  # magic, step, layer, sender wall ns at send start, halo bytes, reserved
HALO_MAGIC = b"wtha"
CHUNK = struct.Struct("<4sIQ")  # magic, step, chunk bytes: before every chunk of a ring allreduce
CHUNK_MAGIC = b"wtar"
# Linux's SO_TIMESTAMPNS (the socket module does not name it); the kernel stamps arrivals in CLOCK_REALTIME.
SO_TIMESTAMPNS = 35
TIMESPEC = struct.Struct("@qq")
ANCILLARY_BYTES = socket.CMSG_SPACE(TIMESPEC.size)


class WorkloadError(RuntimeError):
    """The job failed while running (a neighbour went away or spoke out of turn)."""


class ConnectError(WorkloadError):
    """The ring could not be set up: own address not bindable, or a neighbour unreachable in time."""


@dataclass(frozen=True, slots=True)
class WorkloadConfig:
    rank: int
    peers: tuple[tuple[str, int], ...]  # peers[i] is where rank i listens
    collector: str | None  # where the probe publishes; None keeps frames in memory (tests)
    node: str
    steps: int = 10
    layers: int = 8
    exchange_bytes: int = 65536
    compute_ms: float = 5.0
    seed: int = 0
    connect_timeout_s: float = 30.0
    curve_keys: tuple[bytes, bytes, bytes] | None = None  # the probe's (public, secret, collector public)
    spool: str | None = None  # local recording of every frame the probe numbers
    collective: bool = False  # only compute per layer, then one ring allreduce of exchange_bytes per step


@dataclass(frozen=True, slots=True)
class WorkloadResult:
    steps: int
    dropped: int  # frames the probe could not queue
    frames: list[list[bytes]]  # the probe's frames when it published nowhere
    refused: str | None = None  # why the collector refused this rank's probe, if it did


def neighbours(rank: int, world: int) -> list[int]:
    """The distinct ring neighbours of ``rank``: none in world 1, one in world 2, else two."""
    return sorted({(rank - 1) % world, (rank + 1) % world} - {rank})


def halo_sizes(exchange_bytes: int, layers: int, seed: int) -> list[int]:
    """Per-layer halo bytes: ``exchange_bytes`` × factors spread geometrically from 1/8 to 2, shuffled
    by ``seed`` (the same on every rank, so both ends of a link agree)."""
    if layers == 1:
        return [exchange_bytes]
    factors = np.geomspace(1 / 8, 2, layers)
    np.random.default_rng(seed).shuffle(factors)
    return [round(exchange_bytes * f) for f in factors]


class Slab:
    """One rank's share of the model: real matrix products, deterministic from the seed."""

    def __init__(self, rank: int, layers: int, seed: int) -> None:
        weights = np.random.default_rng([seed, 0])
        self.weights = [weights.standard_normal((SLAB, SLAB)) / np.sqrt(SLAB) for _ in range(layers)]
        self.x = np.random.default_rng([seed, 1, rank]).standard_normal((SLAB, SLAB))
        self._tmp = np.empty_like(self.x)

    def compute(self, layer: int, compute_ms: float) -> None:
        """Matrix products on the layer until ``compute_ms`` has passed (at least one when it is positive).

        A repetition count calibrated once at startup drifts with caches, the BLAS's first calls and other
        processes on the core (a 5 ms layer measured 0.6 ms early in a run); the clock does not."""
        if compute_ms <= 0:
            return
        deadline = time.perf_counter_ns() + round(compute_ms * 1e6)
        while True:
            np.matmul(self.x, self.weights[layer], out=self._tmp)
            np.tanh(self._tmp, out=self.x)
            if time.perf_counter_ns() >= deadline:
                return

    def halo(self, nbytes: int) -> np.ndarray:
        """The slab's bytes repeated to ``nbytes``: what a neighbour needs of this rank's boundary."""
        return np.resize(self.x.view(np.uint8).ravel(), nbytes)

    def absorb(self, halo: bytes) -> None:
        """Blend a neighbour's halo into the boundary row, so the next layer depends on it."""
        values = np.frombuffer(halo[: min(len(halo) // 8, SLAB) * 8], dtype=np.float64)
        self.x[0, : len(values)] = 0.5 * (self.x[0, : len(values)] + values)


# ---------------------------------------------------------------------------------------- ring setup

def _listen(host: str, port: int) -> socket.socket:
    try:
        family = socket.getaddrinfo(host, port, type=socket.SOCK_STREAM)[0][0]
        return socket.create_server((host, port), family=family)
    except OSError as exc:
        raise ConnectError(f"cannot listen on {host}:{port}: {exc.strerror or exc}") from None


def _connect(peer: int, host: str, port: int, deadline: float) -> socket.socket:
    """Connect, retrying while the neighbour has not started yet, until ``deadline``."""
    pause = 0.02
    while True:
        remaining = deadline - time.monotonic()
        if remaining <= 0:
            raise ConnectError(f"cannot reach rank {peer} at {host}:{port} (gave up after the connect timeout)")
        try:
            return socket.create_connection((host, port), timeout=min(remaining, 2.0))
        except OSError:  # refused, unreachable, timed out: the peer may simply not be listening yet
            time.sleep(min(pause, max(deadline - time.monotonic(), 0)))
            pause = min(pause * 2, 0.5)


def _read_exact(sock: socket.socket, size: int) -> bytes:
    data = bytearray()
    while len(data) < size:
        chunk = sock.recv(size - len(data))
        if not chunk:
            raise ConnectionError("closed during the hello")
        data += chunk
    return bytes(data)


def connect_ring(rank: int, peers: tuple[tuple[str, int], ...], timeout_s: float,
                 listener: socket.socket | None = None) -> dict[int, socket.socket]:
    """Links to the ring neighbours, keyed by rank. Each link is one TCP connection, made by the lower
    rank of the pair: so every rank listens, connects up, then accepts from below."""
    world = len(peers)
    if world == 1:  # nobody to talk to: no need to hold a port
        if listener is not None:
            listener.close()
        return {}
    deadline = time.monotonic() + timeout_s
    listener = listener or _listen(*peers[rank])
    links: dict[int, socket.socket] = {}
    try:
        with listener:
            for peer in (p for p in neighbours(rank, world) if p > rank):
                sock = _connect(peer, *peers[peer], deadline)
                links[peer] = sock
                sock.sendall(HELLO.pack(HELLO_MAGIC, rank, world))
            waiting = {p for p in neighbours(rank, world) if p < rank}
            while waiting:
                links.update(_accept(listener, rank, world, waiting, deadline))
                waiting -= links.keys()
    except (ConnectError, OSError) as exc:
        for sock in links.values():
            sock.close()
        if isinstance(exc, ConnectError):
            raise
        raise ConnectError(f"setting up the ring failed: {exc.strerror or exc}") from None
    for sock in links.values():
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        sock.settimeout(None)
        sock.setblocking(False)
    return links


def _accept(listener: socket.socket, rank: int, world: int, waiting: set[int],
            deadline: float) -> dict[int, socket.socket]:
    """Accept one connection; a stranger (wrong magic or rank) is closed and ignored."""
    remaining = deadline - time.monotonic()
    if remaining <= 0:
        missing = ", ".join(str(p) for p in sorted(waiting))
        raise ConnectError(f"rank {missing} did not connect to rank {rank} within the connect timeout")
    listener.settimeout(remaining)
    try:
        sock, _ = listener.accept()
    except TimeoutError:
        return {}
    sock.settimeout(max(deadline - time.monotonic(), 0.001))
    try:
        magic, peer, peer_world = HELLO.unpack(_read_exact(sock, HELLO.size))
    except (OSError, ConnectionError):
        sock.close()
        return {}
    if magic != HELLO_MAGIC or peer not in waiting:
        sock.close()
        return {}
    if peer_world != world:
        sock.close()
        raise ConnectError(f"rank {peer} runs with {peer_world} peers, this rank with {world}")
    return {peer: sock}


# ---------------------------------------------------------------------------------------- halo phase

class _Link:
    """One neighbour's side of a halo phase: our outgoing message and its incoming one."""

    __slots__ = ("arrival_wall", "header_done", "incoming", "last_arrival_wall", "out", "peer", "received",
                 "receiving", "send_start", "sending", "sent", "sent_wall", "sock", "want")

    def __init__(self, peer: int, sock: socket.socket, capacity: int) -> None:
        self.peer, self.sock = peer, sock
        self.out = bytearray(HALO.size + capacity)
        self.incoming = bytearray(HALO.size + capacity)
        self.sent = self.received = 0
        self.want = HALO.size  # bytes expected so far: the header, then header and halo
        self.header_done = self.sending = self.receiving = False
        self.send_start = 0  # probe clock
        self.sent_wall = self.arrival_wall = 0  # wall clock: the neighbour's send stamp, our newest arrival
        self.last_arrival_wall = 0  # wall clock: when the previous message from this neighbour was all in
        _timestamp_arrivals(sock)


def _timestamp_arrivals(sock: socket.socket) -> None:
    """Ask the kernel to stamp when received bytes arrived (Linux SO_TIMESTAMPNS); best effort."""
    with contextlib.suppress(OSError):
        sock.setsockopt(socket.SOL_SOCKET, SO_TIMESTAMPNS, 1)


def _arrival_wall(ancillary: list[tuple[int, int, bytes]]) -> int:
    """When the bytes just read reached this host: the kernel's stamp of the last packet read, else now."""
    for level, kind, data in ancillary:
        if level == socket.SOL_SOCKET and kind == SO_TIMESTAMPNS and len(data) >= TIMESPEC.size:
            seconds, nanoseconds = TIMESPEC.unpack_from(data)
            return seconds * 1_000_000_000 + nanoseconds
    return time.time_ns()


class HaloRing:
    """Runs halo phases over established links, timing every message with the probe.

    The rank's exposed time is the whole halo phase (``probe.blocked``). Each message is recorded as a
    transfer for the link models, with times that describe the bytes on the wire, not the rank's view:

    - RECV: from when the bytes could start moving, the later of the neighbour's send stamp and the
      previous message's arrival on the same connection (a connection is a queue), until the kernel's
      arrival stamp of the last byte, so a rank that was still computing when they came in does not
      stretch the transfer;
    - SEND: from the start of the send until the kernel accepted the last byte (the sender's view).
    """

    def __init__(self, links: dict[int, socket.socket], capacity: int, idle_timeout_s: float) -> None:
        self.links = [_Link(peer, sock, capacity) for peer, sock in sorted(links.items())]
        self.idle_timeout_s = idle_timeout_s
        self._selector = selectors.DefaultSelector()

    def exchange(self, probe: Probe, step: int, layer: int, name: str, halo: np.ndarray) -> list[bytes]:
        """Send ``halo`` to every neighbour and receive theirs, overlapped. Returns the start of each
        received halo (the boundary values a slab absorbs), copied so the buffers can be reused."""
        n = len(halo)
        with probe.blocked(name):
            for link in self.links:
                link.send_start = probe.clock()
                HALO.pack_into(link.out, 0, HALO_MAGIC, step, layer, time.time_ns(), n, 0)
                link.out[HALO.size : HALO.size + n] = halo.data
                link.sent, link.received, link.want, link.header_done = 0, 0, HALO.size, False
                link.sending = link.receiving = True
                self._selector.register(link.sock, selectors.EVENT_READ | selectors.EVENT_WRITE, link)
            pending = len(self.links)
            while pending:
                events = self._selector.select(self.idle_timeout_s)
                if not events:
                    raise WorkloadError(f"no halo traffic for {self.idle_timeout_s:g} s in step {step} layer {layer}")
                for key, mask in events:
                    link = key.data
                    if mask & selectors.EVENT_WRITE and link.sending and self._write(link, HALO.size + n):
                        probe.record_transfer(name, op=wire.Op.SEND, peer=link.peer, nbytes=n,
                                              start_ns=link.send_start, end_ns=probe.clock())
                    if mask & selectors.EVENT_READ and link.receiving and self._read(link, step, layer):
                        self._record_arrival(probe, name, link)
                    if not (link.sending or link.receiving):
                        self._selector.unregister(link.sock)
                        pending -= 1
                    elif not link.sending and key.events & selectors.EVENT_WRITE:  # sent: now only read
                        self._selector.modify(link.sock, selectors.EVENT_READ, link)
        return [bytes(link.incoming[HALO.size : min(link.want, HALO.size + 8 * SLAB)]) for link in self.links]

    @staticmethod
    def _record_arrival(probe: Probe, name: str, link: _Link) -> None:
        began = max(link.sent_wall, link.last_arrival_wall)
        ended = max(link.arrival_wall, began)
        start = probe.from_wall(began)
        probe.record_transfer(name, op=wire.Op.RECV, peer=link.peer, nbytes=link.want - HALO.size,
                              start_ns=start, end_ns=probe.from_wall(ended), peer_ready_ns=start)
        link.last_arrival_wall = ended

    def _write(self, link: _Link, total: int) -> bool:
        """Send what the kernel takes; True when the whole message has been handed over."""
        try:
            link.sent += link.sock.send(memoryview(link.out)[link.sent : total])
        except BlockingIOError:
            return False
        except OSError as exc:
            raise WorkloadError(f"sending to rank {link.peer} failed: {exc.strerror or exc}") from None
        link.sending = link.sent < total
        return not link.sending

    def _read(self, link: _Link, step: int, layer: int) -> bool:
        """Read what has arrived; True when the neighbour's whole message is in."""
        try:
            got, ancillary, _, _ = link.sock.recvmsg_into([memoryview(link.incoming)[link.received : link.want]],
                                                          ANCILLARY_BYTES)
        except BlockingIOError:
            return False
        except OSError as exc:
            raise WorkloadError(f"receiving from rank {link.peer} failed: {exc.strerror or exc}") from None
        if got == 0:
            raise WorkloadError(f"rank {link.peer} closed its connection")
        link.arrival_wall = _arrival_wall(ancillary)
        link.received += got
        if link.received < link.want:
            return False
        if not link.header_done:
            magic, peer_step, peer_layer, sent_wall_ns, nbytes, _ = HALO.unpack_from(link.incoming)
            if magic != HALO_MAGIC or (peer_step, peer_layer) != (step, layer) or nbytes > MAX_HALO_BYTES:
                raise WorkloadError(f"rank {link.peer} sent step {peer_step} layer {peer_layer}, "
                                    f"expected step {step} layer {layer}")
            link.sent_wall = sent_wall_ns
            link.header_done = True
            link.want = HALO.size + nbytes
            if len(link.incoming) < link.want:  # the neighbour runs with larger halos than we do
                link.incoming.extend(bytes(link.want - len(link.incoming)))
            if link.received < link.want:
                return False
        link.receiving = False
        return True

    def close(self) -> None:
        self._selector.close()
        for link in self.links:
            with contextlib.suppress(OSError):  # the neighbour already closed: nothing left to flush
                link.sock.shutdown(socket.SHUT_WR)
            link.sock.close()


# ---------------------------------------------------------------------------------------- ring allreduce

class RingAllreduce:
    """Sums a float64 vector across the ring in place: p − 1 reduce-scatter steps, then p − 1 allgather steps,
    each sending one chunk to the right neighbour while receiving one from the left (Patarasuk & Yuan, 2009).
    Every rank sends 2(p − 1)/p of the vector, the bandwidth-optimal amount."""

    def __init__(self, links: dict[int, socket.socket], rank: int, world: int, idle_timeout_s: float) -> None:
        self.rank, self.world, self.idle_timeout_s = rank, world, idle_timeout_s
        self.right = links.get((rank + 1) % world)
        self.left = links.get((rank - 1) % world)
        self._selector = selectors.DefaultSelector()

    def allreduce(self, vector: np.ndarray, step: int) -> None:
        p = self.world
        if p == 1:
            return
        bounds = np.linspace(0, len(vector), p + 1).astype(int)

        def chunk(i: int) -> slice:
            return slice(bounds[i % p], bounds[i % p + 1])

        for s in range(p - 1):  # reduce-scatter: after it, rank r holds the sum of chunk r + 1
            got = self._send_recv(vector[chunk(self.rank - s)], vector[chunk(self.rank - s - 1)].nbytes, step)
            vector[chunk(self.rank - s - 1)] += got
        for s in range(p - 1):  # allgather: pass the summed chunks round
            got = self._send_recv(vector[chunk(self.rank - s + 1)], vector[chunk(self.rank - s)].nbytes, step)
            vector[chunk(self.rank - s)] = got

    def _send_recv(self, out: np.ndarray, want: int, step: int) -> np.ndarray:
        """Send ``out`` to the right while receiving ``want`` bytes from the left, overlapped."""
        assert self.right is not None and self.left is not None
        outgoing = memoryview(CHUNK.pack(CHUNK_MAGIC, step, out.nbytes) + out.tobytes())
        incoming = bytearray(CHUNK.size + want)
        sent = received = 0
        sel = self._selector
        if self.right is self.left:
            sel.register(self.right, selectors.EVENT_READ | selectors.EVENT_WRITE)
        else:
            sel.register(self.right, selectors.EVENT_WRITE)
            sel.register(self.left, selectors.EVENT_READ)
        try:
            while sent < len(outgoing) or received < len(incoming):
                events = sel.select(self.idle_timeout_s)
                if not events:
                    raise WorkloadError(f"no allreduce traffic for {self.idle_timeout_s:g} s in step {step}")
                for key, mask in events:
                    sock = key.fileobj
                    if mask & selectors.EVENT_WRITE and sock is self.right and sent < len(outgoing):
                        try:
                            sent += self.right.send(outgoing[sent:])
                        except BlockingIOError:
                            pass
                        except OSError as exc:
                            raise WorkloadError(f"allreduce send failed: {exc.strerror or exc}") from None
                        if sent == len(outgoing):
                            if self.right is self.left:
                                sel.modify(self.right, selectors.EVENT_READ)
                            else:
                                sel.unregister(self.right)
                    if mask & selectors.EVENT_READ and sock is self.left and received < len(incoming):
                        try:
                            got = self.left.recv_into(memoryview(incoming)[received:])
                        except BlockingIOError:
                            continue
                        except OSError as exc:
                            raise WorkloadError(f"allreduce receive failed: {exc.strerror or exc}") from None
                        if got == 0:
                            raise WorkloadError("a neighbour closed its connection during the allreduce")
                        received += got
                        if received >= CHUNK.size and received - got < CHUNK.size:
                            magic, peer_step, nbytes = CHUNK.unpack_from(incoming)
                            if magic != CHUNK_MAGIC or peer_step != step or nbytes != want:
                                raise WorkloadError(f"the left neighbour sent step {peer_step} ({nbytes} bytes), "
                                                    f"expected step {step} ({want} bytes)")
        finally:
            for sock in {self.right, self.left}:
                with contextlib.suppress(KeyError, ValueError):
                    sel.unregister(sock)
        return np.frombuffer(bytes(incoming[CHUNK.size:]), dtype=np.float64)

    def close(self) -> None:
        self._selector.close()


# ---------------------------------------------------------------------------------------- the job

def run_workload(config: WorkloadConfig, listener: socket.socket | None = None) -> WorkloadResult:
    """Run the job for ``config.steps`` steps. ``listener`` may be a socket already bound to this rank's
    address (tests bind port 0 to avoid races). Raises ``ConnectError`` / ``WorkloadError``."""
    if config.collective:
        return _run_collective(config, listener)
    names = [f"layer.{i:02d}" for i in range(config.layers)]
    sizes = halo_sizes(config.exchange_bytes, config.layers, config.seed)
    slab = Slab(config.rank, config.layers, config.seed)
    with contextlib.ExitStack() as cleanup:  # unwinds in reverse: links, then probe, then its context
        ctx = zmq.Context()
        cleanup.callback(ctx.term)  # waits up to the probe's linger for queued frames to reach the collector
        probe = _open_probe(config, ctx, names, "halo-ring")
        cleanup.callback(probe.close, finished=False)  # signed off below only when every step ran
        ring = HaloRing(connect_ring(config.rank, config.peers, config.connect_timeout_s, listener),
                        max(sizes), config.connect_timeout_s)
        cleanup.callback(ring.close)
        for step in range(config.steps):
            for layer, name in enumerate(names):
                with probe.compute(name):
                    slab.compute(layer, config.compute_ms)
                if ring.links:
                    for halo in ring.exchange(probe, step, layer, name, slab.halo(sizes[layer])):
                        slab.absorb(halo)
            probe.end_step()
        probe.sign_off()
        refused = probe.refused()
    return WorkloadResult(config.steps, probe.dropped, probe.sent_frames, refused)


GRAD_LAYER = "grad.allreduce"


def _open_probe(config: WorkloadConfig, ctx: zmq.Context, layers: list[str], job: str) -> Probe:
    """This rank's probe, or a one-line ConnectError that says what could not be opened."""
    try:
        return Probe(config.rank, len(config.peers), config.node, config.collector, layers=layers, job=job,
                     context=ctx, curve_keys=config.curve_keys, spool=config.spool)
    except zmq.ZMQError as exc:
        raise ConnectError(f"cannot publish to {config.collector}: {exc.strerror}") from None
    except OSError as exc:
        raise ConnectError(f"cannot write the spool {config.spool}: {exc.strerror}") from None
    except NotARecording as exc:
        raise ConnectError(str(exc)) from None


def _run_collective(config: WorkloadConfig, listener: socket.socket | None) -> WorkloadResult:
    """The job that only uses collectives: layers compute, then the step's gradient is allreduced."""
    world = len(config.peers)
    names = [f"layer.{i:02d}" for i in range(config.layers)]
    slab = Slab(config.rank, config.layers, config.seed)
    grad = np.zeros(max(world, config.exchange_bytes // 8))
    with contextlib.ExitStack() as cleanup:
        ctx = zmq.Context()
        cleanup.callback(ctx.term)
        probe = _open_probe(config, ctx, [*names, GRAD_LAYER], "ring-allreduce")
        cleanup.callback(probe.close, finished=False)  # signed off below only when every step ran
        ring = RingAllreduce(connect_ring(config.rank, config.peers, config.connect_timeout_s, listener),
                             config.rank, world, config.connect_timeout_s)
        cleanup.callback(ring.close)
        for link in (ring.left, ring.right):
            if link is not None:
                cleanup.callback(link.close)
        for step in range(config.steps):
            for layer, name in enumerate(names):
                with probe.compute(name):
                    slab.compute(layer, config.compute_ms)
            grad[:] = np.resize(slab.x.ravel(), len(grad))
            with probe.exchange(GRAD_LAYER, op=wire.Op.ALLREDUCE, group=world, nbytes=grad.nbytes):
                ring.allreduce(grad, step)
            slab.x[0] = grad[: SLAB] / world  # the next step depends on everyone's gradient
            probe.end_step()
        probe.sign_off()
        refused = probe.refused()
    return WorkloadResult(config.steps, probe.dropped, probe.sent_frames, refused)
