"""An attached console's cost: drawing the snapshots ``collect`` publishes, against re-ingesting its recording.

    python bench/bench_attach.py [--ranks 512] [--layers 64] [--seconds 20] [--big-ranks 4096]

One real ``watchtower collect`` process (recording to a temporary folder, announcing itself in a run folder of
its own) receives RANKS x LAYERS at one step per second from sender processes (``bench_e2e.sender``). Two
console processes attach at once, each a headless ``ConsoleApp``: one subscribed to the published snapshots
(``watch``), one following and re-analysing the recording as ``watch`` did before (``AttachFeed``, still
``watch --follow``). Prints, side by side in one run: each console's CPU (process CPU time over wall time,
1.0 = one core) and collect's, snapshots drawn per second, and the lag from a step's last frame sent to that
step in a snapshot the console received, p50 and p99.

Then what one published snapshot costs as a message (JSON): bytes, encoding and decoding time, and the time
collect's loop spends gathering it (frame intake waits for that; the analysis runs on the publisher's
thread), for the demo recording and for a synthetic BIG_RANKS x 256-layer job.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import multiprocessing as mp
import os
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np
import psutil
from bench_e2e import sender
from frames import recv_table

from agent import wire
from watchtower.ingest import Ingest
from watchtower.publish import encode, figures
from watchtower.recording import RecordingReader
from watchtower.snapshot import cluster_for, finish_snapshot, gather_snapshot

WARMUP_S = 4.0
REPO = Path(__file__).parents[1]


def console(kind: str, recording: str, t0: float, seconds: float, out: mp.Queue) -> None:  # type: ignore[type-arg]
    """A headless console attached one way or the other; reports its CPU over [t0, t0 + seconds] and when
    each snapshot arrived with the newest step it covers."""
    from watchtower import cli
    from watchtower.attach import find_collectors
    from watchtower.console import ConsoleApp
    from watchtower.feeds import AttachFeed

    (found,) = find_collectors()
    feed: Any = cli._subscribed(found) if kind == "published" else AttachFeed(Path(recording), security=None,
                                                                             ask=found.ask)
    arrived: list[tuple[float, int]] = []

    class Seen:
        controls = None

        def start(self, deliver: Any) -> None:
            def both(snapshot: dict[str, Any]) -> None:
                arrived.append((time.time(), snapshot["window"]["last_step"]))
                if snapshot["window"]["steps"]:
                    deliver(snapshot)
            feed.start(both)

        def stop(self) -> None:
            feed.stop()

    measured: dict[str, float] = {}

    async def run() -> None:
        app = ConsoleApp(Seen())
        async with app.run_test(size=(120, 40)):
            await asyncio.sleep(max(0.0, t0 - time.time()))
            begin = (time.process_time(), time.perf_counter(), len(arrived))
            await asyncio.sleep(seconds)
            end = (time.process_time(), time.perf_counter(), len(arrived))
            wall = end[1] - begin[1]
            measured.update(cpu=(end[0] - begin[0]) / wall, per_s=(end[2] - begin[2]) / wall)

    try:
        asyncio.run(run())
    except Exception as exc:  # a console bug on teardown (a late message after unmount); figures are kept
        print(f"{kind} console teardown: {type(exc).__name__}", file=sys.stderr)
    out.put((kind, measured, arrived))


def lags(arrived: list[tuple[float, int]], step_sent: list[float]) -> list[float]:
    found = []
    for step, sent_at in enumerate(step_sent):
        shown = next((when for when, newest in arrived if newest >= step and when >= sent_at), None)
        if shown is not None:
            found.append(shown - sent_at)
    return found


def pct(values: list[float], q: float) -> float:
    return float(np.percentile(values, q)) if values else float("nan")


def message_cost(ingest: Ingest, label: str) -> None:
    """One snapshot of ``ingest`` as collect publishes it: gather, figures, JSON both ways."""
    cluster = cluster_for({}, None)
    t = time.perf_counter()
    parts = gather_snapshot(ingest, cluster, source={"kind": "live", "where": "x"}, window_steps=120,
                            now_ns=time.time_ns())
    gather_s = time.perf_counter() - t
    t = time.perf_counter()
    snapshot = finish_snapshot(parts, figures(parts))
    build_s = time.perf_counter() - t
    t = time.perf_counter()
    message = encode(snapshot)
    encode_s = time.perf_counter() - t
    t = time.perf_counter()
    json.loads(message)
    decode_s = time.perf_counter() - t
    print(f"{label:34s} {len(message) / 1e3:10.0f} {encode_s * 1e3:9.1f} {decode_s * 1e3:9.1f} "
          f"{gather_s * 1e3:10.1f} {build_s:9.2f}")


def synthetic(ranks: int, layers: int, steps: int) -> Ingest:
    """A BIG job's store: ``steps`` steps of every rank (two halo receives each), ingested in this process."""
    ingest = Ingest()
    names = [f"block.{i:03d}" for i in range(layers)]
    rng = np.random.default_rng(4096)
    table = recv_table(layers)
    for rank in range(ranks):
        ingest.feed(time.time_ns(), wire.encode_schema(rank + 1, 0, time.time_ns(), schema_id=1, rank=rank,
                                                       world=ranks, node=f"node{rank // 8:04d}", layers=names))
    for step in range(steps):
        for rank in range(ranks):
            table[wire.X_PEER] = [(rank - 8) % ranks, (rank + 8) % ranks]
            ingest.feed(time.time_ns(), wire.encode_step(
                rank + 1, step + 1, time.time_ns(), step=step, duration_ns=900_000_000, dropped_total=0,
                schema_id=1, layer_ns=rng.integers(100_000, 2_000_000, (2, layers)), exchanges=table))
    return ingest


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--ranks", type=int, default=512)
    parser.add_argument("--layers", type=int, default=64)
    parser.add_argument("--seconds", type=int, default=20)
    parser.add_argument("--senders", type=int, default=1)
    parser.add_argument("--big-ranks", type=int, default=4096)
    parser.add_argument("--big-steps", type=int, default=4)
    args = parser.parse_args()

    folder = Path(tempfile.mkdtemp(prefix="bench-attach-"))
    run = folder / "run"
    run.mkdir(mode=0o700)
    os.environ["WATCHTOWER_RUN_DIR"] = str(run)  # the consoles (spawned) inherit it
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    listen, recording = f"tcp://127.0.0.1:{port}", folder / "run.wtrace"
    collect = subprocess.Popen([sys.executable, "-m", "watchtower.cli", "collect", "--listen", listen,
                                "--record", str(recording)], cwd=REPO, stdout=subprocess.DEVNULL,
                               stderr=subprocess.DEVNULL)
    while not list(run.glob("snapshots-*.sock")):
        time.sleep(0.05)
    spawn = mp.get_context("spawn")
    t0 = time.time() + WARMUP_S
    measured_s = args.seconds - 2
    out = spawn.Queue()
    consoles = [spawn.Process(target=console, args=(kind, str(recording), t0 + 2, measured_s, out))
                for kind in ("published", "re-ingesting")]
    for proc in consoles:
        proc.start()
    done = spawn.Queue()
    share = -(-args.ranks // args.senders)
    senders = [spawn.Process(target=sender, args=(listen, range(lo, min(lo + share, args.ranks)), args.ranks,
                                                  args.layers, t0, args.seconds, done))
               for lo in range(0, args.ranks, share)]
    for proc in senders:
        proc.start()
    head = psutil.Process(collect.pid)
    time.sleep(max(0.0, t0 + 2 - time.time()))
    begin = (sum(head.cpu_times()[:2]), time.perf_counter())
    time.sleep(measured_s)
    end = (sum(head.cpu_times()[:2]), time.perf_counter())
    collect_cpu = (end[0] - begin[0]) / (end[1] - begin[1])
    results = {kind: (figs, arrived) for kind, figs, arrived in (out.get(timeout=120) for _ in consoles)}
    sent = [done.get() for _ in senders]
    for proc in [*consoles, *senders]:
        proc.join()
    collect.terminate()
    collect.wait()
    step_sent = [max(times[k] for times in sent) for k in range(args.seconds)]

    print(f"{args.ranks} ranks x {args.layers} layers at 1 step/s for {args.seconds} s into one collect process; "
          f"two consoles attached at once (CPU measured over {measured_s} s)")
    print(f"{'figure':40s} {'published':>12s} {'re-ingesting':>13s}")
    rows = {kind: (figs, lags(arrived, step_sent)) for kind, (figs, arrived) in results.items()}
    pub, old = rows["published"], rows["re-ingesting"]
    print(f"{'console CPU, cores':40s} {pub[0]['cpu']:12.2f} {old[0]['cpu']:13.2f}")
    print(f"{'snapshots received per second':40s} {pub[0]['per_s']:12.2f} {old[0]['per_s']:13.2f}")
    print(f"{'lag sent -> in a snapshot, p50 s':40s} {pct(pub[1], 50):12.2f} {pct(old[1], 50):13.2f}")
    print(f"{'lag sent -> in a snapshot, p99 s':40s} {pct(pub[1], 99):12.2f} {pct(old[1], 99):13.2f}")
    print(f"{'collect CPU (publishing), cores':40s} {collect_cpu:12.2f}")
    print(f"console CPU ratio re-ingesting / published: {old[0]['cpu'] / max(pub[0]['cpu'], 1e-9):.1f}x")

    print(f"\n{'one published snapshot':34s} {'kB':>10s} {'enc ms':>9s} {'dec ms':>9s} {'gather ms':>10s} "
          f"{'build s':>9s}")
    demo = Ingest()
    with RecordingReader(REPO / "watchtower/data/quorvex.wtrace.gz") as reader:
        demo.feed_all(reader)
    message_cost(demo, "demo recording (24 ranks)")
    message_cost(synthetic(args.big_ranks, 256, args.big_steps), f"synthetic {args.big_ranks} x 256, "
                                                                  f"{args.big_steps} steps")


if __name__ == "__main__":
    main()
