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

Clock: the probe's host clock (``time.perf_counter_ns``) by default, which is honest on CPU. On a GPU kernels
run asynchronously, so host timestamps measure launches, not the work; there give the probe CUDA events:

    probe = Probe(rank, world, node=..., endpoint=..., device=CudaMarkers())

Then every region records a start and an end event on the current stream (events come from one pool and
are reused), and a step is published once the GPU has passed all its events (``Event.query()``, never a
synchronise): one or two steps after the host ended it (``agent/device.py``). In that mode:

- **DDP buckets** get an event on the current stream when the bucket is handed to the comm hook (its
  gradients are ready; the allreduce cannot start before) and one in the allreduce future's callback, which
  PyTorch runs on a stream that waits for the allreduce: the record is the transfer as the GPU ran it. The
  exposed part is the time the compute stream waits for the buckets: from the event that ended the last
  module's backward to one taken when the optimizer step begins (by then DDP has made the stream wait for
  every bucket), split among the buckets in order of completion. Work between backward and the optimizer
  step (gradient clipping) is counted in that span.
- **Explicit calls**: a blocking collective makes the current stream wait for it, so events around it time
  the blocked span; ``async_op=True`` returns a handle whose ``wait()`` is timed as the exposed part.

Verified here only against a simulated device and a fake ``torch.cuda`` (tests/torch/test_torch_device.py);
``bench/gpu_check.py`` compares the two ways on a real GPU.
"""

from __future__ import annotations

import threading
from collections.abc import Callable, Iterator
from contextlib import AbstractContextManager
from typing import Any

import torch
import torch.distributed as dist
from torch import nn
from torch.distributed.algorithms.ddp_comm_hooks import default_hooks
from torch.nn.parallel import DistributedDataParallel
from torch.utils.hooks import RemovableHandle

from agent.clock import Clock
from agent.device import Marker, Transfer, split_exposed
from agent.probe import Probe
from agent.wire import NO_PEER, Op

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


def _parameter_layers(model: nn.Module, depth: int | None, prefix: str) -> dict[int, str]:
    """Which timed layer (``module_layers``) holds each parameter. A parameter a parent holds itself, outside
    its timed children, has no timed layer and is left out."""
    return {id(p): name for name, module in module_layers(model, depth, prefix) for p in module.parameters()}


class CudaMarkers:
    """The ``agent.device.Markers`` backend on CUDA events: recorded on a stream, read with ``query()`` and
    ``elapsed_time`` once complete. Never synchronises. ``cuda`` is the ``torch.cuda`` module (the tests
    pass a simulated one)."""

    def __init__(self, cuda: Any = None) -> None:
        self._cuda = torch.cuda if cuda is None else cuda

    def create(self) -> Marker:
        return self._cuda.Event(enable_timing=True)

    def record(self, marker: Marker, stream: Any = None) -> None:
        marker.record(stream)  # None: the current stream

    def query(self, marker: Marker) -> bool:
        return marker.query()

    def elapsed_ns(self, start: Marker, end: Marker) -> int:
        return round(start.elapsed_time(end) * 1e6)  # milliseconds, about half a microsecond resolution


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
        self._device = probe.device_timing
        # when the last module's backward ended: a host clock reading, or this step's marker (None: not yet)
        self._backward_end: Any = None if self._device else 0
        self._transfers: list[Transfer] = []  # device timing: this step's bucket allreduces
        self._owner = _parameter_layers(model, depth, prefix)  # id(parameter) -> the timed layer holding it
        self._carried: dict[int, tuple[int, ...]] = {}  # bucket index -> its parameters' ids, as last announced
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
        self._backward_end = self.probe.last_mark if self._device else self.probe.clock()

    def _comm_hook(self, bucket: dist.GradBucket) -> torch.futures.Future[torch.Tensor]:
        if not self._recording:
            return default_hooks.allreduce_hook(self._group, bucket)
        layer = BUCKET_LAYER.format(bucket.index())
        self._announce_bucket(bucket, layer)
        if self._device:
            transfer = self.probe.transfer(layer, op=Op.ALLREDUCE, nbytes=_nbytes(bucket.buffer()),
                                           group=self._group_size)
            self._transfers.append(transfer)
            return default_hooks.allreduce_hook(self._group, bucket).then(self._bucket_done(transfer))
        record = _Bucket(layer, _nbytes(bucket.buffer()), self.probe.clock)
        future = default_hooks.allreduce_hook(self._group, bucket).then(record.done)  # DDP's own averaging
        self._buckets.append((record, future))
        return future

    def _announce_bucket(self, bucket: dist.GradBucket, layer: str) -> None:
        """Tell the head whose gradients the bucket carries, when that is new: DDP rebuilds its buckets
        after the first step, in the order gradients became ready."""
        ids = tuple(map(id, bucket.parameters()))
        if self._carried.get(bucket.index()) != ids:
            self._carried[bucket.index()] = ids
            self.probe.carries(layer, [self._owner[i] for i in ids if i in self._owner])

    def _bucket_done(self, transfer: Transfer) -> Callable[[torch.futures.Future[torch.Tensor]], torch.Tensor]:
        def done(fut: torch.futures.Future[torch.Tensor]) -> torch.Tensor:
            self.probe.finish(transfer)  # on the callback's current stream, which waits for the allreduce
            return fut.value()
        return done

    def _finish_buckets(self) -> None:
        """Record the step's bucket allreduces on the probe's own thread, as of when each completed.

        Each record keeps the whole allreduce (for the link and collective models); only what ran past the
        end of the backward compute counts as the layer's exchange time, since the rest was hidden behind
        compute (``agent.device.split_exposed``: in order of completion, each bucket is charged the exposed
        time not already charged to an earlier one, so overlapping allreduces are not counted twice)."""
        if self._device:
            if self._transfers:  # the current stream resumes here after DDP made it wait for every bucket
                # without timed backward hooks, the last bucket's readiness stands for the end of backward
                since = self._transfers[-1].start if self._backward_end is None else self._backward_end
                self.probe.wait_window(since, self._transfers)
                self._transfers = []
            self._backward_end = None  # a marker belongs to its step
            return
        records = sorted(self._buckets, key=lambda item: item[0].end)
        for _, future in records:
            future.wait()  # DDP waited for it before backward returned: a no-op then
        shares = split_exposed(self._backward_end, max((r.end for r, _ in records), default=0),
                               [(r.start, r.end) for r, _ in records])
        for (record, _), exposed in zip(records, shares, strict=True):
            self.probe.record_transfer(record.layer, op=Op.ALLREDUCE, group=self._group_size, nbytes=record.nbytes,
                                       start_ns=record.start, end_ns=record.end, exposed_ns=exposed)
        self._buckets.clear()

    def _on_step_begin(self, _opt: torch.optim.Optimizer, _args: Any, _kwargs: Any) -> None:
        self._finish_buckets()
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


class TimedWork:
    """An ``async_op`` collective or point-to-point call in flight. ``wait()`` it instead of the work: the
    record keeps the whole transfer, and only the time spent in ``wait()`` is the layer's exchange time.

    With device timing the transfer is marked on the current stream before the call (it cannot start
    earlier) and in the work's future callback (a stream that waits for it); the exposed part is the span
    from a marker before ``wait()`` to one after, where the current stream resumes."""

    def __init__(self, probe: Probe, layer: str, op: Op, peer: int, group: int, nbytes: int,
                 call: Callable[[], dist.Work]) -> None:
        self.probe, self.layer, self.op, self.peer, self.group, self.nbytes = probe, layer, op, peer, group, nbytes
        self._transfer: Transfer | None = None
        self._ending = threading.Lock()  # the callback (maybe on a backend thread) and wait() race to mark the end
        self._start = 0
        if probe.device_timing:
            self._transfer = probe.transfer(layer, op=op, nbytes=nbytes, peer=peer, group=group)
            self.work = call()
            self.work.get_future().then(self._done)
        else:
            self._start = probe.clock()
            self.work = call()

    def _done(self, fut: torch.futures.Future[Any]) -> None:
        self._finish_once()

    def _finish_once(self) -> None:
        with self._ending:
            if self._transfer is not None and self._transfer.end is None:
                self.probe.finish(self._transfer)

    def wait(self) -> None:
        if self._transfer is None:
            before = self.probe.clock()
            self.work.wait()
            end = self.probe.clock()
            self.probe.record_transfer(self.layer, op=self.op, nbytes=self.nbytes, peer=self.peer, group=self.group,
                                       start_ns=self._start, end_ns=end, exposed_ns=end - before)
            return
        since = self.probe.mark()
        self.work.wait()  # makes the current stream wait for the work; the host does not wait for the GPU
        self._finish_once()  # if the callback has not run yet: the stream now waits for the work, so mark here
        self.probe.wait_window(since, [self._transfer])


class TimedDist:
    """``torch.distributed`` calls, each recorded as one exchange of ``layer`` with its bytes.

    Bytes are this rank's tensor (for ``all_gather``, its own contribution). Ranks are global ranks, as
    ``torch.distributed`` takes them. Blocking calls are blocked time throughout; ``async_op=True`` returns
    a ``TimedWork`` whose ``wait()`` is the exposed part (only blocked time is exposed time)."""

    def __init__(self, probe: Probe, group: dist.ProcessGroup | None = None) -> None:
        self.probe = probe
        self.group = group
        self.group_size = dist.get_world_size(group)

    def _collective(self, layer: str, op: Op, tensor: torch.Tensor) -> AbstractContextManager[Any]:
        return self.probe.exchange(layer, op=op, group=self.group_size, nbytes=_nbytes(tensor))

    def all_reduce_async(self, tensor: torch.Tensor, *, layer: str,
                         op: dist.ReduceOp.RedOpType = dist.ReduceOp.SUM) -> TimedWork:
        return TimedWork(self.probe, layer, Op.ALLREDUCE, NO_PEER, self.group_size, _nbytes(tensor),
                         lambda: dist.all_reduce(tensor, op=op, group=self.group, async_op=True))

    def isend(self, tensor: torch.Tensor, dst: int, *, layer: str) -> TimedWork:
        return TimedWork(self.probe, layer, Op.SEND, dst, 0, _nbytes(tensor),
                         lambda: dist.isend(tensor, dst, group=self.group))

    def irecv(self, tensor: torch.Tensor, src: int, *, layer: str) -> TimedWork:
        return TimedWork(self.probe, layer, Op.RECV, src, 0, _nbytes(tensor),
                         lambda: dist.irecv(tensor, src, group=self.group))

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


__all__ = ["CudaMarkers", "ModuleWatch", "TimedDist", "TimedWork", "module_layers", "watch_module"]
