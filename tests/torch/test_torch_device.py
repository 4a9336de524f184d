"""``watch_module`` with CUDA-event timing, on a simulated device behind a fake ``torch.cuda``.

This machine has no GPU. The model runs on the CPU; hooks registered after Watchtower's launch simulated
kernels of known durations on the simulated device (tests/agent/simdevice.py), as a GPU would run the
module's kernels between the start and end events. What the probe publishes must be those durations;
the fake ``torch.cuda`` raises on any synchronise. DDP runs as a one-rank gloo group: its buckets and what
they carry are real, their transfers on the device are not (that needs a GPU: bench/gpu_check.py).
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest

NO_TORCH = "PyTorch is not installed (pip install torch==2.13.0, or the [torch] extra)"
torch = pytest.importorskip("torch", reason=NO_TORCH)

import torch.distributed as dist  # noqa: E402
from torch import nn  # noqa: E402
from torch.nn.parallel import DistributedDataParallel  # noqa: E402

from agent import Probe, wire  # noqa: E402
from agent.integrations.torch import CudaMarkers, TimedDist, module_layers, watch_module  # noqa: E402
from tests.agent.simdevice import FakeCuda, SimDevice  # noqa: E402

US = 1_000


@pytest.fixture
def cuda() -> Iterator[FakeCuda]:
    device = SimDevice()
    yield FakeCuda(device)
    device.close()


@pytest.fixture
def group(tmp_path: Path) -> Iterator[None]:
    dist.init_process_group("gloo", init_method=f"file://{tmp_path / 'store'}", rank=0, world_size=1)
    yield
    dist.destroy_process_group()


def model() -> nn.Module:
    torch.manual_seed(0)
    return nn.Sequential(nn.Linear(4, 8), nn.ReLU(), nn.Linear(8, 8), nn.Linear(8, 2))


def kernels(net: nn.Module, cuda: FakeCuda) -> dict[str, tuple[int, int]]:
    """Launch a simulated forward and backward kernel inside each timed module; their known durations."""
    durations = {}
    for i, (name, module) in enumerate(module_layers(net)):
        fwd, bwd = (i + 1) * 100 * US + 7, (i + 1) * 250 * US + 11
        durations[name] = fwd, bwd
        module.register_forward_pre_hook(lambda _m, _a, ns=fwd: cuda.device.launch(ns))
        module.register_full_backward_pre_hook(lambda _m, _g, ns=bwd: cuda.device.launch(ns))
    return durations


def published(probe: Probe) -> list[wire.Step]:
    return [m for m in map(wire.decode, probe.sent_frames) if isinstance(m, wire.Step)]


def test_module_compute_is_the_device_time_and_nothing_synchronises(cuda: FakeCuda,
                                                                     monkeypatch: pytest.MonkeyPatch) -> None:
    def forbidden(*_args: object) -> None:
        raise AssertionError("torch.cuda.synchronize() on the training path")

    monkeypatch.setattr(torch.cuda, "synchronize", forbidden)
    net = model()
    probe = Probe(0, 1, "host0", None, device=CudaMarkers(cuda))
    optimizer = torch.optim.SGD(net.parameters(), lr=0.1)
    watch_module(net, probe, optimizer=optimizer)
    durations = kernels(net, cuda)
    x = torch.randn(3, 4, requires_grad=True)  # so the first layer's backward is timed too
    for _ in range(5):
        net(x).sum().backward()
        optimizer.step()
        cuda.device.idle()
    created = cuda.events_created
    for _ in range(5):
        net(x).sum().backward()
        optimizer.step()
        cuda.device.idle()
    assert cuda.events_created == created  # events come from the pool, not one per region
    assert probe.drain(deadline_s=5.0) == 0
    steps = published(probe)
    assert [s.step for s in steps] == list(range(10))
    for step in steps:
        for name, (fwd, bwd) in durations.items():
            assert step.layer_ns[0][probe.layers.index(name)] == fwd + bwd  # not the host's launch time


def test_ddp_buckets_say_whose_gradients_they_carry(cuda: FakeCuda, group: None) -> None:
    net = DistributedDataParallel(model(), bucket_cap_mb=(8 * 8 + 8) * 4 / 2**20)  # the 8x8 layer fills one
    probe = Probe(0, 1, "host0", None, device=CudaMarkers(cuda))
    optimizer = torch.optim.SGD(net.parameters(), lr=0.1)
    watch_module(net, probe, optimizer=optimizer)
    x = torch.randn(3, 4, requires_grad=True)
    for _ in range(3):  # DDP rebuilds its buckets after the first step: the schema follows
        net(x).sum().backward()
        optimizer.step()
    cuda.device.idle()
    assert probe.drain(deadline_s=5.0) == 0
    schema = [m for m in map(wire.decode, probe.sent_frames) if isinstance(m, wire.Schema)][-1]
    carried = {schema.layers[b]: {schema.layers[i] for i in sources} for b, sources in schema.carries}
    params = {name: sum(p.numel() * p.element_size() for p in m.parameters()) for name, m in module_layers(net)}
    # every timed layer with parameters is carried by exactly one bucket, as DDP put its parameters
    assert sorted(name for names in carried.values() for name in names) == sorted(n for n, b in params.items() if b)
    steps = published(probe)
    last = steps[-1]
    for layer, op, _peer, group_size, nbytes, *_ in last.exchanges.T.tolist():
        name = schema.layers[layer]
        assert op == wire.Op.ALLREDUCE and group_size == 1
        assert nbytes == sum(params[source] for source in carried[name])  # the bucket holds their gradients
    assert set(carried) == {schema.layers[row] for row in last.exchanges[wire.X_LAYER].tolist()}
    assert schema.schema_id == last.schema_id


def test_async_collective_on_the_host_clock_charges_only_the_wait(group: None) -> None:
    probe = Probe(0, 1, "host0", None)
    timed = TimedDist(probe)
    tensor = torch.ones(256)
    work = timed.all_reduce_async(tensor, layer="halo")
    work.wait()
    probe.end_step()
    step = published(probe)[0]
    (start, end), exposed = step.exchanges[[wire.X_START, wire.X_END], 0].tolist(), step.layer_ns[1][0]
    assert step.exchanges[wire.X_NBYTES, 0] == 1024 and step.exchanges[wire.X_OP, 0] == wire.Op.ALLREDUCE
    assert 0 <= exposed <= end - start  # the wait is part of the transfer, never more


def test_async_collective_with_device_timing_is_recorded_once(cuda: FakeCuda, group: None) -> None:
    probe = Probe(0, 1, "host0", None, device=CudaMarkers(cuda))
    timed = TimedDist(probe)
    for _ in range(20):  # the completion callback and wait() race to mark the end: once, whoever wins
        timed.all_reduce_async(torch.ones(64), layer="halo").wait()
        probe.end_step()
    cuda.device.idle()
    assert probe.drain(deadline_s=5.0) == 0
    steps = published(probe)
    assert [s.exchanges.shape[1] for s in steps] == [1] * 20
    assert all(s.exchanges[wire.X_NBYTES, 0] == 256 and s.layer_ns[1][0] == 0 for s in steps)  # no device wait
