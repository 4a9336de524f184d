"""What watching a PyTorch job costs: seconds per DDP training step with and without Watchtower.

    python bench/bench_torch.py [--world 2] [--steps 50] [--rounds 5] [--width 256] [--depth 8]

Runs ``world`` CPU ranks (gloo) of an MLP (``depth`` Linear+ReLU pairs, 2×depth timed leaf modules) and, in
each rank, three DDP copies of it side by side: one plain, one under ``watch_module`` (module hooks forward
and backward, the bucket comm hook, the optimizer step mark) and one under ``watch_module(backward=False)``.
The probes publish to a port nobody listens on, so frames are queued and then dropped, as with the head
node down. Rounds alternate between the copies so drift hits all; the best round of each is printed, with
its ratio to the plain one. Needs the ``[torch]`` extra.
"""

from __future__ import annotations

import argparse
import os
import socket
import time

import torch
import torch.distributed as dist
import torch.multiprocessing as mp
from torch import nn
from torch.nn.parallel import DistributedDataParallel

from agent import Probe
from agent.integrations.torch import watch_module

BATCH = 32
VARIANTS = {"without": "without Watchtower", "with": "with Watchtower",
            "forward-only": "with Watchtower, backward=False"}


def mlp(width: int, depth: int) -> nn.Module:
    torch.manual_seed(0)
    return nn.Sequential(*(m for _ in range(depth) for m in (nn.Linear(width, width), nn.ReLU())))


def seconds_per_step(model: nn.Module, optimizer: torch.optim.Optimizer, x: torch.Tensor, steps: int) -> float:
    start = time.perf_counter()
    for _ in range(steps):
        model(x).square().mean().backward()
        optimizer.step()
        optimizer.zero_grad()
    return (time.perf_counter() - start) / steps


def rank_main(rank: int, args: argparse.Namespace, port: int) -> None:
    os.environ.update(MASTER_ADDR="127.0.0.1", MASTER_PORT=str(port))
    torch.set_num_threads(1)
    dist.init_process_group("gloo", rank=rank, world_size=args.world)
    endpoint = f"tcp://127.0.0.1:{port + 1}"
    copies: dict[str, tuple[nn.Module, torch.optim.Optimizer]] = {}
    probes = []
    for label in VARIANTS:
        model = DistributedDataParallel(mlp(args.width, args.depth))
        optimizer = torch.optim.SGD(model.parameters(), lr=1e-3)
        if label != "without":
            probes.append(Probe(rank, args.world, node=f"host{rank}", endpoint=endpoint, queue_frames=4))
            watch_module(model, probes[-1], optimizer=optimizer, backward=label == "with")
        copies[label] = model, optimizer
    x = torch.randn(BATCH, args.width, generator=torch.Generator().manual_seed(rank))
    best = dict.fromkeys(VARIANTS, float("inf"))
    for round_ in range(args.rounds + 1):  # round 0 warms every copy up and is not counted
        for label, (model, optimizer) in copies.items():
            took = seconds_per_step(model, optimizer, x, args.steps)
            if round_:
                best[label] = min(best[label], took)
    for probe in probes:
        probe.close()
    dist.destroy_process_group()
    if rank == 0:
        params = sum(p.numel() for p in copies["without"][0].parameters())
        print(f"{args.world} ranks, {2 * args.depth} timed modules, {params} params, "
              f"best of {args.rounds} rounds of {args.steps} steps")
        for label, seconds in best.items():
            print(f"{VARIANTS[label]:<36} {seconds * 1e3:8.3f} ms/step  x{seconds / best['without']:.3f}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--world", type=int, default=2)
    parser.add_argument("--steps", type=int, default=50)
    parser.add_argument("--rounds", type=int, default=5)
    parser.add_argument("--width", type=int, default=256)
    parser.add_argument("--depth", type=int, default=8)
    args = parser.parse_args()
    with socket.socket() as sock:  # a free port for the process group; the probe's (port + 1) has no listener
        sock.bind(("127.0.0.1", 0))
        port = sock.getsockname()[1]
    mp.spawn(rank_main, args=(args, port), nprocs=args.world)


if __name__ == "__main__":
    main()
