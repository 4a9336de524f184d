"""Collector ingest against raw pyzmq receiving the same messages, measured side by side in one run.

    python bench/bench_ingest.py [--messages 20000] [--layers 256] [--exchanges 64]

A sender process pushes step messages (one rank's step: 2 x LAYERS int64 timings and an exchange table)
from DEALER sockets to a ROUTER; the receiver either only takes them off the socket (raw), or runs the
collector: envelope split, validation and decoding, loss accounting and the store (ingest), and also
appends them to a recording (ingest + record). Prints messages/s, MB/s, layer records/s and the ratio
to raw. Targets (issue 8): >= 50% of raw at 16 KiB frames, >= 2 million layer records per second.
"""

from __future__ import annotations

import argparse
import multiprocessing as mp
import tempfile
import threading
import time
from pathlib import Path

import numpy as np
import zmq

from agent import wire
from watchtower.collector import Collector
from watchtower.ingest import Ingest
from watchtower.recording import Recorder

RANKS = 64


def messages(layers: int, exchanges: int, count: int) -> list[list[bytes]]:
    """``count`` step frames from RANKS senders (schemas first), ready to send."""
    rng = np.random.default_rng(1)
    names = [f"layer{i}" for i in range(layers)]
    out = [[b"", *wire.encode_schema(rank + 1, 0, 0, schema_id=1, rank=rank, world=RANKS, node=f"n{rank // 8}",
                                     layers=names)] for rank in range(RANKS)]
    table = np.zeros((len(wire.EXCHANGE_COLUMNS), exchanges), dtype=np.int64)
    table[wire.X_OP] = wire.Op.RECV
    table[wire.X_NBYTES] = 1 << 16
    table[wire.X_END] = 1000
    table[wire.X_WAIT] = wire.UNKNOWN_WAIT
    for i in range(count):
        rank = i % RANKS
        table[wire.X_PEER] = (rank + 1) % RANKS
        table[wire.X_LAYER] = rng.integers(0, layers, exchanges)
        layer_ns = rng.integers(1_000, 1_000_000, (2, layers))
        out.append([b"", *wire.encode_step(rank + 1, i // RANKS + 1, 1_700_000_000_000_000_000 + i,
                                           step=i // RANKS, duration_ns=10_000_000, dropped_total=0, schema_id=1,
                                           layer_ns=layer_ns, exchanges=table)])
    return out


def send(endpoint: str, layers: int, exchanges: int, count: int, ready: mp.Event) -> None:  # type: ignore[type-arg]
    batch = messages(layers, exchanges, count)
    ctx = zmq.Context()
    sock = ctx.socket(zmq.DEALER)
    sock.setsockopt(zmq.SNDHWM, 0)
    sock.connect(endpoint)
    ready.wait()
    for frames in batch:
        sock.send_multipart(frames)
    sock.close(linger=-1)
    ctx.term()


def measure(kind: str, layers: int, exchanges: int, count: int) -> tuple[float, int]:
    """Seconds to receive ``count + RANKS`` messages the given way, and their payload bytes."""
    ctx = zmq.Context()
    total = count + RANKS
    ready = mp.Event()
    with tempfile.TemporaryDirectory() as folder:
        recorder = Recorder(Path(folder) / "bench.wtrace") if kind == "ingest + record" else None
        ingest = Ingest()
        collector = Collector(f"tcp://127.0.0.1:{_port()}", ingest, recorder, context=ctx)
        sender = mp.Process(target=send, args=(collector.bound, layers, exchanges, count, ready))
        sender.start()
        received = nbytes = 0
        ready.set()
        start = None
        if kind == "raw":
            sock = collector.socket
            while received < total:
                frames = sock.recv_multipart()
                start = start or time.perf_counter()
                received += 1
                nbytes += sum(len(f) for f in frames)
        else:
            while received < total:
                got = collector.drain(1000)
                start = start or time.perf_counter()
                received += got
            nbytes = -1
        elapsed = time.perf_counter() - (start or time.perf_counter())
        sender.join()
        if kind != "raw":
            assert ingest.steps == count, (ingest.steps, count)
        collector.close()
    ctx.term()
    return elapsed, nbytes


def _port() -> int:
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--messages", type=int, default=20_000)
    parser.add_argument("--layers", type=int, default=256)
    parser.add_argument("--exchanges", type=int, default=64)
    args = parser.parse_args()
    size = sum(len(f) for f in messages(args.layers, args.exchanges, 1)[-1])
    print(f"step message: {size / 1024:.1f} KiB ({args.layers} layers, {args.exchanges} exchanges), "
          f"{args.messages} messages from one sender process")
    raw_s = None
    print(f"{'receiver':18s} {'msg/s':>10s} {'MB/s':>8s} {'layer rec/s':>12s} {'vs raw':>7s}")
    for kind in ("raw", "ingest", "ingest + record"):
        elapsed, _ = measure(kind, args.layers, args.exchanges, args.messages)
        raw_s = raw_s or elapsed
        rate = args.messages / elapsed
        print(f"{kind:18s} {rate:10.0f} {rate * size / 1e6:8.0f} {rate * args.layers:12.0f} "
              f"{raw_s / elapsed:7.0%}")


if __name__ == "__main__":
    threading.current_thread().name = "bench"
    main()
