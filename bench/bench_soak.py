"""Soak: a multi-day run into the Store on a simulated clock; memory must stay flat after the first day.

    python bench/bench_soak.py [--ranks 1024] [--layers 128] [--hours 72] [--steps-per-day 900]

RANKS x LAYERS ranks (8 per node) report a step each (128-layer timings and two halo receives from ranks
on other nodes) to the Store, with loss accounting in the Ledger and a node sample per node per step.
The clock is simulated and accelerated: a real job at one step per second runs 86 400 steps a day; this
one runs STEPS-PER-DAY, and the store's per-step series cap (SERIES_CAP) is scaled by the same factor, so
the run reaches and passes the cap on day one just as the real one would. The full-detail window is
bounded by max_cells (ranks x layers x steps), which does not depend on time and is left as it is.

Prints, at the end of each simulated day, the process RSS and, with --tracemalloc, the Python-traced
memory (which sees numpy's buffers too), and their growth since the end of day one: "flat" means the
growth is within 5 % of the day-one figure.
"""

from __future__ import annotations

import argparse
import dataclasses
import gc
import time
import tracemalloc

import numpy as np
import psutil

from agent import wire
from watchtower import store as store_module
from watchtower.ledger import Ledger
from watchtower.store import Store

REAL_STEPS_PER_DAY = 86_400  # one step per second
RANKS_PER_NODE = 8
FLAT = 0.05


def templates(ranks: int, layers: int) -> tuple[list[wire.Schema], list[wire.Step], list[wire.NodeSample]]:
    """One decoded schema and step per rank and one sample per node, re-stamped each simulated step."""
    rng = np.random.default_rng(3)
    names = [f"block.{i:03d}" for i in range(layers)]
    nodes = ranks // RANKS_PER_NODE
    schemas, steps, samples = [], [], []
    for rank in range(ranks):
        node = rank // RANKS_PER_NODE
        schemas.append(wire.decode(wire.encode_schema(rank + 1, 0, 0, schema_id=1, rank=rank, world=ranks,
                                                      node=f"node{node:03d}", layers=names)))
        table = np.zeros((len(wire.EXCHANGE_COLUMNS), 2), np.int64)
        table[wire.X_LAYER] = [layers // 3, 2 * layers // 3]
        table[wire.X_OP] = wire.Op.RECV
        table[wire.X_PEER] = [(rank - RANKS_PER_NODE) % ranks, (rank + RANKS_PER_NODE) % ranks]
        table[wire.X_NBYTES] = 1 << 22
        table[wire.X_START] = [1_000_000, 5_000_000]
        table[wire.X_END] = [3_000_000, 6_500_000]
        table[wire.X_WAIT] = wire.UNKNOWN_WAIT
        layer_ns = rng.integers(100_000, 2_000_000, (2, layers))
        steps.append(wire.decode(wire.encode_step(rank + 1, 1, 0, step=0, duration_ns=900_000_000, dropped_total=0,
                                                  schema_id=1, layer_ns=layer_ns, exchanges=table)))
    for node in range(nodes):
        sender = 10_000_000 + node
        schemas.append(wire.decode(wire.encode_schema(sender, 0, 0, schema_id=1, rank=-1, world=1,
                                                      node=f"node{node:03d}", layers=())))
        samples.append(wire.decode(wire.encode_node(sender, 1, 0, cpu_percent=50.0, memory_percent=40.0,
                                                    interval_s=1.0, nics=("eth0",),
                                                    nic_values=np.ones((4, 1)) * 1e9)))
    return schemas, steps, samples


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--ranks", type=int, default=1024)
    parser.add_argument("--layers", type=int, default=128)
    parser.add_argument("--hours", type=float, default=72.0)
    parser.add_argument("--steps-per-day", type=int, default=900)
    parser.add_argument("--tracemalloc", action="store_true",
                        help="also trace Python allocations (precise, but several times slower)")
    args = parser.parse_args()

    scale = args.steps_per_day / REAL_STEPS_PER_DAY
    store_module.SERIES_CAP = max(16, round(store_module.SERIES_CAP * scale))
    step_s = REAL_STEPS_PER_DAY / args.steps_per_day  # simulated seconds per simulated step
    total = round(args.hours * 3600 / step_s)
    schemas, steps, samples = templates(args.ranks, args.layers)
    store, ledger = Store(), Ledger()
    for schema in schemas:
        ledger.accept(schema.header.sender, 0)
        store.add_schema(schema)
    print(f"{args.ranks} ranks x {args.layers} layers, {total} steps = {args.hours:g} simulated hours "
          f"({step_s:g} simulated s per step, x{1 / scale:g} faster than one step a second); "
          f"SERIES_CAP scaled to {store_module.SERIES_CAP}, window {store.max_cells} cells")
    process = psutil.Process()
    if args.tracemalloc:
        tracemalloc.start()
    clock_ns = 1_700_000_000_000_000_000
    began = time.perf_counter()
    day_one: tuple[float, float] | None = None
    print(f"{'day':>5} {'steps':>7} {'RSS MiB':>9} {'traced MiB':>11} {'RSS growth':>11} {'traced growth':>14} "
          f"{'slabs':>6} {'series':>7} {'wall s':>7}")
    for index in range(total):
        clock_ns += int(step_s * 1e9)
        seq = index + 1
        for template in steps:
            header = dataclasses.replace(template.header, seq=seq, wall_ns=clock_ns)
            ledger.accept(header.sender, seq)
            store.add_step(dataclasses.replace(template, header=header, step=index), clock_ns)
        for template in samples:
            header = dataclasses.replace(template.header, seq=seq, wall_ns=clock_ns)
            ledger.accept(header.sender, seq)
            store.add_node_sample(dataclasses.replace(template, header=header), clock_ns)
        if (index + 1) % args.steps_per_day and index + 1 != total:
            continue
        gc.collect()
        rss, traced = process.memory_info().rss / 2**20, tracemalloc.get_traced_memory()[0] / 2**20
        day_one = day_one or (rss, traced)
        growth = [(now - first) / first if first else 0.0 for now, first in zip((rss, traced), day_one, strict=True)]
        print(f"{(index + 1) / args.steps_per_day:5.2f} {index + 1:7d} {rss:9.1f} {traced:11.1f} "
              f"{growth[0]:+11.1%} {growth[1]:+14.1%} {len(store._slabs):6d} {len(store.series().steps):7d} "
              f"{time.perf_counter() - began:7.1f}", flush=True)
    verdict = "flat" if max(growth) <= FLAT else "GROWING"
    print(f"memory after day one: {verdict} (RSS {growth[0]:+.1%}, traced {growth[1]:+.1%}; bar {FLAT:.0%}); "
          f"ledger: {ledger.frames} frames, {ledger.missing} missing")


if __name__ == "__main__":
    main()
