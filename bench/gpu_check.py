"""On a machine with a GPU: does device-event timing agree with a synchronising reference, and what does it cost?

    python bench/gpu_check.py [--steps 50] [--width 2048] [--depth 6] [--batch 512]

Times one small model (``depth`` Linear+ReLU pairs on the GPU, forward and backward) three ways in one run:

1. with CUDA events (``Probe(device=CudaMarkers())``): what Watchtower does on a GPU; ``torch.cuda.synchronize``
   is replaced by a counter while it runs, to show it is never called on the training path;
2. with a synchronising host clock (``torch.cuda.synchronize()`` before every reading): the reference, exact
   per module but serialising the job;
3. without Watchtower, for the overhead.

It prints each module's compute both ways and their difference (the reference also counts the host's time
to launch kernels, a few microseconds per module), then the time per step with events and without, and the
overhead per timed region. On a machine without a GPU it says so in one line and exits with status 1.
Needs the ``[torch]`` extra.
"""

from __future__ import annotations

import argparse
import sys
import time
from collections.abc import Callable

import numpy as np


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--steps", type=int, default=50)
    parser.add_argument("--width", type=int, default=2048)
    parser.add_argument("--depth", type=int, default=6)
    parser.add_argument("--batch", type=int, default=512)
    args = parser.parse_args()
    try:
        import torch
    except ImportError:
        print("gpu_check: PyTorch is not installed (pip install torch==2.13.0); nothing was checked", file=sys.stderr)
        return 1
    if not torch.cuda.is_available():
        print("gpu_check: no CUDA GPU on this machine (torch.cuda.is_available() is False); nothing was checked",
              file=sys.stderr)
        return 1
    run(torch, args)
    return 0


def run(torch, args: argparse.Namespace) -> None:  # type: ignore[no-untyped-def]
    from torch import nn

    from agent import Probe, wire
    from agent.integrations.torch import CudaMarkers, watch_module

    def model() -> nn.Module:
        torch.manual_seed(0)
        layers = [m for _ in range(args.depth) for m in (nn.Linear(args.width, args.width), nn.ReLU())]
        return nn.Sequential(*layers).cuda()

    x = torch.randn(args.batch, args.width, device="cuda", requires_grad=True)
    warmup = 5

    def train(net: nn.Module, end_step: Callable[[], object] | None) -> float:
        """Seconds per step over ``args.steps`` steps after a warm-up; one synchronise at each end of the
        timed span (outside the training path, to read the wall time)."""
        for _ in range(warmup):
            net(x).square().mean().backward()
            if end_step is not None:
                end_step()
        torch.cuda.synchronize()
        start = time.perf_counter()
        for _ in range(args.steps):
            net(x).square().mean().backward()
            if end_step is not None:
                end_step()
        torch.cuda.synchronize()
        return (time.perf_counter() - start) / args.steps

    def per_layer(probe: Probe) -> dict[str, float]:
        """Mean compute seconds per layer over the published steps after the warm-up."""
        layers: tuple[str, ...] = ()
        rows = []
        for message in map(wire.decode, probe.sent_frames):
            if isinstance(message, wire.Schema):
                layers = message.layers
            elif isinstance(message, wire.Step) and message.step >= warmup:
                rows.append(message.layer_ns[0, :len(layers)])
        mean = np.mean(rows, axis=0) * 1e-9
        return dict(zip(layers, mean.tolist(), strict=True))

    # 1. CUDA events, with synchronise counted (it must stay at zero)
    synchronise = torch.cuda.synchronize
    calls = 0

    def counting(*a: object, **k: object) -> None:
        nonlocal calls
        calls += 1
        synchronise(*a, **k)

    events = Probe(0, 1, "gpu-check", None, device=CudaMarkers())
    net = model()
    watch = watch_module(net, events)
    torch.cuda.synchronize = counting
    try:
        for _ in range(warmup + args.steps):
            net(x).square().mean().backward()
            watch.end_step()
    finally:
        torch.cuda.synchronize = synchronise
    sync_calls = calls
    left = events.drain(deadline_s=10.0)

    # 2. the synchronising reference
    reference = Probe(0, 1, "gpu-check", None, clock=lambda: (synchronise(), time.perf_counter_ns())[1])
    net = model()
    train(net, watch_module(net, reference).end_step)

    # 3. overhead: the same model without and with events, wall time per step
    plain_s = train(model(), None)
    timed = Probe(0, 1, "gpu-check", None, device=CudaMarkers())
    net = model()
    events_s = train(net, watch_module(net, timed).end_step)
    timed.drain(deadline_s=10.0)

    got, ref = per_layer(events), per_layer(reference)
    print(f"{torch.cuda.get_device_name()} · {args.depth * 2} modules of width {args.width}, batch {args.batch}, "
          f"{args.steps} steps (forward + backward)")
    print(f"{'module':<12} {'events ms':>10} {'sync ms':>10} {'diff ms':>9} {'diff %':>7}")
    for name in ref:
        a, b = got.get(name, float("nan")), ref[name]
        print(f"{name:<12} {a * 1e3:10.3f} {b * 1e3:10.3f} {(a - b) * 1e3:9.3f} {100 * (a - b) / b:7.1f}")
    regions = 2 * 2 * args.depth  # forward and backward of every module
    print(f"step without Watchtower {plain_s * 1e3:.3f} ms, with CUDA events {events_s * 1e3:.3f} ms "
          f"(x{events_s / plain_s:.3f}); {(events_s - plain_s) / regions * 1e6:.2f} µs per timed region")
    print(f"torch.cuda.synchronize calls on the training path with events: {sync_calls}; "
          f"steps still unpublished at the end: {left}; events created: {events._pool.created}")  # type: ignore[union-attr]


if __name__ == "__main__":
    sys.exit(main())
