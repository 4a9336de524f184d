"""A tiny real PyTorch job on CPU with gloo, watched by Watchtower: one rank per process.

    python tests/torch/torch_job.py ddp  --rank R --world W --port P --collector tcp://... --steps S
    python tests/torch/torch_job.py pipe --rank R --world 2 --port P --collector tcp://... --steps S

``ddp``: data-parallel training of ``Net`` with small buckets (several per step). ``pipe``: the same kind of
model split over two ranks; rank 0 sends activations to rank 1, which sends their gradients back, and the
targets and the loss travel by broadcast and allreduce. Prints one JSON line about what it ran.
"""

from __future__ import annotations

import argparse
import json
import os

import torch
import torch.distributed as dist
from torch import nn
from torch.nn.parallel import DistributedDataParallel

from agent import Probe
from agent.integrations.torch import TimedDist, watch_module

BATCH, IN, HIDDEN, OUT = 8, 32, 64, 4


class Net(nn.Module):
    """Two named parts, so layer names show module paths (``encoder.0``, ``head``)."""

    def __init__(self) -> None:
        super().__init__()
        self.encoder = nn.Sequential(nn.Linear(IN, HIDDEN), nn.ReLU(), nn.Linear(HIDDEN, HIDDEN))
        self.head = nn.Linear(HIDDEN, OUT)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.head(self.encoder(x))


def run_ddp(probe: Probe, steps: int) -> dict[str, int]:
    model = DistributedDataParallel(Net(), bucket_cap_mb=0.01)  # ~10 kB buckets: several per step
    optimizer = torch.optim.SGD(model.parameters(), lr=0.01)
    watch_module(model, probe, optimizer=optimizer)
    data = torch.Generator().manual_seed(100 + probe.rank)  # each rank its own shard
    for _ in range(steps):
        x, y = torch.randn(BATCH, IN, generator=data), torch.randn(BATCH, OUT, generator=data)
        nn.functional.mse_loss(model(x), y).backward()
        optimizer.step()
        optimizer.zero_grad()
    return {"params": sum(p.numel() for p in model.parameters())}


def run_pipe(probe: Probe, steps: int) -> dict[str, int]:
    stages = [nn.Sequential(nn.Linear(IN, HIDDEN), nn.Tanh()),
              nn.Sequential(nn.Linear(HIDDEN, HIDDEN), nn.Tanh(), nn.Linear(HIDDEN, OUT))]
    stage = stages[probe.rank]
    optimizer = torch.optim.SGD(stage.parameters(), lr=0.01)
    watch_module(stage, probe, optimizer=optimizer, prefix=f"stage{probe.rank}.")
    timed = TimedDist(probe)
    sizes = [torch.zeros(1, dtype=torch.int64) for _ in range(2)]
    timed.all_gather(sizes, torch.tensor([sum(p.numel() for p in stage.parameters())]), layer="setup")
    data = torch.Generator().manual_seed(7)
    for _ in range(steps):
        y = torch.randn(BATCH, OUT, generator=data) if probe.rank == 0 else torch.empty(BATCH, OUT)
        timed.broadcast(y, 0, layer="targets")
        loss = torch.zeros(1)
        if probe.rank == 0:
            h = stage(torch.randn(BATCH, IN, generator=data))
            timed.send(h.detach(), 1, layer="pipe.activations")
            grad = torch.empty(BATCH, HIDDEN)
            timed.recv(grad, 1, layer="pipe.gradients")
            h.backward(grad)
        else:
            h = torch.empty(BATCH, HIDDEN)
            timed.recv(h, 0, layer="pipe.activations")
            h.requires_grad_()
            step_loss = nn.functional.mse_loss(stage(h), y)
            step_loss.backward()
            timed.send(h.grad, 0, layer="pipe.gradients")
            loss += step_loss.detach()
        timed.all_reduce(loss, layer="metrics")
        optimizer.step()
        optimizer.zero_grad()
    return {"params": int(sum(s.item() for s in sizes))}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("mode", choices=["ddp", "pipe"])
    parser.add_argument("--rank", type=int, required=True)
    parser.add_argument("--world", type=int, required=True)
    parser.add_argument("--port", type=int, required=True)
    parser.add_argument("--collector", required=True)
    parser.add_argument("--steps", type=int, default=4)
    args = parser.parse_args()
    os.environ.update(MASTER_ADDR="127.0.0.1", MASTER_PORT=str(args.port))
    torch.manual_seed(0)  # same initial weights everywhere (DDP would broadcast rank 0's anyway)
    torch.use_deterministic_algorithms(True)
    torch.set_num_threads(1)
    dist.init_process_group("gloo", rank=args.rank, world_size=args.world)
    probe = Probe(args.rank, args.world, node=f"host{args.rank}", endpoint=args.collector, job=args.mode)
    try:
        ran = (run_ddp if args.mode == "ddp" else run_pipe)(probe, args.steps)
    finally:
        probe.close()
        dist.destroy_process_group()
    print(json.dumps({**ran, "dropped": probe.dropped, "steps": probe.step_index}))


if __name__ == "__main__":
    main()
