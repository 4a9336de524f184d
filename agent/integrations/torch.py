"""PyTorch in two lines: per-module compute, DDP bucket allreduces, explicit collectives, step marks.

    probe = Probe(rank, world, node=socket.gethostname(), endpoint="tcp://head:5555")
    watch_module(ddp_model, probe, optimizer=optimizer)

Only this module imports torch (install the ``[torch]`` extra); ``import agent`` stays torch-free.

What is timed, and how:

- **Compute per module** (layer name = module path, e.g. ``encoder.layers.3.mlp``): forward pre/post hooks
  and full backward pre/post hooks add forward *and* backward time to the same layer. The timed modules
  partition the model so nothing is counted twice: the leaves by default, or the modules at ``depth``
  (``depth=1``: the model's direct children). Work a parent does outside its timed children (a residual
  add in its own ``forward``) is not counted. PyTorch calls a module's backward hook only once when none
  of its inputs needs a gradient (the first layer, embeddings); such a module's backward is not timed.
- **DDP buckets**: a comm hook runs DDP's own averaging allreduce and records each bucket as an ALLREDUCE
  exchange of layer ``ddp.bucket.<index>``: bytes = the bucket buffer's bytes, group = the process group's
  size, from the hook call until the allreduce's future is complete. With gloo the future completes on a
  worker thread, so the callback only stamps the time; the record is made on the training thread when the
  step ends (the probe belongs to one thread). The record keeps the whole time in flight; the layer's
  exchange time is only the part that ran past the end of the backward compute (the rest was hidden behind
  it), so a bucket that overlapped fully costs nothing and is not flagged communication-bound.
- **Explicit calls**: ``TimedDist`` wraps blocking ``torch.distributed`` collectives and send/recv, recording
  peer (or group size) and bytes; there the time is blocked time.
- **Steps**: ``optimizer.step`` is timed as layer ``optimizer`` and ends the probe's step.

Clock: the probe's (``time.perf_counter_ns`` by default), read on the host. That is honest on CPU. On a GPU
kernels run asynchronously, so host timestamps measure launches, not the work; give the probe a clock that
synchronises first (``clock=lambda: (torch.cuda.synchronize(), time.perf_counter_ns())[1]``, which also
serialises the job) or a CUDA-event clock of your own. That GPU path is untested: the machines this was built
and tested on have no GPU.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import torch
import torch.distributed as dist
from torch import nn
from torch.distributed.algorithms.ddp_comm_hooks import default_hooks
from torch.nn.parallel import DistributedDataParallel
from torch.utils.hooks import RemovableHandle

from agent.clock import Clock
from agent.probe import Exchange, Probe
from agent.wire import Op

OPTIMIZER_LAYER = "optimizer"
BUCKET_LAYER = "ddp.bucket.{}"


def module_layers(model: nn.Module, depth: int | None = None, prefix: str = "") -> Iterator[tuple[str, nn.Module]]:
    """The (layer name, module) pairs to time: leaves, or the modules at ``depth`` and leaves above it.

    Either way no timed module contains another, so a layer's time is its own. Names are ``prefix`` + the
    module path (a pipeline stage can say ``prefix="stage1."``); a model that is itself a leaf is named by
    the prefix or its class."""
    if isinstance(model, DistributedDataParallel):
        model = model.module
    for path, module in model.named_modules():
        level = path.count(".") + 1 if path else 0
        if (depth is None or level <= depth) and (next(module.children(), None) is None or level == depth):
            yield prefix + path if path else prefix.rstrip(".") or type(module).__name__, module


class _Bucket:
    """One bucket's allreduce in flight: stamped when done (maybe on a gloo thread), recorded at step end."""

    __slots__ = ("_clock", "end", "layer", "nbytes", "start")

    def __init__(self, layer: str, nbytes: int, clock: Clock) -> None:
        self.layer, self.nbytes, self._clock = layer, nbytes, clock
        self.start = clock()
        self.end = -1

    def done(self, fut: torch.futures.Future[torch.Tensor]) -> torch.Tensor:
        """The allreduce's ``then`` callback: stamp the time, touch nothing else (we may be off-thread)."""
        self.end = self._clock()
        return fut.value()


class ModuleWatch:
    """The hooks ``watch_module`` attached; ``end_step()`` by hand when no optimizer was given, ``remove()``
    to detach."""

    def __init__(self, model: nn.Module, probe: Probe, *, optimizer: torch.optim.Optimizer | None = None,
                 process_group: dist.ProcessGroup | None = None, depth: int | None = None, prefix: str = "",
                 backward: bool = True) -> None:
        self.probe = probe
        self._handles: list[RemovableHandle] = []
        self._buckets: list[tuple[_Bucket, torch.futures.Future[torch.Tensor]]] = []
        self._recording = True
        self._backward_end = 0  # when the last module's backward compute ended: buckets after it are exposed
        for name, module in module_layers(model, depth, prefix):
            self._time_module(name, module, backward)
        if optimizer is not None:
            probe.layer(OPTIMIZER_LAYER)
            self._handles.append(optimizer.register_step_pre_hook(self._on_step_begin))
            self._handles.append(optimizer.register_step_post_hook(self._on_step_end))
        if isinstance(model, DistributedDataParallel):
            self._group = process_group if process_group is not None else model.process_group
            self._group_size = dist.get_world_size(self._group)
            # DDP checks a hook's annotations and rejects this module's postponed (string) ones: wrap it.
            # DDP offers no way to remove a comm hook again.
            model.register_comm_hook(None, lambda _state, bucket: self._comm_hook(bucket))

    def _time_module(self, name: str, module: nn.Module, backward: bool) -> None:
        start, stop = self.probe.start_compute, self.probe.stop_compute
        self.probe.layer(name)  # announce every layer from the first step on, in model order
        self._handles += [
            module.register_forward_pre_hook(lambda _m, _args: start(name)),
            module.register_forward_hook(lambda _m, _args, _out: stop(name), always_call=True),
        ]
        if backward:  # most of the hooks' cost: PyTorch wraps the module's inputs and outputs in autograd nodes
            self._handles += [
                module.register_full_backward_pre_hook(lambda _m, _grad_out: start(name)),
                module.register_full_backward_hook(lambda _m, _grad_in, _grad_out: self._backward_done(name)),
            ]

    def _backward_done(self, name: str) -> None:
        self.probe.stop_compute(name)
        self._backward_end = self.probe.clock()

    def _comm_hook(self, bucket: dist.GradBucket) -> torch.futures.Future[torch.Tensor]:
        if not self._recording:
            return default_hooks.allreduce_hook(self._group, bucket)
        record = _Bucket(BUCKET_LAYER.format(bucket.index()), _nbytes(bucket.buffer()), self.probe.clock)
        future = default_hooks.allreduce_hook(self._group, bucket).then(record.done)  # DDP's own averaging
        self._buckets.append((record, future))
        return future

    def _finish_buckets(self) -> None:
        """Record the step's bucket allreduces on the probe's own thread, as of when each completed.

        Each record keeps the whole allreduce (for the link and collective models); only what ran past the
        end of the backward compute counts as the layer's exchange time, since the rest was hidden behind
        compute. Buckets are taken in order of completion and each is charged the exposed time not already
        charged to an earlier one, so overlapping allreduces are not counted twice."""
        exposed_from = self._backward_end
        for record, future in sorted(self._buckets, key=lambda item: item[0].end):
            future.wait()  # DDP waited for it before backward returned: a no-op then
            exposed = max(0, record.end - max(exposed_from, record.start))
            exposed_from = max(exposed_from, record.end)
            self.probe.record_transfer(record.layer, op=Op.ALLREDUCE, group=self._group_size, nbytes=record.nbytes,
                                       start_ns=record.start, end_ns=record.end, exposed_ns=exposed)
        self._buckets.clear()

    def _on_step_begin(self, _opt: torch.optim.Optimizer, _args: Any, _kwargs: Any) -> None:
        self.probe.start_compute(OPTIMIZER_LAYER)

    def _on_step_end(self, _opt: torch.optim.Optimizer, _args: Any, _kwargs: Any) -> None:
        self.probe.stop_compute(OPTIMIZER_LAYER)
        self.end_step()

    def end_step(self) -> bool:
        """Close the probe's step (see ``Probe.end_step``) after recording the step's bucket allreduces."""
        self._finish_buckets()
        return self.probe.end_step()

    def remove(self) -> None:
        """Detach the module and optimizer hooks; the DDP comm hook, which cannot be removed, stops recording."""
        self._recording = False
        for handle in self._handles:
            handle.remove()
        self._handles.clear()


def watch_module(model: nn.Module, probe: Probe, *, optimizer: torch.optim.Optimizer | None = None,
                 process_group: dist.ProcessGroup | None = None, depth: int | None = None, prefix: str = "",
                 backward: bool = True) -> ModuleWatch:
    """Time ``model`` (plain or DDP-wrapped) per module, its DDP buckets, and end a step at each
    ``optimizer.step()``. Call before the first forward: DDP takes a comm hook only before training starts.
    ``process_group`` overrides the DDP model's own group for the allreduce; ``depth`` and ``prefix`` choose
    the timed modules and their names (``module_layers``); ``backward=False`` times forward only, for a
    fraction of the hooks' cost (``bench/bench_torch.py``)."""
    return ModuleWatch(model, probe, optimizer=optimizer, process_group=process_group, depth=depth, prefix=prefix,
                       backward=backward)


class TimedDist:
    """Blocking ``torch.distributed`` calls, each recorded as one exchange of ``layer`` with its bytes.

    Bytes are this rank's tensor (for ``all_gather``, its own contribution). Ranks are global ranks, as
    ``torch.distributed`` takes them. For overlapped (``async_op``) work, time the ``wait()`` with
    ``probe.exchange`` yourself: only blocked time is exposed time."""

    def __init__(self, probe: Probe, group: dist.ProcessGroup | None = None) -> None:
        self.probe = probe
        self.group = group
        self.group_size = dist.get_world_size(group)

    def _collective(self, layer: str, op: Op, tensor: torch.Tensor) -> Exchange:
        return self.probe.exchange(layer, op=op, group=self.group_size, nbytes=_nbytes(tensor))

    def all_reduce(self, tensor: torch.Tensor, *, layer: str, op: dist.ReduceOp.RedOpType = dist.ReduceOp.SUM
                   ) -> None:
        with self._collective(layer, Op.ALLREDUCE, tensor):
            dist.all_reduce(tensor, op=op, group=self.group)

    def broadcast(self, tensor: torch.Tensor, src: int, *, layer: str) -> None:
        with self._collective(layer, Op.BROADCAST, tensor):
            dist.broadcast(tensor, src, group=self.group)

    def all_gather(self, tensors: list[torch.Tensor], tensor: torch.Tensor, *, layer: str) -> None:
        with self._collective(layer, Op.ALLGATHER, tensor):
            dist.all_gather(tensors, tensor, group=self.group)

    def send(self, tensor: torch.Tensor, dst: int, *, layer: str) -> None:
        with self.probe.exchange(layer, peer=dst, nbytes=_nbytes(tensor), op=Op.SEND):
            dist.send(tensor, dst, group=self.group)

    def recv(self, tensor: torch.Tensor, src: int, *, layer: str) -> None:
        """Receive into ``tensor`` from ``src`` (a known peer: the record needs one)."""
        with self.probe.exchange(layer, peer=src, nbytes=_nbytes(tensor), op=Op.RECV):
            dist.recv(tensor, src, group=self.group)


def _nbytes(tensor: torch.Tensor) -> int:
    return tensor.numel() * tensor.element_size()


__all__ = ["ModuleWatch", "TimedDist", "module_layers", "watch_module"]
