"""A small cluster of network namespaces on one machine, so Watchtower can watch real TCP over shaped links.

Used by ``demo/netns-cluster`` and by ``tests/netns/``. Layout, for a name prefix P and N nodes:

- ``P-br``: a bridge ``br0`` with one port ``p<i>`` per node (no address: it only switches);
- ``P-hub``: ``eth0`` at 10.213.47.1, where the collector listens;
- ``P-node<i>``: ``eth0`` at 10.213.47.(11+i), one node of the job (one workload rank).

Why this shape: every veth pair is created inside the bridge namespace and its other end is moved straight
into its node's namespace, so nothing is ever added to the caller's namespace and no packet can leave the
set. That is also why any private /24 will do: the subnet is only routed inside these namespaces.

A node's egress is shaped with ``tbf`` on its own ``eth0``; its ingress with ``tbf`` on its bridge port
(the port's egress is the traffic towards the node). Only namespaces whose names start with ``P-`` are ever
touched, and only processes inside them are ever signalled.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import signal
import subprocess
import sys
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Literal

from agent import wire
from watchtower.recording import RecordingError, RecordingReader

SUBNET = "10.213.47"  # RFC 1918; routed only inside the namespaces, so it cannot clash with the host
HUB = "hub"
BRIDGE = "br"
HUB_ADDRESS = f"{SUBNET}.1"
FIRST_NODE_HOST = 11
TBF_BURST = "32kbit"  # a few full frames: enough for tbf to reach its rate, small enough to shape tightly
TBF_LATENCY = "50ms"  # queue bound: longer waits are dropped, as on a real congested port
COMMAND_TIMEOUT_S = 15.0
STOP_GRACE_S = 5.0
COLLECTOR_PORT = 5555
RANK_PORT = 7000

Direction = Literal["egress", "ingress"]


class NetnsError(RuntimeError):
    """An ``ip``/``tc`` command failed, or the cluster could not be built."""


def run(argv: Sequence[str], *, timeout: float = COMMAND_TIMEOUT_S) -> str:
    """Run a short command with a deadline; its stdout, or ``NetnsError`` with its stderr."""
    try:
        done = subprocess.run(argv, capture_output=True, text=True, timeout=timeout, check=False)
    except subprocess.TimeoutExpired:
        raise NetnsError(f"{' '.join(argv)}: no answer within {timeout:g} s") from None
    except FileNotFoundError:
        raise NetnsError(f"{argv[0]}: command not found") from None
    if done.returncode != 0:
        raise NetnsError(f"{' '.join(argv)}: {done.stderr.strip() or f'exit status {done.returncode}'}")
    return done.stdout


def missing_tools() -> list[str]:
    """The commands this module needs that are not on PATH."""
    return [tool for tool in ("ip", "tc") if shutil.which(tool) is None]


def wait_until(condition: Callable[[], bool], timeout: float, what: str, *, every: float = 0.05) -> None:
    """Poll ``condition`` until it holds; ``TimeoutError`` naming ``what`` after ``timeout`` seconds."""
    deadline = time.monotonic() + timeout
    while not condition():
        if time.monotonic() >= deadline:
            raise TimeoutError(f"{what}: not within {timeout:g} s")
        time.sleep(every)


def namespaces(prefix: str) -> list[str]:
    """Existing namespaces that belong to ``prefix`` (named ``prefix-…``)."""
    names = [line.split()[0] for line in run(["ip", "netns", "list"]).splitlines() if line.strip()]
    return sorted(name for name in names if name.startswith(f"{prefix}-"))


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    return True


def _signal_and_wait(pids: set[int], sig: signal.Signals) -> set[int]:
    """Signal ``pids`` and wait up to the grace period for them to go; the ones still there."""
    for pid in pids:
        with contextlib.suppress(ProcessLookupError):
            os.kill(pid, sig)
    with contextlib.suppress(TimeoutError):
        wait_until(lambda: not any(map(_alive, pids)), STOP_GRACE_S, "processes to exit", every=0.1)
    return set(filter(_alive, pids))


def teardown(prefix: str) -> list[str]:
    """Stop every process inside ``prefix``'s namespaces, then delete the namespaces. Idempotent.

    Processes get SIGTERM (the collector then closes its recording cleanly), SIGKILL after a grace period.
    Deleting a namespace removes the veth ends in it, and with them their peers in the bridge namespace.
    """
    owned = namespaces(prefix)
    pids = {int(pid) for ns in owned for pid in run(["ip", "netns", "pids", ns]).split()}
    if _signal_and_wait(pids, signal.SIGTERM):
        _signal_and_wait(pids, signal.SIGKILL)
    for ns in owned:
        run(["ip", "netns", "del", ns])
    return owned


@dataclass
class NetnsCluster:
    """N node namespaces and a hub on one bridge. ``up()`` builds it, ``down()`` removes all of it."""

    prefix: str
    n_nodes: int
    processes: list[subprocess.Popen[bytes]] = field(default_factory=list)

    @property
    def nodes(self) -> list[str]:
        return [f"node{i}" for i in range(self.n_nodes)]

    def ns(self, name: str) -> str:
        """The namespace of a node, of ``hub`` or of ``br``."""
        return f"{self.prefix}-{name}"

    def address(self, name: str) -> str:
        """The IPv4 address of a node or of the hub."""
        return HUB_ADDRESS if name == HUB else f"{SUBNET}.{FIRST_NODE_HOST + self.nodes.index(name)}"

    def up(self) -> None:
        """Create the namespaces and links; on any failure remove whatever was made, then raise."""
        if namespaces(self.prefix):
            raise NetnsError(f"namespaces named {self.prefix}-* exist already (run down first)")
        try:
            bridge = self.ns(BRIDGE)
            run(["ip", "netns", "add", bridge])
            run(["ip", "-n", bridge, "link", "add", "br0", "type", "bridge"])
            run(["ip", "-n", bridge, "link", "set", "br0", "up"])
            for i, name in enumerate([HUB, *self.nodes]):
                ns = self.ns(name)
                run(["ip", "netns", "add", ns])
                # Made inside the bridge namespace, the node end moved out at once: the host never sees it.
                run(["ip", "-n", bridge, "link", "add", f"p{i}", "type", "veth", "peer", "name", "eth0", "netns", ns])
                run(["ip", "-n", bridge, "link", "set", f"p{i}", "master", "br0", "up"])
                run(["ip", "-n", ns, "addr", "add", f"{self.address(name)}/24", "dev", "eth0"])
                run(["ip", "-n", ns, "link", "set", "eth0", "up"])
                run(["ip", "-n", ns, "link", "set", "lo", "up"])
        except NetnsError:
            self.down()
            raise

    def _port(self, node: str, direction: Direction) -> tuple[str, str]:
        """(namespace, device) whose root qdisc shapes ``node``'s traffic in ``direction``."""
        if direction == "egress":
            return self.ns(node), "eth0"
        return self.ns(BRIDGE), f"p{1 + self.nodes.index(node)}"  # p0 is the hub's port

    def shape(self, node: str, rate: str, direction: Direction = "egress") -> None:
        """Put (or change, part-way through a run) a token bucket of ``rate`` (tc units, e.g. 40mbit)."""
        ns, dev = self._port(node, direction)
        run(["tc", "-n", ns, "qdisc", "replace", "dev", dev, "root", "tbf", "rate", rate, "burst", TBF_BURST,
             "latency", TBF_LATENCY])

    def unshape(self, node: str, direction: Direction = "egress") -> None:
        """Back to the device's default qdisc (no-op when it is not shaped)."""
        ns, dev = self._port(node, direction)
        if " tbf " in run(["tc", "-n", ns, "qdisc", "show", "dev", dev]):
            run(["tc", "-n", ns, "qdisc", "del", "dev", dev, "root"])

    def spawn(self, where: str, argv: Sequence[str], log: Path) -> subprocess.Popen[bytes]:
        """Start ``argv`` inside ``where``'s namespace in a session of its own (so its group can be killed),
        output to ``log``."""
        with open(log, "ab") as out:
            proc = subprocess.Popen(["ip", "netns", "exec", self.ns(where), *argv], stdin=subprocess.DEVNULL,
                                    stdout=out, stderr=subprocess.STDOUT, start_new_session=True)
        self.processes.append(proc)
        return proc

    def down(self) -> None:
        """Stop the processes this object started (their whole groups), then everything left in the
        namespaces, and delete the namespaces."""
        for proc in self.processes:
            stop(proc, signal.SIGTERM)
        self.processes.clear()
        teardown(self.prefix)


def stop(proc: subprocess.Popen[bytes], sig: signal.Signals, grace_s: float = STOP_GRACE_S) -> int:
    """Signal a process group started by ``spawn``; SIGKILL it if it is still there after ``grace_s``."""
    if proc.poll() is None:
        with contextlib.suppress(ProcessLookupError):
            os.killpg(proc.pid, sig)
        try:
            return proc.wait(grace_s)
        except subprocess.TimeoutExpired:
            with contextlib.suppress(ProcessLookupError):
                os.killpg(proc.pid, signal.SIGKILL)
    return proc.wait(grace_s)


# ---------------------------------------------------------------------------------------- a job to watch

@dataclass(frozen=True)
class Job:
    """What the ring halo-exchange job runs (see ``watchtower-agent workload``)."""

    steps: int = 40
    layers: int = 8
    exchange_bytes: int = 262_144
    compute_ms: float = 5.0
    seed: int = 1
    collective: bool = False  # only a ring allreduce per step (workload --collective)


def collector_endpoint() -> str:
    return f"tcp://{HUB_ADDRESS}:{COLLECTOR_PORT}"


def start_collector(cluster: NetnsCluster, recording: Path, log: Path) -> subprocess.Popen[bytes]:
    """``watchtower collect`` in the hub namespace; stop it with SIGINT or SIGTERM to close the recording."""
    return cluster.spawn(HUB, [sys.executable, "-m", "watchtower.cli", "collect", "--listen", collector_endpoint(),
                               "--insecure", "--record", str(recording)], log)


def start_ranks(cluster: NetnsCluster, job: Job, logdir: Path) -> list[subprocess.Popen[bytes]]:
    """One workload rank per node, in a ring, publishing to the hub's collector."""
    peers = ",".join(f"{cluster.address(node)}:{RANK_PORT}" for node in cluster.nodes)
    return [cluster.spawn(node, [sys.executable, "-m", "agent.cli", "workload", "--rank", str(rank), "--peers", peers,
                                 "--collector", collector_endpoint(), "--node", node, "--steps", str(job.steps),
                                 "--layers", str(job.layers), "--exchange-bytes", str(job.exchange_bytes),
                                 "--compute-ms", str(job.compute_ms), "--seed", str(job.seed),
                                 *(["--collective"] if job.collective else [])],
                          logdir / f"{node}.log")
            for rank, node in enumerate(cluster.nodes)]


def start_daemons(cluster: NetnsCluster, logdir: Path, cluster_file: Path | None = None,
                  pair_checks: bool = True) -> list[subprocess.Popen[bytes]]:
    """One node daemon per node (``watchtower-agent run``), with pair checks unless told otherwise; each
    finds the others through the collector. ``cluster_file`` gives the nominal rates and the budget."""
    return [cluster.spawn(node, [sys.executable, "-m", "agent.cli", "run", "--collector", collector_endpoint(),
                                 "--node", node, "--local", f"ipc://{logdir / (node + '.ipc')}",
                                 *(["--pair-checks"] if pair_checks else []),
                                 *(["--cluster", str(cluster_file)] if cluster_file else [])],
                          logdir / f"{node}-daemon.log")
            for node in cluster.nodes]


def recorded_steps(recording: Path) -> dict[int, int]:
    """Newest step each rank has in the recording so far (rank → step). The collector may be mid-write:
    a torn last record is simply not counted yet."""
    rank_of: dict[int, int] = {}
    last: dict[int, int] = {}
    try:
        reader = RecordingReader(recording)
    except RecordingError:  # not created yet, or the preamble is still being written
        return {}
    with reader:
        for _, frames in reader:
            try:
                message = wire.decode(frames)
            except wire.WireError:
                continue
            if isinstance(message, wire.Schema) and message.rank >= 0:
                rank_of[message.header.sender] = message.rank
            elif isinstance(message, wire.Step) and message.header.sender in rank_of:
                rank = rank_of[message.header.sender]
                last[rank] = max(last.get(rank, -1), message.step)
    return last
