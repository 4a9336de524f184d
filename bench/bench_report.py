"""`watchtower report` over a large recording: throughput and peak memory, against reading the file alone.

    python bench/bench_report.py [--gb 1.0] [--ranks 512] [--layers 256] [--keep DIR]

Writes a recording of about GB gigabytes into a temporary folder with the wire encoder and the recorder
(RANKS ranks, 8 per node, each step a 256-layer timing pair and two halo receives), then runs, as child
processes side by side: a plain read of the file (``cat`` to /dev/null), and ``watchtower report --json``.
The file was just written, so both read it from the page cache: this measures report's own pace. Prints
MB/s and each child's peak RSS (``ru_maxrss``); the folder is removed afterwards. Targets: >= 100 MB/s,
memory bounded (peak RSS far below the file's size, and about the same for a file half the size).
"""

from __future__ import annotations

import argparse
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from frames import recv_table

from agent import wire
from watchtower.recording import Recorder

RANKS_PER_NODE = 8


def write_recording(path: Path, gigabytes: float, ranks: int, layers: int) -> int:
    """Steps of every rank until the file holds ``gigabytes``; returns the number of steps written."""
    rng = np.random.default_rng(5)
    names = [f"layer.{i:03d}" for i in range(layers)]
    table = recv_table(layers)
    layer_ns = rng.integers(100_000, 2_000_000, (ranks, 2, layers))
    limit = int(gigabytes * 1e9)
    clock = 1_700_000_000_000_000_000
    with Recorder(path, {"tool": "bench_report"}) as recorder:
        recorder.write_many([(clock, wire.encode_schema(r + 1, 0, clock, schema_id=1, rank=r, world=ranks,
                                                        node=f"node{r // RANKS_PER_NODE:03d}", layers=names))
                             for r in range(ranks)])
        step = 0
        while path.stat().st_size < limit:
            clock += 1_000_000_000
            batch = []
            for r in range(ranks):
                table[wire.X_PEER] = [(r - RANKS_PER_NODE) % ranks, (r + RANKS_PER_NODE) % ranks]
                batch.append((clock, wire.encode_step(r + 1, step + 1, clock, step=step, duration_ns=900_000_000,
                                                      dropped_total=0, schema_id=1, layer_ns=layer_ns[r],
                                                      exchanges=table)))
            recorder.write_many(batch)
            step += 1
    return step


def run_child(argv: list[str]) -> tuple[float, float]:
    """Wall seconds and peak RSS (MiB) of one child process, run on its own (ru_maxrss is the max so far)."""
    script = ("import resource, subprocess, sys, time\n"
              "t = time.perf_counter()\n"
              "subprocess.run(sys.argv[1:], check=True, stdout=subprocess.DEVNULL)\n"
              "print(time.perf_counter() - t, resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)\n")
    out = subprocess.run([sys.executable, "-c", script, *argv], check=True, capture_output=True, text=True)
    seconds, kib = out.stdout.split()
    return float(seconds), int(kib) / 1024


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--gb", type=float, default=1.0)
    parser.add_argument("--ranks", type=int, default=512)
    parser.add_argument("--layers", type=int, default=256)
    parser.add_argument("--keep", type=Path, help="write the recording here instead (not removed)")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="watchtower-bench-") as folder:
        path = (args.keep or Path(folder)) / "big.wtrace"
        t = time.perf_counter()
        steps = write_recording(path, args.gb, args.ranks, args.layers)
        size = path.stat().st_size
        print(f"recording: {size / 1e6:.0f} MB, {args.ranks} ranks x {args.layers} layers x {steps} steps, "
              f"written in {time.perf_counter() - t:.1f} s")
        print(f"{'what':34s} {'s':>7s} {'MB/s':>8s} {'peak RSS MiB':>13s}")
        for label, argv in [("read the file (cat)", ["cat", str(path)]),
                            ("watchtower report --json", [sys.executable, "-m", "watchtower.cli", "report",
                                                          str(path), "--json"])]:
            seconds, rss = run_child(argv)
            print(f"{label:34s} {seconds:7.1f} {size / 1e6 / seconds:8.0f} {rss:13.0f}")
    print(f"this process: peak RSS {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MiB "
          "(the writer)")


if __name__ == "__main__":
    main()
