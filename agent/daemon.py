"""The node daemon: one uplink per node to the collector, plus the node's own figures.

Local probes connect a DEALER to the daemon's ROUTER (an ipc endpoint). The relay (``agent.uplink``) sends
their messages to the collector through one DEALER, several at a time as one BATCH (each message's header
intact), and replies (clock pongs) back by the routing envelope the ROUTER added. Messages that ask for an
answer go alone, so at the collector a ping arrives as ``[daemon id, probe id, b"", header, ...]``:
everything up to the empty delimiter is envelope.

The daemon speaks for the node itself through a DEALER of its own, connected to its ROUTER over inproc, so
its SCHEMA (rank -1) and NODE samples share the uplink. It follows the probe's rules: sequence numbers on
every frame, NOBLOCK sends, drops counted and the schema re-announced after one.

With pair checks (``CheckOptions``) the daemon also runs a check listener and a checker thread
(``agent.pairchecks``): it says where its listener is (CHECK_HELLO) at every sample, learns the other
daemons' listeners from the collector's CHECK_PEERS answer (or a cluster file), and sends the checker's
results as CHECK records on the same uplink. Training processes are never involved.
"""

from __future__ import annotations

import errno
import os
import secrets
import socket
import tempfile
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import zmq

from agent import wire
from agent.checkplan import DEFAULT_BUDGET, WeightBook, check_sizes, slot_seconds
from agent.handshake import HandshakeWatch
from agent.nodestats import NodeFigures, NodeSampler
from agent.pairchecks import CheckConfig, CheckListener, PairChecker
from agent.probe import CLOCK_EVERY_S, SCHEMA_EVERY
from agent.uplink import FLUSH_S, BatchingRelay

LINGER_MS = 500  # on stop, frames still queued for the collector get this long to leave
UPLINK_HWM = 1_250  # uplink messages (batches, ~8 of a node's messages each) held while the collector is away;
# beyond, the relay stops reading the probes, whose own queues fill: they drop and count
PUBLISH_HWM = 64
PONG_WAIT_MS = 200  # how long the daemon waits for the collector's answer to a clock ping


PLAN_MARGIN_S = 2.5  # a cycle is planned with the peer list the collector stamped this long before it


class DaemonError(RuntimeError):
    """The daemon could not start (for example its local endpoint cannot be bound)."""


@dataclass(frozen=True)
class CheckOptions:
    """Pair checks: the node's nominal rate and the budget's share of it, where to listen and what to
    announce, and (from a cluster file) the listeners of every node, which replaces asking the collector."""

    nominal_Bps: float
    budget: float = DEFAULT_BUDGET
    listen_host: str = "0.0.0.0"
    listen_port: int = 0
    advertise_host: str = "127.0.0.1"
    endpoints: dict[str, str] = field(default_factory=dict)


def default_local_endpoint() -> str:
    """A per-user ipc endpoint in the temporary folder, so probes on this node can find it without flags."""
    return f"ipc://{Path(tempfile.gettempdir()) / f'watchtower-agent-{os.getuid()}' / 'daemon.ipc'}"


class NodeDaemon:
    """Binds and connects in ``__init__`` (errors surface there), relays in ``serve``, cleans up in ``close``."""

    def __init__(self, collector_endpoint: str, node: str, local_endpoint: str | None = None, *,
                 interval_s: float = 1.0, sampler: NodeSampler | None = None,
                 context: zmq.Context | None = None, curve_keys: tuple[bytes, bytes, bytes] | None = None,
                 checks: CheckOptions | None = None, on_refused: Callable[[str], None] | None = None) -> None:
        if interval_s <= 0:
            raise ValueError("the sampling interval must be positive")
        self.node = node
        self.interval_s = interval_s
        self.local_endpoint = local_endpoint or default_local_endpoint()
        self.sender = secrets.randbits(63)
        self.seq = 0
        self.dropped = 0
        self.offset_ns: int | None = None
        self._schema_sent_at = -SCHEMA_EVERY
        self._schema_dirty = True
        self._next_ping = 0.0
        self.pong_wait_ms = PONG_WAIT_MS
        self.flush_s = FLUSH_S  # how long the relay holds the probes' messages to send them as one batch
        self.relay: BatchingRelay | None = None  # while serving
        self._sampler = sampler or NodeSampler()
        self.checker: PairChecker | None = None
        self._check_options = checks
        self.handshake: HandshakeWatch | None = None  # with keys: the uplink's handshakes, for on_refused
        self._on_refused = on_refused
        self._told: str | None = None
        self._ipc_path: Path | None = None  # set once bound: the file close() removes
        self._made_dir = self._prepare_ipc(self.local_endpoint)
        self._own_context = context is None
        self._ctx = context or zmq.Context()
        self._sockets: list[zmq.Socket] = []
        inproc = f"inproc://watchtower-daemon-{self.sender:x}"
        try:
            self._frontend = self._socket(zmq.ROUTER, linger=0)
            self._frontend.bind(self.local_endpoint)
            if self.local_endpoint.startswith("ipc://"):
                self._ipc_path = Path(self.local_endpoint.removeprefix("ipc://"))
            self._frontend.bind(inproc)
            self._backend = self._socket(zmq.DEALER, linger=LINGER_MS)
            self._backend.setsockopt(zmq.SNDHWM, UPLINK_HWM)
            if curve_keys is not None:  # (own public, own secret, collector public): the uplink leaves the node
                b = self._backend
                b.curve_publickey, b.curve_secretkey, b.curve_serverkey = curve_keys
                self.handshake = HandshakeWatch(b)
            self._backend.connect(collector_endpoint)
            self._control = self._socket(zmq.PAIR, linger=0)
            self._control.bind(f"{inproc}-control")
            self._steer = self._socket(zmq.PAIR, linger=0)
            self._steer.connect(f"{inproc}-control")
            self._publisher = self._socket(zmq.DEALER, linger=LINGER_MS)
            self._publisher.setsockopt(zmq.SNDHWM, PUBLISH_HWM)
            self._publisher.connect(inproc)
        except zmq.ZMQError as exc:
            self.close()
            raise DaemonError(f"cannot start the relay ({self.local_endpoint} -> {collector_endpoint}): "
                              f"{exc.strerror}") from None
        if checks is not None:
            self._start_checks(checks)

    def _start_checks(self, options: CheckOptions) -> None:
        try:
            listener = CheckListener(options.listen_host, options.listen_port)
        except OSError as exc:
            self.close()
            raise DaemonError(f"cannot listen for pair checks on {options.listen_host}:{options.listen_port}: "
                              f"{exc.strerror}") from None
        sizes = check_sizes(options.nominal_Bps)
        config = CheckConfig(self.node, sizes, slot_seconds(sizes, options.nominal_Bps, options.budget),
                             options.budget, options.nominal_Bps)
        self.check_endpoint = f"{options.advertise_host}:{listener.port}"
        book = WeightBook(PLAN_MARGIN_S)
        self.checker = PairChecker(config, book, listener)
        if options.endpoints:  # a cluster file lists every listener: the plan holds from the start
            book.add(0, list(options.endpoints), {})
            self.checker.endpoints = dict(options.endpoints)

    def _socket(self, kind: int, *, linger: int) -> zmq.Socket:
        sock = self._ctx.socket(kind)
        sock.setsockopt(zmq.LINGER, linger)
        self._sockets.append(sock)
        return sock

    @staticmethod
    def _prepare_ipc(endpoint: str) -> Path | None:
        """Create the folder of an ipc endpoint (private to this user); returns it if close must remove it."""
        if not endpoint.startswith("ipc://"):
            return None
        path = Path(endpoint.removeprefix("ipc://"))
        if path.exists() and _listening(path):  # binding would silently take the socket from it
            raise DaemonError(f"another process already listens on {endpoint}")
        if path.parent.is_dir():
            return None
        try:
            path.parent.mkdir(mode=0o700, parents=True)
        except OSError as exc:
            raise DaemonError(f"cannot create {path.parent}: {exc.strerror}") from None
        return path.parent

    # ------------------------------------------------------------------------------------ running
    def serve(self, stop: threading.Event) -> None:
        """Relay and sample until ``stop`` is set; then stop the relay and return."""
        relay = self.relay = BatchingRelay(self._frontend, self._backend, self._control, flush_s=self.flush_s)
        relaying = threading.Thread(target=relay.run, name="watchtower-relay", daemon=True)
        relaying.start()
        if self.checker is not None:
            self.checker.start()
        try:
            self._send_schema()
            self.check_tick()
            next_at = time.monotonic() + self.interval_s
            while not stop.wait(max(0.0, next_at - time.monotonic())):
                next_at = max(next_at + self.interval_s, time.monotonic())
                self.publish(self._sampler.sample())
                self.check_tick()
                self._tell_refusal()
        finally:
            if self.checker is not None:  # its last results leave before the relay stops
                self.checker.stop()
                self.checker.listener.close()
                self._send_results()
            self._steer.send(b"TERMINATE")
            relaying.join()

    def _tell_refusal(self) -> None:
        """Say once why the collector refuses the uplink (again only if the reason changes)."""
        reason = self.handshake.refused() if self.handshake is not None else None
        if reason is not None and reason != self._told and self._on_refused is not None:
            self._on_refused(reason)
        self._told = reason

    def check_tick(self) -> None:
        """Send the checker's results since the last tick, and (unless a cluster file lists the listeners)
        tell the collector where this node's listener is; its answer is read with the other replies."""
        if self.checker is None:
            return
        self._send_results()
        if not (self._check_options and self._check_options.endpoints):
            self._send(wire.encode_check_hello(self.sender, self.seq, time.time_ns(), node=self.node,
                                               endpoint=self.check_endpoint))
        self._read_replies()

    def _send_results(self) -> None:
        checker = self.checker
        assert checker is not None
        peers, table = checker.drain()
        if table.shape[1]:
            self._send(wire.encode_checks(self.sender, self.seq, time.time_ns(), period_s=checker.period_s,
                                          budget=checker.config.budget, deferred_total=checker.deferred,
                                          peers=peers, results=table))

    def _read_replies(self) -> None:
        """Take what the collector sent back and nobody waits for: late pongs (dropped), peer lists."""
        while self._publisher.poll(0):
            self._reply(self._publisher.recv_multipart())

    def _reply(self, reply: list[bytes]) -> wire.Message | None:
        try:
            message = wire.decode(reply[1:] if reply and not reply[0] else reply)
        except wire.WireError:
            return None
        if isinstance(message, wire.CheckPeers) and self.checker is not None:
            self.checker.book.add(message.stamp_ns, [node for node, _ in message.peers],
                                  {(a, b): w for a, b, w in message.weights})
            self.checker.endpoints = dict(message.peers)
        return message

    def publish(self, figures: NodeFigures) -> bool:
        """Send one NODE sample (and the schema when due), then sync the clock when due.
        Returns False when the sample was dropped."""
        if self._schema_dirty or self.seq - self._schema_sent_at >= SCHEMA_EVERY:
            self._send_schema()
        sent = self._send(wire.encode_node(
            self.sender, self.seq, time.time_ns(), cpu_percent=figures.cpu_percent,
            memory_percent=figures.memory_percent, interval_s=figures.interval_s, nics=figures.nics,
            nic_values=figures.nic_values))
        self._sync_clock()
        return sent

    def _send_schema(self) -> None:
        frames = wire.encode_schema(self.sender, self.seq, time.time_ns(), schema_id=1, rank=-1, world=1,
                                    node=self.node, layers=())
        self._schema_sent_at = self.seq
        if self._send(frames):
            self._schema_dirty = False

    def _send(self, frames: list[bytes]) -> bool:
        self.seq += 1
        try:
            self._publisher.send_multipart([b"", *frames], flags=zmq.NOBLOCK, copy=False)
        except zmq.Again:
            self.dropped += 1
            self._schema_dirty = True
            return False
        return True

    def _sync_clock(self) -> None:
        """Now and then, measure the node's clock offset to the collector (the NTP estimate).

        Unlike a probe, the daemon can afford to wait briefly for the pong, and must: a pong read late makes
        t3 late and biases the offset by half the delay. So a pong that misses the wait is discarded.
        """
        self._read_replies()  # late pongs from an earlier ping, peer lists
        now = time.monotonic()
        if now < self._next_ping:
            return
        self._next_ping = now + CLOCK_EVERY_S
        t0 = time.time_ns()
        if not self._send(wire.encode_ping(self.sender, self.seq, t0)):
            return
        give_up = time.monotonic() + self.pong_wait_ms / 1000
        while self._publisher.poll(max(0, int((give_up - time.monotonic()) * 1000))):
            reply = self._publisher.recv_multipart()
            t3 = time.time_ns()
            message = self._reply(reply)
            if isinstance(message, wire.ClockPong) and message.t0 == t0:
                self.offset_ns, delay = wire.clock_offset(message.t0, message.t1, message.t2, t3)
                self._send(wire.encode_offset(self.sender, self.seq, t3, self.offset_ns, delay))
                return
            if time.monotonic() >= give_up:
                return

    # ------------------------------------------------------------------------------------ cleanup
    def close(self) -> None:
        """Close the sockets and remove the ipc socket file (and its folder, if the daemon made it)."""
        if self.checker is not None:
            self.checker.stop()
            self.checker.listener.close()
            self.checker = None
        if self.handshake is not None:
            self.handshake.close()
            self.handshake = None
        for sock in self._sockets:
            sock.close()
        self._sockets.clear()
        if self._own_context:
            self._ctx.term()
        if self._ipc_path is not None:
            self._ipc_path.unlink(missing_ok=True)
            self._ipc_path = None
        if self._made_dir is not None:
            try:
                self._made_dir.rmdir()
            except OSError as exc:  # someone else put files there: leave the folder
                if exc.errno not in (errno.ENOTEMPTY, errno.ENOENT):
                    raise
            self._made_dir = None


def _listening(path: Path) -> bool:
    """Whether something accepts connections on the unix socket at ``path`` (else the file is stale)."""
    with socket.socket(socket.AF_UNIX, socket.SOCK_STREAM) as probe:
        try:
            probe.connect(str(path))
        except OSError:
            return False
    return True


def run_daemon(collector_endpoint: str, node: str, local_endpoint: str | None = None, interval_s: float = 1.0,
               stop_event: threading.Event | None = None,
               curve_keys: tuple[bytes, bytes, bytes] | None = None, checks: CheckOptions | None = None,
               on_refused: Callable[[str], None] | None = None) -> None:
    """Run a node daemon until ``stop_event`` is set (forever without one)."""
    daemon = NodeDaemon(collector_endpoint, node, local_endpoint, interval_s=interval_s, curve_keys=curve_keys,
                        checks=checks, on_refused=on_refused)
    try:
        daemon.serve(stop_event or threading.Event())
    finally:
        daemon.close()
