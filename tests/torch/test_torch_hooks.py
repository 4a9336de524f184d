"""``watch_module`` in one process, no process group: which modules are timed, what a step records."""

from __future__ import annotations

import pytest

NO_TORCH = "PyTorch is not installed (pip install torch==2.13.0, or the [torch] extra)"
torch = pytest.importorskip("torch", reason=NO_TORCH)

from torch import nn  # noqa: E402

from agent import Probe, wire  # noqa: E402
from agent.integrations.torch import module_layers, watch_module  # noqa: E402


def tiny() -> nn.Module:
    torch.manual_seed(0)
    return nn.Sequential(nn.Sequential(nn.Linear(4, 8), nn.ReLU()), nn.Linear(8, 2))


def test_timed_modules_partition_the_model() -> None:
    model = tiny()
    assert [name for name, _ in module_layers(model)] == ["0.0", "0.1", "1"]
    assert [name for name, _ in module_layers(model, depth=1, prefix="stage0.")] == ["stage0.0", "stage0.1"]
    assert [name for name, _ in module_layers(model, depth=0)] == ["Sequential"]
    assert [name for name, _ in module_layers(nn.Linear(2, 2), prefix="proj.")] == ["proj"]


def test_each_optimizer_step_ends_a_step_with_forward_and_backward_compute() -> None:
    model = tiny()
    probe = Probe(0, 1, "host0", None)
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    watch = watch_module(model, probe, optimizer=optimizer)
    assert probe.layers == ("0.0", "0.1", "1", "optimizer")
    x = torch.randn(3, 4, requires_grad=True)  # so the first layer's backward is timed too
    with torch.no_grad():
        model(x)  # forward only: the hooks time it; the backward hooks stay quiet
    model(x).sum().backward()
    optimizer.step()
    steps = [m for m in map(wire.decode, probe.sent_frames) if isinstance(m, wire.Step)]
    assert len(steps) == 1 and (steps[0].layer_ns[0] > 0).all() and not steps[0].layer_ns[1].any()

    watch.remove()
    model(x).sum().backward()
    optimizer.step()  # no longer watched: no step ends
    assert sum(isinstance(wire.decode(f), wire.Step) for f in probe.sent_frames) == 1


def test_forward_only_leaves_backward_alone() -> None:
    model = tiny()
    watch_module(model, Probe(0, 1, "host0", None), backward=False)
    assert all(m._forward_pre_hooks and not m._backward_pre_hooks and not m._backward_hooks
               for _, m in module_layers(model))
