"""What pair checks cost a job that only uses collectives: its step time with checks on and off, side by side.

    sudo python bench/bench_checks.py [--rounds 2] [--steps 100] [--budget 0.01]

Builds four network namespaces (demo/netns_cluster.py), each node's way out shaped to 400 Mb/s and
node1's to 40 Mb/s, and runs ``workload --collective`` (a ring allreduce per step) with a node daemon on
every node: without pair checks, then with them, alternating ``rounds`` times so that drift on this shared
machine hits both. Prints each run's median step time (the slowest rank's, first 10 steps left out) and
the ratio of the medians, checks on / checks off (target ≤ 1.02). Needs root; run it under the heavy lock.
"""

from __future__ import annotations

import argparse
import os
import signal
import statistics
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "demo"))

from netns_cluster import Job, NetnsCluster, start_collector, start_daemons, start_ranks, stop

from agent import wire
from watchtower.recording import RecordingReader

FABRIC, SLOW = "400000000bit", "40000000bit"
WARMUP_STEPS = 10
RUN_TIMEOUT_S = 300.0


def step_times(recording: Path) -> tuple[list[float], list[float]]:
    """Per step after the warm-up, the slowest rank's wall time and its longest allreduce, in seconds (the
    allreduce is the last layer's exchange time: what checks on the network could slow, without the
    compute whose speed on this shared machine moves with the other tenants)."""
    slowest: dict[int, int] = {}
    allreduce: dict[int, int] = {}
    with RecordingReader(recording) as reader:
        for _, frames in reader:
            try:
                message = wire.decode(frames)
            except wire.WireError:
                continue
            if isinstance(message, wire.Step) and message.step >= WARMUP_STEPS:
                slowest[message.step] = max(slowest.get(message.step, 0), message.duration_ns)
                allreduce[message.step] = max(allreduce.get(message.step, 0), int(message.layer_ns[1, -1]))
    return [ns * 1e-9 for _, ns in sorted(slowest.items())], [ns * 1e-9 for _, ns in sorted(allreduce.items())]


def run_once(cluster: NetnsCluster, job: Job, workdir: Path, cluster_file: Path,
             checks: bool) -> tuple[float, float, int]:
    """One job with node daemons (checks on or off): median step and allreduce seconds, check results."""
    workdir.mkdir(parents=True)
    recording = workdir / "run.wtrace"
    collector = start_collector(cluster, recording, workdir / "collector.log")
    daemons = start_daemons(cluster, workdir, cluster_file, pair_checks=checks)
    ranks = start_ranks(cluster, job, workdir)
    deadline = time.monotonic() + RUN_TIMEOUT_S
    for rank in ranks:
        if rank.wait(max(deadline - time.monotonic(), 0.1)) != 0:
            raise SystemExit(f"a rank failed; see {workdir}")
    for daemon in daemons:
        stop(daemon, signal.SIGTERM)
    stop(collector, signal.SIGINT)
    results = 0
    with RecordingReader(recording) as reader:
        for _, frames in reader:
            if frames and wire.peek_kind(frames[0]) == wire.Kind.CHECK:
                results += wire.decode(frames).header.count_a
    steps, allreduce = step_times(recording)
    return statistics.median(steps), statistics.median(allreduce), results


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rounds", type=int, default=2)
    parser.add_argument("--steps", type=int, default=100)
    parser.add_argument("--budget", type=float, default=0.01)
    args = parser.parse_args()
    if os.geteuid() != 0:
        print("bench_checks: needs root (network namespaces, tc)", file=sys.stderr)
        return 2
    job = Job(steps=args.steps, layers=4, exchange_bytes=262_144, compute_ms=40.0, seed=1, collective=True)
    cluster = NetnsCluster(f"wtb{os.getpid()}", 4)
    cluster.up()
    medians: dict[bool, list[float]] = {False: [], True: []}
    exchange: dict[bool, list[float]] = {False: [], True: []}
    try:
        for node in cluster.nodes:
            cluster.shape(node, FABRIC)
        cluster.shape("node1", SLOW)
        with tempfile.TemporaryDirectory(prefix="bench-checks-") as tmp:
            cluster_file = Path(tmp) / "cluster.toml"
            cluster_file.write_text(f"[network]\nnic_Bps = 5e7\n[checks]\nbudget = {args.budget}\n")
            for r in range(args.rounds):
                for checks in (False, True):
                    median, allreduce, results = run_once(cluster, job, Path(tmp) / f"{r}-{int(checks)}",
                                                          cluster_file, checks)
                    medians[checks].append(median)
                    exchange[checks].append(allreduce)
                    print(f"round {r + 1} checks {'on ' if checks else 'off'}: median step {median * 1e3:7.1f} ms, "
                          f"allreduce {allreduce * 1e3:6.1f} ms, {results} check messages timed", flush=True)
    finally:
        cluster.down()
    off, on = statistics.median(medians[False]), statistics.median(medians[True])
    print(f"step time, checks off {off * 1e3:.1f} ms, on {on * 1e3:.1f} ms: on/off = {on / off:.3f} "
          f"(target ≤ 1.02, budget {args.budget:g} of nominal)")
    off, on = statistics.median(exchange[False]), statistics.median(exchange[True])
    print(f"allreduce time, checks off {off * 1e3:.1f} ms, on {on * 1e3:.1f} ms: on/off = {on / off:.3f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
