"""The probe that training code uses to time its layers and exchanges.

One probe per rank. Regions are timed with a pluggable clock and accumulated per layer; each exchange is
also recorded with its peer (or collective kind and group), bytes, start, end and, when the caller knows
when the peer was ready, the part of it spent waiting. At ``end_step`` the step is packed as columnar
arrays and handed to ZeroMQ with NOBLOCK: if the socket's bounded queue is full (head node down or slow)
the frame is dropped and counted, and the next frame carries the running count. Training never blocks on
monitoring.

With ``spool=PATH`` the probe also appends every frame it numbers, sent or dropped, to a local recording
(``agent/records.py``; one unbuffered write per frame). Spooling only the drops would miss frames that
ZeroMQ accepted but that died with a killed collector or node daemon; spooling all makes
``watchtower merge`` of the head's recording and the spools complete, at the price of one write per frame.

With ``device=`` (a ``agent.device.Markers`` backend, e.g. CUDA events) regions are timed by markers on the
device's streams instead of the host clock, and a step is published once the device has passed all its
markers: at a later ``end_step``, one or two steps behind on a busy device (see ``agent/device.py``).
"""

from __future__ import annotations

import secrets
import sys
import threading
import time
from collections import deque
from collections.abc import Sequence
from pathlib import Path
from types import TracebackType

import numpy as np
import zmq

from agent import wire
from agent.clock import Clock, default_clock
from agent.device import (
    COMPUTE,
    EXCHANGE,
    Marker,
    MarkerPool,
    Markers,
    PendingStep,
    Stream,
    Transfer,
    Window,
    split_exposed,
    union_ns,
)
from agent.handshake import HandshakeWatch
from agent.records import RecordWriter

SCHEMA_EVERY = 64  # frames between schema repeats, so a collector that starts late learns who we are
CLOCK_EVERY_S = 30.0  # seconds between clock-offset handshakes
# A device this many steps behind the host is stuck, not busy (a busy one lags one or two steps): the oldest
# step's timing is abandoned so memory stays bounded; common practice, no source.
MAX_PENDING_STEPS = 64
# NTP's clock filter keeps the last 8 samples and uses the one of least delay (RFC 5905 §10); the probe pings at
# every step until it holds that many, so a run learns its offset within its first steps.
CLOCK_SAMPLES = 8
# Region starts at which a pong is looked for after a ping (a pong comes back within a millisecond or two
# when the collector is idle); later ones are read at the step's end. Bounded, so a head node that never
# answers costs a few looks per ping, not one at every region. No source.
PONG_LOOKS = 16


class _Region:
    """A reusable ``with`` timer for one layer; kept tiny because it runs inside the training loop."""

    __slots__ = ("_clock", "_slot", "_start", "_totals")

    def __init__(self, clock: Clock, totals: list[int], slot: int) -> None:
        self._clock = clock
        self._totals = totals
        self._slot = slot
        self._start = 0

    def __enter__(self) -> _Region:
        self._start = self._clock()
        return self

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        self._totals[self._slot] += self._clock() - self._start


class _DeviceRegion:
    """``_Region`` with device markers: records a start and an end marker; the step reads them later."""

    __slots__ = ("_marks", "_probe", "_row", "_slot", "_start", "_take")

    def __init__(self, probe: Probe, row: int, slot: int) -> None:
        self._probe = probe
        self._take = probe._pool.take  # type: ignore[union-attr]
        self._marks = probe._regions
        self._row, self._slot = row, slot
        self._start: Marker = None

    def __enter__(self) -> _DeviceRegion:
        self._start = self._take()
        return self

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        end = self._probe.last_mark = self._take()
        self._marks.append((self._row, self._slot, self._start, end))


class _DeviceExchange:
    """An exchange the compute stream is blocked in, timed by markers on that stream (see ``Exchange``).
    The peer's readiness is a host-clock figure and cannot be set here: the record's wait is unknown."""

    __slots__ = ("_probe", "stopped", "transfer")

    def __init__(self, probe: Probe, layer: int, op: wire.Op, peer: int, group: int, nbytes: int) -> None:
        self._probe = probe
        self.transfer = Transfer(layer, int(op), peer, group, nbytes, probe._pool.take())  # type: ignore[union-attr]
        self.stopped = False

    def stop(self, nbytes: int | None = None) -> None:
        if self.stopped:
            raise RuntimeError("exchange stopped twice")
        self.stopped = True
        self.transfer.end = self._probe.last_mark = self._probe._pool.take()  # type: ignore[union-attr]
        if nbytes is not None:
            self.transfer.nbytes = nbytes
        self._probe._blocking.append(self.transfer)

    def __enter__(self) -> _DeviceExchange:
        return self

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        if not self.stopped:
            self.stop()


class Exchange:
    """One exchange being timed. Use as a context manager or call ``stop()``.

    If the caller learns when the peer was ready (for example a timestamp the sender put in the message,
    on the same clock), ``peer_ready_at(t)`` splits the time into waiting and transfer. The wait is negative
    when the peer was ready first: its bytes were already moving, so the transfer proper began before this
    call did, and the link model must count from the peer's start. Exchanges of one
    layer may overlap (a halo sent to two neighbours at once); the layer's exchange time counts the time
    at least one of them was in flight, once. Every started exchange must be stopped exactly once.
    """

    __slots__ = ("_probe", "end", "group", "layer", "nbytes", "op", "peer", "start", "stopped", "wait_ns")

    def __init__(self, probe: Probe, layer: int, op: wire.Op, peer: int, group: int, nbytes: int) -> None:
        self._probe = probe
        self.layer = layer
        self.op = op
        self.peer = peer
        self.group = group
        self.nbytes = nbytes
        self.wait_ns = wire.UNKNOWN_WAIT
        self.start = probe.clock()
        self.end = -1
        self.stopped = False
        probe._begin_exchange(layer, self.start)

    def peer_ready_at(self, ready_ns: int) -> None:
        """Record that the peer was ready at ``ready_ns`` (probe clock): time before it was waiting."""
        self.wait_ns = ready_ns - self.start

    def peer_ready_at_wall(self, ready_wall_ns: int) -> None:
        """As ``peer_ready_at`` for a wall-clock (``time.time_ns``) stamp, e.g. one sent by the peer."""
        self.peer_ready_at(self._probe.from_wall(ready_wall_ns))

    def stop(self, nbytes: int | None = None) -> None:
        if self.stopped:
            raise RuntimeError("exchange stopped twice")
        self.stopped = True
        self.end = self._probe.clock()
        if nbytes is not None:
            self.nbytes = nbytes
        if self.wait_ns != wire.UNKNOWN_WAIT:
            self.wait_ns = min(self.wait_ns, self.end - self.start)
        self._probe._finish_exchange(self)

    def __enter__(self) -> Exchange:
        return self

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        if not self.stopped:  # ``stop(nbytes=...)`` inside the block already recorded it
            self.stop()


class Probe:
    """Times one rank's steps and publishes them to a collector or a node daemon.

    ``endpoint`` is where to publish (``tcp://head:5555`` or the node daemon's ``ipc://`` endpoint);
    ``None`` keeps frames in memory only (``sent_frames``), for tests and offline generation.
    ``curve_keys`` is (own public, own secret, server public), Z85 or raw, when the collector uses keys.
    ``spool`` is a local recording every frame is also appended to (see the module docstring); if writing
    it fails (disk full), spooling stops and ``spool_error`` says why: training goes on.
    A probe belongs to one thread: time overlapping transfers from that thread (e.g. with a selector).
    """

    def __init__(
        self,
        rank: int,
        world: int,
        node: str,
        endpoint: str | None,
        *,
        layers: list[str] | tuple[str, ...] = (),
        job: str = "",
        clock: Clock = default_clock,
        wall_clock: Clock = time.time_ns,
        queue_frames: int = 64,
        context: zmq.Context | None = None,
        curve_keys: tuple[bytes, bytes, bytes] | None = None,
        spool: str | Path | None = None,
        sender: int | None = None,
        device: Markers | None = None,
    ) -> None:
        if not 0 <= rank < world:
            raise ValueError(f"rank {rank} is outside a world of {world}")
        wire.check_name(node, "node name")
        wire.check_name(job, "job name")
        self.rank, self.world, self.node, self.job = rank, world, node, job
        self.clock = clock
        self.wall_clock = wall_clock
        self.sender = secrets.randbits(63) if sender is None else sender  # fixed only for reproducible output
        self.seq = 0
        self.dropped = 0
        self._signed_off = False
        self.abandoned_steps = 0  # device timing: steps whose markers the device never passed (see end_step)
        self.step_index = 0
        self.offset_ns: int | None = None
        self.sent_frames: list[list[bytes]] = []
        self._layers: dict[str, int] = {}
        self._carries: dict[int, tuple[int, ...]] = {}
        self._schema_id = 0
        self._schema_sent_at = -SCHEMA_EVERY
        self._schema_dirty = True
        self._compute: list[int] = []
        self._exchange: list[int] = []
        self._in_flight: list[int] = []  # per layer: exchanges started and not yet stopped
        self._busy_since: list[int] = []  # per layer: when the current run of in-flight exchanges began
        self._compute_regions: dict[str, _Region | _DeviceRegion] = {}
        self._blocked_regions: dict[str, _Region | _DeviceRegion] = {}
        # device timing (``device=``): this step's markers, and ended steps the device has not finished
        self._pool = None if device is None else MarkerPool(device)
        self._regions: list[tuple[int, int, Marker, Marker]] = []
        self._blocking: list[Transfer] = []
        self._transfers: list[Transfer] = []
        self._windows: list[Window] = []
        self._loose: list[Marker] = []
        self._finishing = threading.Lock()  # ``finish`` may come from a collective's callback thread
        self._pending: deque[PendingStep] = deque()
        self._origin: Marker = None if self._pool is None else self._pool.take()
        self.last_mark: Marker = None  # device: the end marker of the latest region or exchange
        self._records: list[tuple[int, int, int, int, int, int, int, int]] = []
        self._open: dict[str, int] = {}
        self._step_start = clock()
        self._step_wall = wall_clock()
        self._next_ping = 0.0
        self._ping_t0: int | None = None  # wall time of the ping whose pong has not been read yet
        self._ping_sent = 0.0  # time.monotonic() when it was sent
        self._pong_looks = 0  # region starts left at which to look for its pong
        self._clock_samples: deque[tuple[int, int]] = deque(maxlen=CLOCK_SAMPLES)  # (delay, offset)
        for name in layers:
            self.layer(name)
        self.spool_error: str | None = None
        self._spool: RecordWriter | None = None
        if spool is not None:  # first: if it cannot be opened, no socket is left behind
            self._spool = RecordWriter(spool, {"tool": "watchtower-agent spool", "sender": self.sender,
                                               "rank": rank, "world": world, "node": node, "job": job})
        self._socket: zmq.Socket | None = None
        self._handshake: HandshakeWatch | None = None
        if endpoint is not None:
            ctx = context or zmq.Context.instance()
            sock = ctx.socket(zmq.DEALER)
            try:
                sock.setsockopt(zmq.SNDHWM, queue_frames)
                sock.setsockopt(zmq.LINGER, 1000)
                if curve_keys is not None:
                    sock.curve_publickey, sock.curve_secretkey, sock.curve_serverkey = curve_keys
                self._handshake = HandshakeWatch(sock)
                sock.connect(endpoint)
            except zmq.ZMQError:  # a bad key or endpoint: leave nothing open that would hang the context
                if self._handshake is not None:
                    self._handshake.close()
                sock.close()
                self._close_spool()
                raise
            self._socket = sock

    # ------------------------------------------------------------------------------------ layers
    def layer(self, name: str) -> int:
        """The index of layer ``name``, registering it (and re-announcing the schema) if it is new."""
        index = self._layers.get(name)
        if index is None:
            wire.check_name(name, "layer name")
            if len(self._layers) >= wire.MAX_LAYERS:
                raise ValueError(f"more than {wire.MAX_LAYERS} layers")
            index = len(self._layers)
            self._layers[name] = index
            self._compute.append(0)
            self._exchange.append(0)
            self._in_flight.append(0)
            self._busy_since.append(0)
            if self._pool is None:
                self._compute_regions[name] = _Region(self.clock, self._compute, index)
                self._blocked_regions[name] = _Region(self.clock, self._exchange, index)
            else:
                self._compute_regions[name] = _DeviceRegion(self, COMPUTE, index)
                self._blocked_regions[name] = _DeviceRegion(self, EXCHANGE, index)
            self._schema_id += 1
            self._schema_dirty = True
        return index

    @property
    def layers(self) -> tuple[str, ...]:
        return tuple(self._layers)

    def carries(self, layer: str, sources: Sequence[str]) -> None:
        """Declare that ``layer`` (e.g. a DDP bucket) carries the gradients of the layers ``sources``, so
        the head can say whose gradients arrive late. Sent with the schema (re-announced when it changes)."""
        index = self.layer(layer)
        carried = tuple(sorted({self.layer(name) for name in sources} - {index}))  # in model order
        if self._carries.get(index) != carried:
            self._carries[index] = carried
            self._schema_id += 1
            self._schema_dirty = True

    # ------------------------------------------------------------------------------------ timing
    def compute(self, layer: str) -> _Region:
        """``with probe.compute("attn.3"):`` times useful work of that layer."""
        if self._pong_looks:  # a pong read now, not at the step's end, keeps the delay short
            self._pong_looks -= 1
            self._poll_clock(ping=False)
        try:
            return self._compute_regions[layer]  # the hot path: one dict lookup
        except KeyError:
            self.layer(layer)
            return self._compute_regions[layer]

    def blocked(self, layer: str) -> _Region:
        """Times exchange (blocked-in-communication) time of a layer without a per-transfer record."""
        if self._pong_looks:
            self._pong_looks -= 1
            self._poll_clock(ping=False)
        try:
            return self._blocked_regions[layer]
        except KeyError:
            self.layer(layer)
            return self._blocked_regions[layer]

    def start_compute(self, layer: str) -> None:
        """Explicit form of ``compute`` for code that cannot use ``with``."""
        self.layer(layer)
        self._open[layer] = self.clock() if self._pool is None else self._pool.take()

    def stop_compute(self, layer: str) -> None:
        start = self._open.pop(layer, None)
        if start is None:
            raise RuntimeError(f"stop_compute({layer!r}) without start_compute")
        if self._pool is None:
            self._compute[self._layers[layer]] += self.clock() - start
        else:
            self.last_mark = end = self._pool.take()
            self._regions.append((COMPUTE, self._layers[layer], start, end))

    def exchange(self, layer: str, *, peer: int = wire.NO_PEER, nbytes: int = 0, op: wire.Op = wire.Op.RECV,
                 group: int = 0) -> Exchange | _DeviceExchange:
        """Start timing one exchange of ``layer``: a point-to-point ``op`` (SEND/RECV) with ``peer``, or a
        collective (``op`` such as ALLREDUCE, ``group`` = its group size, ``peer`` left at -1)."""
        self._check_peer(op, peer)
        if self._pool is not None:
            return _DeviceExchange(self, self.layer(layer), op, peer, group, nbytes)
        return Exchange(self, self.layer(layer), op, peer, group, nbytes)

    def _check_peer(self, op: wire.Op, peer: int) -> None:
        if op in wire.COLLECTIVE_OPS:
            if peer != wire.NO_PEER:
                raise ValueError("a collective has no single peer")
        elif not 0 <= peer < self.world:
            raise ValueError(f"peer {peer} is outside a world of {self.world}")

    # ------------------------------------------------------------------------------------ device streams
    @property
    def device_timing(self) -> bool:
        """Whether regions are timed by device markers (``device=``) rather than the host clock."""
        return self._pool is not None

    def _device_pool(self) -> MarkerPool:
        if self._pool is None:
            raise RuntimeError("device markers need a probe made with device=...; on the host clock use "
                               "exchange() or record_transfer()")
        return self._pool

    def transfer(self, layer: str, *, op: wire.Op, nbytes: int, peer: int = wire.NO_PEER, group: int = 0,
                 stream: Stream = None) -> Transfer:
        """Device timing: mark the start of a transfer on ``stream`` (a collective's own stream, or a
        stream that waits for it); ``finish`` marks its end. Its time is recorded for the link models;
        only the part a ``wait_window`` exposes is exchange time of ``layer``."""
        pool = self._device_pool()
        self._check_peer(op, peer)
        return Transfer(self.layer(layer), int(op), peer, group, nbytes, pool.take(stream))

    def finish(self, transfer: Transfer, stream: Stream = None) -> None:
        """Mark the end of ``transfer`` on ``stream``. May be called from another thread (a collective's
        completion callback); it belongs to the step during which it is called."""
        pool = self._device_pool()
        with self._finishing:  # not between end_step's copy of this step's transfers and its clearing them
            transfer.end = pool.take(stream)
            self._transfers.append(transfer)

    def mark(self) -> Marker:
        """Device timing: a marker on the current stream now, owned by this step (a ``wait_window`` start)."""
        marker = self._device_pool().take()
        self._loose.append(marker)
        return marker

    def wait_window(self, since: Marker, transfers: Sequence[Transfer]) -> None:
        """The current stream resumes here after waiting for ``transfers`` (finished, in this step); it
        stopped doing its own work at marker ``since`` (``last_mark`` after the last region, or ``mark()``).

        The span is the exposed part of those transfers, split among them in order of completion
        (``device.split_exposed``): a transfer that ended before ``since`` was hidden behind compute and
        costs nothing."""
        pool = self._device_pool()
        if any(t.end is None for t in transfers):
            raise RuntimeError("wait_window needs finished transfers")
        self._windows.append(Window(since, pool.take(), list(transfers)))

    def _begin_exchange(self, layer: int, start: int) -> None:
        if self._in_flight[layer] == 0:
            self._busy_since[layer] = start
        self._in_flight[layer] += 1

    def from_wall(self, wall_ns: int) -> int:
        """A wall-clock (``time.time_ns``, CLOCK_REALTIME) reading on the probe's clock, via this step's
        anchor: for stamps taken by a peer or by the kernel."""
        return self._step_start + (wall_ns - self._step_wall)

    def record_transfer(self, layer: str, *, op: wire.Op, nbytes: int, start_ns: int, end_ns: int,
                        peer: int = wire.NO_PEER, group: int = 0, peer_ready_ns: int | None = None,
                        exposed_ns: int = 0) -> None:
        """Record an exchange whose times were taken elsewhere (a progress thread, a collective's callback).

        ``start_ns``/``end_ns`` are on the probe's clock and describe the transfer itself, for the link
        models; ``exposed_ns`` is the part of it the training loop actually waited for, added to the layer's
        exchange time (a transfer hidden behind compute costs nothing). The layer's blocked time may also be
        timed separately with ``blocked(layer)``."""
        if end_ns < start_ns or exposed_ns < 0:
            raise ValueError("a transfer ends after it starts and exposes no negative time")
        if op in wire.COLLECTIVE_OPS:
            if peer != wire.NO_PEER:
                raise ValueError("a collective has no single peer")
        elif not 0 <= peer < self.world:
            raise ValueError(f"peer {peer} is outside a world of {self.world}")
        index = self.layer(layer)
        self._exchange[index] += exposed_ns
        wait = wire.UNKNOWN_WAIT if peer_ready_ns is None else min(peer_ready_ns - start_ns, end_ns - start_ns)
        self._records.append((index, int(op), peer, group, nbytes, start_ns - self._step_start,
                              end_ns - self._step_start, wait))

    def _finish_exchange(self, ex: Exchange) -> None:
        # Overlapping exchanges are blocked time once, not once each: add the union of their intervals.
        self._in_flight[ex.layer] -= 1
        if self._in_flight[ex.layer] == 0:
            self._exchange[ex.layer] += ex.end - self._busy_since[ex.layer]
        self._records.append((ex.layer, int(ex.op), ex.peer, ex.group, ex.nbytes,
                              ex.start - self._step_start, ex.end - self._step_start, ex.wait_ns))

    # ------------------------------------------------------------------------------------ steps
    def end_step(self) -> bool:
        """Close the current step, publish it without blocking, and start the next one.

        Returns True when the frame was queued, False when it was dropped (queue full). With a device
        backend the step waits until the device has passed its markers: this publishes every earlier step
        that is now complete, in order (none, one, or more), and returns False if any of them was dropped."""
        if self._pool is not None:
            return self._end_device_step()
        now = self.clock()
        layer_ns = np.array([self._compute, self._exchange], dtype=np.int64)
        ok = self._publish(self.step_index, self._step_wall, now - self._step_start, layer_ns, self._records)
        self.step_index += 1
        for totals in (self._compute, self._exchange):
            totals[:] = [0] * len(totals)
        self._records.clear()
        self._step_start = self.clock()
        self._step_wall = self.wall_clock()
        return ok

    def _end_device_step(self) -> bool:
        last = self._pool.take()  # type: ignore[union-attr]
        with self._finishing:
            transfers = self._transfers.copy()
            self._transfers.clear()
        self._pending.append(PendingStep(self.step_index, self._step_wall, self._origin, last, self._regions.copy(),
                                         self._blocking.copy(), transfers, self._windows.copy(), self._loose.copy()))
        for pending in (self._regions, self._blocking, self._windows, self._loose):
            pending.clear()  # cleared, not replaced: the regions hold these very lists
        self._origin = last
        self.step_index += 1
        self._step_wall = self.wall_clock()
        ok = self.publish_ready()
        while len(self._pending) > MAX_PENDING_STEPS:
            self._abandon(self._pending.popleft())
        return ok

    def _abandon(self, pending: PendingStep) -> None:
        """Give up on a step the device has not finished after ``MAX_PENDING_STEPS`` more: its frame is never
        sent (the collector sees that rank skip the step) and its markers are not reused, since the device may
        still reach them; the first one is reported on stderr, where the job's own log shows it."""
        if not self.abandoned_steps:
            print(f"watchtower probe (rank {self.rank}): the device has not finished step {pending.step} "
                  f"{MAX_PENDING_STEPS} steps later; its timing is abandoned (is a kernel or a collective hung?)",
                  file=sys.stderr)
        self.abandoned_steps += 1

    def publish_ready(self) -> bool:
        """Publish every ended step the device has finished, oldest first; never waits. False if a frame
        was dropped."""
        ok = True
        backend = self._pool.backend  # type: ignore[union-attr]
        while self._pending and self._pending[0].ready(backend):
            ok = self._publish_device_step(self._pending.popleft()) and ok
        return ok

    def drain(self, deadline_s: float = 2.0) -> int:
        """Publish pending steps as the device finishes them, polling their markers for up to
        ``deadline_s`` (for the end of training, never inside it). Returns how many are still pending."""
        end = time.monotonic() + deadline_s
        while self._pending:
            self.publish_ready()
            if not self._pending or time.monotonic() >= end:
                break
            time.sleep(0.001)
        return len(self._pending)

    @property
    def pending_steps(self) -> int:
        """Ended steps not yet published because the device has not finished them (0 on the host clock)."""
        return len(self._pending)

    def _publish_device_step(self, pending: PendingStep) -> bool:
        elapsed, origin = self._pool.backend.elapsed_ns, pending.origin  # type: ignore[union-attr]
        layer_ns = np.zeros((2, len(self._layers)), dtype=np.int64)  # layers may have grown since: pad
        for row, layer, start, end in pending.regions:
            layer_ns[row, layer] += max(0, elapsed(start, end))
        records: list[tuple[int, int, int, int, int, int, int, int]] = []
        blocked: dict[int, list[tuple[int, int]]] = {}
        for t in pending.blocking:
            start = elapsed(origin, t.start)
            end = max(start, elapsed(origin, t.end))
            blocked.setdefault(t.layer, []).append((start, end))
            records.append((t.layer, t.op, t.peer, t.group, t.nbytes, start, end, wire.UNKNOWN_WAIT))
        for layer, intervals in blocked.items():
            layer_ns[EXCHANGE, layer] += union_ns(intervals)
        for w in pending.windows:
            spans = [(elapsed(origin, t.start), elapsed(origin, t.end)) for t in w.transfers]
            shares = split_exposed(elapsed(origin, w.start), elapsed(origin, w.end), spans)
            for t, share in zip(w.transfers, shares, strict=True):
                layer_ns[EXCHANGE, t.layer] += share
        for t in pending.transfers:
            start = elapsed(origin, t.start)
            records.append((t.layer, t.op, t.peer, t.group, t.nbytes, start, max(start, elapsed(origin, t.end)),
                            wire.UNKNOWN_WAIT))
        ok = self._publish(pending.step, pending.wall_ns, max(0, elapsed(origin, pending.last)), layer_ns, records)
        done = [origin, *pending.loose, *(w.end for w in pending.windows)]
        for _, _, start, end in pending.regions:
            done += (start, end)
        for t in (*pending.blocking, *pending.transfers):
            done += (t.start, t.end)
        self._pool.give(done)  # type: ignore[union-attr]  # ``last`` stays: it is the next step's origin
        return ok

    def _publish(self, step: int, wall_ns: int, duration_ns: int, layer_ns: np.ndarray,
                 records: list[tuple[int, int, int, int, int, int, int, int]]) -> bool:
        if records:
            exchanges = np.array(records, dtype=np.int64).T
        else:
            exchanges = np.empty((len(wire.EXCHANGE_COLUMNS), 0), dtype=np.int64)
        self._poll_clock()
        if self._schema_dirty or self.seq - self._schema_sent_at >= SCHEMA_EVERY:
            self._send_schema()
        return self._send(wire.encode_step(
            self.sender, self.seq, wall_ns, step=step, duration_ns=duration_ns, dropped_total=self.dropped,
            schema_id=self._schema_id, layer_ns=layer_ns, exchanges=exchanges,
        ))

    def _send_schema(self) -> None:
        frames = wire.encode_schema(self.sender, self.seq, self.wall_clock(), schema_id=self._schema_id,
                                    rank=self.rank, world=self.world, node=self.node, layers=self.layers,
                                    job=self.job, carries=sorted(self._carries.items()))
        self._schema_sent_at = self.seq
        if self._send(frames):
            self._schema_dirty = False

    def _send(self, frames: list[bytes]) -> bool:
        """Hand frames to ZeroMQ without blocking; a full queue drops the frame and counts it."""
        self.seq += 1
        if self._spool is not None:
            self._spool_frame(frames)
        if self._socket is None:
            self.sent_frames.append(frames)
            return True
        try:
            self._socket.send_multipart([b"", *frames], flags=zmq.NOBLOCK, copy=False)
        except zmq.Again:
            self.dropped += 1
            self._schema_dirty = True  # the collector may not know us yet when it comes back
            return False
        return True

    def _spool_frame(self, frames: list[bytes]) -> None:
        try:
            self._spool.write(time.time_ns(), frames)  # type: ignore[union-attr]
        except OSError as exc:
            self.spool_error = f"spool stopped: {exc.strerror}"
            self._close_spool()

    def _close_spool(self) -> None:
        if self._spool is not None:
            self._spool.close()  # unbuffered: nothing is left to flush, so closing cannot fail on a full disk
            self._spool = None

    # ------------------------------------------------------------------------------------ clock
    def _poll_clock(self, *, ping: bool = True) -> None:
        """Read any pong from the collector and, with ``ping``, start a new ping now and then; never waits.

        The NTP estimate is off by up to half the round trip, and a pong read late makes the round trip
        late: so a pong is looked for at the next ``PONG_LOOKS`` region starts after a ping (not only at the
        step's end, a whole step later), and of the last ``CLOCK_SAMPLES`` samples the one of least delay is used
        and reported (NTP's clock filter, RFC 5905 §10)."""
        if self._socket is None:
            return
        while True:
            try:
                reply = self._socket.recv_multipart(flags=zmq.NOBLOCK)
            except zmq.Again:
                break
            t3 = self.wall_clock()
            try:
                message = wire.decode(reply[1:] if reply and not reply[0] else reply)
            except wire.WireError:
                continue
            if isinstance(message, wire.ClockPong) and message.t0 == self._ping_t0:
                self._ping_t0, self._pong_looks = None, 0
                offset, delay = wire.clock_offset(message.t0, message.t1, message.t2, t3)
                self._clock_samples.append((delay, offset))
                delay, self.offset_ns = min(self._clock_samples)
                self._send(wire.encode_offset(self.sender, self.seq, t3, self.offset_ns, delay))
        now = time.monotonic()
        # Every step until the filter is full, then every CLOCK_EVERY_S; one ping out at a time (a pong lost on
        # the way is given up after CLOCK_EVERY_S).
        if ping and now >= self._next_ping and (self._ping_t0 is None or now >= self._ping_sent + CLOCK_EVERY_S):
            self._next_ping = now + (CLOCK_EVERY_S if len(self._clock_samples) >= CLOCK_SAMPLES - 1 else 0.0)
            self._ping_sent = now
            self._ping_t0 = self.wall_clock()
            if self._send(wire.encode_ping(self.sender, self.seq, self._ping_t0)):
                self._pong_looks = PONG_LOOKS

    def refused(self) -> str | None:
        """Why the collector refused this probe's handshake (None while it has not): what a refused agent
        tells its user, since no frame of its ever arrives."""
        return None if self._handshake is None else self._handshake.refused()

    def sign_off(self) -> bool:
        """Tell the collector this rank has finished (``close`` does): a rank that signs off is shown as
        finished, never as silent, and its final drop count makes loss at the sender exact. Once only."""
        if self._signed_off:
            return True
        self._signed_off = True
        last = self.step_index - 1 - len(self._pending)  # the newest step published (device steps may be left)
        return self._send(wire.encode_sign_off(self.sender, self.seq, self.wall_clock(), last_step=max(-1, last),
                                               dropped_total=self.dropped))

    def close(self, drain_s: float = 2.0, *, finished: bool = True) -> None:
        """Close the socket and spool; with device timing, first publish what the device finishes within
        ``drain_s`` seconds. ``finished``: the training loop ended as it should, so the rank signs off; a
        loop that failed passes False (``with Probe(...)`` does on an exception) and the rank goes silent,
        which is what the console must then show."""
        if self._pending:
            self.drain(drain_s)
        if finished and (self._socket is not None or self._spool is not None):
            self.sign_off()
        if self._socket is not None:
            if self._handshake is not None:
                self._handshake.refused()  # the last outcome, kept for after the close
                self._handshake.close()
            self._socket.close()
            self._socket = None
        self._close_spool()

    def __enter__(self) -> Probe:
        return self

    def __exit__(self, exc_type: type[BaseException] | None, *exc: object) -> None:
        self.close(finished=exc_type is None)
