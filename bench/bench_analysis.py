"""Time ``analyse`` on a large window against a plain numpy sum over the same cube.

    python bench/bench_analysis.py                      # 4096 ranks × 256 layers × 100 steps, float32
    python bench/bench_analysis.py --dtype float64      # the same in float64 (≈ 1.7 GB for the two cubes)

The window also carries point-to-point transfers (each rank to two neighbours on other nodes, every step,
overlapping at the nodes' ports, so the concurrency correction of link β has real work to do)
and one allreduce per rank and step. Prints seconds and the ratio to ``compute_s.sum()`` for the cube pass
alone and for the whole analysis; the target is well under a second on one core.
"""

from __future__ import annotations

import argparse
import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

import time

import numpy as np

from agent.wire import Op
from watchtower.analysis import Collectives, Transfers, Window, analyse, reduce_window
from watchtower.cluster import Cluster


def make_window(ranks: int, layers: int, steps: int, dtype: str, per_node: int = 8) -> Window:
    rng = np.random.default_rng(7)
    compute = rng.random((steps, ranks, layers), dtype=np.float32).astype(dtype, copy=False)
    exchange = rng.random((steps, ranks, layers), dtype=np.float32).astype(dtype, copy=False) * 0.5
    compute[-3:, 5] = np.nan  # a rank that missed the last steps
    exchange[-3:, 5] = np.nan
    step = np.nansum(compute, axis=2, dtype=np.float64) + np.nansum(exchange, axis=2, dtype=np.float64)
    step[-3:, 5] = np.nan

    r = np.tile(np.arange(ranks), 2 * steps)
    s = np.repeat(np.arange(steps), 2 * ranks)
    hop = np.repeat(np.array([per_node, -per_node]), ranks)
    dst = (r + np.tile(hop, steps)) % ranks
    nbytes = rng.choice(np.array([1 << 16, 1 << 20, 1 << 22]), len(r))
    secs = 2e-5 + nbytes / 10e9 * rng.uniform(1.0, 1.5, len(r))
    n = len(r)
    start = s + rng.uniform(0.0, 0.01, n)  # one step a second, ranks starting within 10 ms: flows overlap
    transfers = Transfers(s.astype(np.int64), (s % layers).astype(np.int32), r.astype(np.int32),
                          dst.astype(np.int32), nbytes.astype(np.int64), start, start + secs, np.full(n, np.nan))
    k = steps * ranks
    collectives = Collectives(np.repeat(np.arange(steps), ranks), np.full(k, layers - 1, np.int32),
                              np.tile(np.arange(ranks), steps).astype(np.int32), np.full(k, Op.ALLREDUCE, np.int16),
                              np.full(k, ranks, np.int32), np.full(k, 1 << 28, np.int64), np.full(k, 0.1))
    return Window(tuple(f"layer{i}" for i in range(layers)), tuple(f"node{i:04d}" for i in range(ranks // per_node)),
                  np.arange(ranks, dtype=np.int32), (np.arange(ranks) // per_node).astype(np.int32),
                  np.arange(steps, dtype=np.int64), compute, exchange, step, transfers, collectives)


def best_of(fn, repeat: int) -> float:
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--ranks", type=int, default=4096)
    parser.add_argument("--layers", type=int, default=256)
    parser.add_argument("--steps", type=int, default=100)
    parser.add_argument("--dtype", choices=("float32", "float64"), default="float32")
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()

    window = make_window(args.ranks, args.layers, args.steps, args.dtype)
    cluster = Cluster(total_steps=10 * args.steps, nic_Bps=12.5e9)
    cube_mb = window.compute_s.nbytes / 1e6
    plain = best_of(lambda: window.compute_s.sum(), args.repeat)
    cube = best_of(lambda: reduce_window(window), args.repeat)
    full = best_of(lambda: analyse(window, None, cluster), args.repeat)
    print(f"window: {args.ranks} ranks × {args.layers} layers × {args.steps} steps, {args.dtype}, "
          f"{cube_mb:.0f} MB per cube, {len(window.transfers)} transfers, {len(window.collectives)} collective calls")
    print(f"plain numpy sum of compute_s: {plain:.3f} s")
    print(f"cube pass (reduce_window):    {cube:.3f} s  ({cube / plain:.1f}× the plain sum)")
    print(f"analyse:                      {full:.3f} s  ({full / plain:.1f}× the plain sum; best of {args.repeat})")


if __name__ == "__main__":
    main()
