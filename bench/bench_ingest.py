"""Collector ingest against raw pyzmq receiving the same messages, measured side by side in one run.

    python bench/bench_ingest.py [--messages 20000] [--layers 256] [--exchanges 64] [--profile]

A sender process pushes step messages (one rank's step: 2 x LAYERS int64 timings and an exchange table)
from a DEALER socket to a ROUTER; the receiver either only takes them off the socket (raw ROUTER), or runs
the collector: envelope split, validation and decoding, loss accounting and the store (ingest), and also
appends them to a recording (ingest + record). Each collector row runs twice: one message at a time
(``Ingest.feed`` per message, the recording's bytes joined into one ``write``: the path before batching)
and batched (``Ingest.feed_many`` on each drain, one ``os.writev``). A last row sends the same messages
as a node daemon does, NODE_RANKS to a BATCH message, into the batched collector. A second raw baseline
sends the same frames PUB -> SUB (no routing envelope, no flow control). Prints rank messages/s, MB/s,
layer records/s (one core: the collector is one thread) and the ratio to raw ROUTER. ``--exchanges 192``
makes 16 KiB frames. ``--profile`` also prints where batched ingest spends its time (cProfile of
``Ingest.feed_many`` on the same messages, no socket). Targets: >= 50% of raw at 16 KiB frames, >= 5
million layer records per second on one core.
"""

from __future__ import annotations

import argparse
import cProfile
import multiprocessing as mp
import pstats
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
NODE_RANKS = 8  # ranks per node daemon: messages in one BATCH
DRAIN = 512  # messages ingested at once by the profile


class OneByOne(Ingest):
    """The path before batching: every message decoded, checked and stored on its own."""

    def feed_many(self, records: list) -> list:  # type: ignore[override]
        return [self.feed(t, frames) for t, frames in records]


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


def node_batches(batch: list[list[bytes]]) -> list[list[bytes]]:
    """The messages as node daemons send them: schemas alone, then NODE_RANKS steps to a BATCH."""
    steps = [frames[1:] for frames in batch[RANKS:]]
    grouped = [[b"", *wire.encode_batch(0, i, 0, steps[i:i + NODE_RANKS])] for i in range(0, len(steps), NODE_RANKS)]
    return batch[:RANKS] + grouped


def send(endpoint: str, layers: int, exchanges: int, count: int, ready: mp.Event,  # type: ignore[type-arg]
         batched: bool = False) -> None:
    batch = messages(layers, exchanges, count)
    if batched:
        batch = node_batches(batch)
    ctx = zmq.Context()
    sock = ctx.socket(zmq.DEALER)
    sock.setsockopt(zmq.SNDHWM, 0)
    sock.connect(endpoint)
    ready.wait()
    for frames in batch:
        sock.send_multipart(frames)
    sock.close(linger=-1)
    ctx.term()


def send_pub(endpoint: str, layers: int, exchanges: int, count: int, ready: mp.Event,  # type: ignore[type-arg]
             joined: mp.Event) -> None:  # type: ignore[type-arg]
    """PUB drops while nobody is subscribed: send a hello until the subscriber says it hears us."""
    batch = [frames[1:] for frames in messages(layers, exchanges, count)]
    ctx = zmq.Context()
    sock = ctx.socket(zmq.PUB)
    sock.setsockopt(zmq.SNDHWM, 0)  # PUB drops silently at its high-water mark: unbounded for the bench
    sock.connect(endpoint)
    while not joined.wait(0.01):
        sock.send(b"hello")
    ready.wait()
    for frames in batch:
        sock.send_multipart(frames)
    sock.close(linger=-1)
    ctx.term()


def measure_pubsub(layers: int, exchanges: int, count: int) -> float:
    """Seconds for a SUB to receive ``count + RANKS`` messages (the same frames, without the envelope)."""
    ctx = zmq.Context()
    sub = ctx.socket(zmq.SUB)
    sub.setsockopt(zmq.RCVHWM, 0)
    sub.setsockopt(zmq.LINGER, 0)
    sub.setsockopt(zmq.SUBSCRIBE, b"")
    port = sub.bind_to_random_port("tcp://127.0.0.1")
    ready, joined = mp.Event(), mp.Event()
    sender = mp.Process(target=send_pub, args=(f"tcp://127.0.0.1:{port}", layers, exchanges, count, ready, joined))
    sender.start()
    while sub.recv_multipart() != [b"hello"]:
        pass
    joined.set()
    while sub.poll(100):  # let the last hellos through
        sub.recv_multipart()
    ready.set()
    total = count + RANKS
    received, start = 0, None
    while received < total:
        sub.recv_multipart()
        start = start or time.perf_counter()
        received += 1
    elapsed = time.perf_counter() - (start or time.perf_counter())
    sender.join()
    sub.close()
    ctx.term()
    return elapsed


def profile(layers: int, exchanges: int, count: int) -> None:
    """Where ingest spends its time, per function, on the same messages without a socket."""
    batch = [(0, frames[1:]) for frames in messages(layers, exchanges, count)]
    ingest = Ingest()
    profiler = cProfile.Profile()
    profiler.enable()
    for at in range(0, len(batch), DRAIN):
        ingest.feed_many(batch[at:at + DRAIN])
    profiler.disable()
    pstats.Stats(profiler).sort_stats("tottime").print_stats(12)


def measure(kind: str, layers: int, exchanges: int, count: int) -> tuple[float, int]:
    """Seconds to receive ``count + RANKS`` messages the given way, and their payload bytes."""
    ctx = zmq.Context()
    total = count + RANKS
    ready = mp.Event()
    with tempfile.TemporaryDirectory() as folder:
        recorder = Recorder(Path(folder) / "bench.wtrace") if "record" in kind else None
        one_by_one = kind.endswith("one by one")
        if recorder is not None and one_by_one:
            recorder._fd = None  # the recording's bytes joined and written with one write, as before writev
        ingest = OneByOne() if one_by_one else Ingest()
        collector = Collector(f"tcp://127.0.0.1:{_port()}", ingest, recorder, context=ctx)
        sender = mp.Process(target=send, args=(collector.bound, layers, exchanges, count, ready,
                                               kind.startswith("node")))
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
            while not collector.socket.poll(1000):
                pass
            start = time.perf_counter()  # from the first message on the socket, as for raw (not after a drain)
            while received < total:
                received += collector.drain(1000)
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
    parser.add_argument("--profile", action="store_true", help="also profile ingest (cProfile, no socket)")
    args = parser.parse_args()
    size = sum(len(f) for f in messages(args.layers, args.exchanges, 1)[-1])
    print(f"step message: {size / 1024:.1f} KiB ({args.layers} layers, {args.exchanges} exchanges), "
          f"{args.messages} messages from one sender process")
    raw_s = None
    print(f"{'receiver':34s} {'msg/s':>10s} {'MB/s':>8s} {'layer rec/s':>12s} {'vs raw':>7s}")
    for kind in ("raw", "raw PUB/SUB", "ingest, one by one", "ingest, batched", "ingest + record, one by one",
                 "ingest + record, batched", f"node batches of {NODE_RANKS}: ingest + record"):
        if kind == "raw PUB/SUB":
            elapsed = measure_pubsub(args.layers, args.exchanges, args.messages)
        else:
            elapsed, _ = measure(kind, args.layers, args.exchanges, args.messages)
        raw_s = raw_s or elapsed
        rate = args.messages / elapsed
        label = "raw ROUTER/DEALER" if kind == "raw" else kind
        print(f"{label:34s} {rate:10.0f} {rate * size / 1e6:8.0f} {rate * args.layers:12.0f} "
              f"{raw_s / elapsed:7.0%}")
    if args.profile:
        profile(args.layers, args.exchanges, args.messages)


if __name__ == "__main__":
    threading.current_thread().name = "bench"
    main()
