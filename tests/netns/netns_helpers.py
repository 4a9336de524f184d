"""Running the ring job on a namespace cluster and reading what ``watchtower report --json`` makes of it."""

from __future__ import annotations

import contextlib
import json
import os
import signal
import subprocess
import sys
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

from netns_cluster import Job, NetnsCluster, start_collector, start_daemons, start_ranks, stop

JOB_TIMEOUT_S = 120.0  # the runs take 20-30 s; a hung rank must not hang the suite
REPORT_TIMEOUT_S = 60.0
# The job's processes run ahead of everything else on the machine (a lower nice value; root may set it): on a
# shared machine, other processes taking the two cores made a healthy run's step time rise 28-50 % for tens
# of steps, a real slowdown the alerts rightly report, but not the job's doing nor what the tests check.
JOB_NICE = -10

# Full-size TCP segments (MTU 1500) as tbf counts them. tbf charges each packet's length at the qdisc, which
# on Ethernet is the frame without preamble and FCS: 1500 + 14-byte header (IEEE 802.3) = 1514 bytes. The
# payload in it is 1500 - 20 (IPv4 header, RFC 791) - 20 (TCP header, RFC 793) - 12 (timestamps option,
# RFC 7323; on by default, net.ipv4.tcp_timestamps = 1) = 1448 bytes. DESIGN.md §6 measured exactly this:
# 4.78 MB/s through 40mbit = 40e6/8 × 1448/1514.
FRAME_BYTES = 1514
SEGMENT_PAYLOAD = 1500 - 20 - 20 - 12


def tcp_payload_Bps(rate_bps: float) -> float:
    """Bytes of TCP payload per second that a tbf of ``rate_bps`` lets through."""
    return rate_bps / 8 * SEGMENT_PAYLOAD / FRAME_BYTES


def tc_rate(rate_bps: float) -> str:
    """A rate in tc's syntax, in plain bit/s so nobody has to remember tc's unit prefixes."""
    return f"{round(rate_bps)}bit"


def _tail(path: Path, lines: int = 5) -> str:
    return "\n".join(path.read_text(errors="replace").splitlines()[-lines:]) if path.exists() else "(no log)"


def run_job(cluster: NetnsCluster, job: Job, workdir: Path,
            during: Callable[[Path], None] | None = None, *, daemons: Path | None = None,
            pair_checks: bool = True) -> Path:
    """Collector in the hub, one rank per node; ``during(recording)`` runs while the ranks do (it must
    poll with a deadline). With ``daemons`` (a cluster file) a node daemon runs on every node too, with
    pair checks unless ``pair_checks`` is False, and is stopped after the ranks. Returns the closed
    recording."""
    workdir.mkdir(parents=True, exist_ok=True)
    recording = workdir / "run.wtrace"
    collector = start_collector(cluster, recording, workdir / "collector.log")
    started = time.monotonic()
    node_daemons = [] if daemons is None else start_daemons(cluster, workdir, daemons, pair_checks)
    ranks = start_ranks(cluster, job, workdir)
    for proc in (collector, *node_daemons, *ranks):
        _run_ahead(proc)
    if during is not None:
        try:
            during(recording)
        except TimeoutError as exc:
            logs = "\n".join(f"{log.name}: {_tail(log, 2)}" for log in sorted(workdir.glob("*.log")))
            raise AssertionError(f"{exc}\n{logs}") from None
    deadline = started + JOB_TIMEOUT_S
    for node, rank in zip(cluster.nodes, ranks, strict=True):
        try:
            status = rank.wait(max(deadline - time.monotonic(), 0.1))
        except subprocess.TimeoutExpired:
            raise AssertionError(f"{node} did not finish in {JOB_TIMEOUT_S:g} s:\n"
                                 f"{_tail(workdir / f'{node}.log')}") from None
        assert status == 0, f"{node} exited with {status}:\n{_tail(workdir / f'{node}.log')}"
    for node, daemon in zip(cluster.nodes, node_daemons, strict=False):  # none without ``daemons``
        status = stop(daemon, signal.SIGTERM)  # it sends its last results and leaves
        assert status == 0, f"{node}'s daemon exited with {status}:\n{_tail(workdir / f'{node}-daemon.log')}"
    status = stop(collector, signal.SIGINT)  # the ranks flushed their frames before exiting
    assert status == 0, f"collector exited with {status}:\n{_tail(workdir / 'collector.log')}"
    return recording


def _run_ahead(proc: subprocess.Popen[bytes]) -> None:
    """Give a started process (``ip netns exec`` execs in place, so its pid is the job's) ``JOB_NICE``."""
    with contextlib.suppress(ProcessLookupError):  # one that already finished needs no priority
        os.setpriority(os.PRIO_PROCESS, proc.pid, JOB_NICE)


def report(recording: Path) -> dict[str, Any]:
    """``watchtower report RECORDING --json``, as the user would run it."""
    done = subprocess.run([sys.executable, "-m", "watchtower.cli", "report", str(recording), "--json"],
                          capture_output=True, text=True, timeout=REPORT_TIMEOUT_S, check=False)
    assert done.returncode == 0, done.stderr
    return json.loads(done.stdout)


def links(snapshot: dict[str, Any]) -> dict[tuple[str, str], dict[str, Any]]:
    """The network links of a snapshot keyed by (src node, dst node)."""
    return {(link["src"], link["dst"]): link for link in snapshot["links"]}


def ring_links(nodes: list[str]) -> set[tuple[str, str]]:
    """Every directed link of a ring over ``nodes``."""
    n = len(nodes)
    return {(nodes[i], nodes[(i + d) % n]) for i in range(n) for d in (1, -1)}
