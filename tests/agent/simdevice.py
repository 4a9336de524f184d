"""A simulated asynchronous device for testing deferred device timing without a GPU.

The host enqueues work on named streams and returns at once; a worker thread executes it later on a
*virtual* clock per stream: a kernel advances its stream's clock by its known duration, a marker completes
with its stream's clock when the worker passes it, and a wait holds a stream until another stream's marker
has completed (then its clock jumps to that marker's time, as a CUDA stream waiting on an event would).
Every time is a function of what was enqueued, never of thread scheduling, so tests are deterministic;
only *when* the host sees a marker complete depends on scheduling, which is exactly what the probe must
cope with. ``pause()`` holds the worker so a test can see the host run ahead.

It serves as a ``agent.device.Markers`` backend itself and as the engine of a fake ``torch.cuda``.
"""

from __future__ import annotations

import threading
import time
from collections import deque
from collections.abc import Iterator
from contextlib import contextmanager

COMPUTE, COMM = "compute", "comm"


class SimMarker:
    __slots__ = ("done", "generation", "time_ns")

    def __init__(self) -> None:
        self.done = False
        self.generation = 0
        self.time_ns = 0


class SimDevice:
    """Streams of queued ("kernel", ns) / ("record", marker, generation) / ("wait", marker) run by a worker."""

    def __init__(self, streams: tuple[str, ...] = (COMPUTE, COMM)) -> None:
        self.current = streams[0]
        self.clock = dict.fromkeys(streams, 0)  # virtual nanoseconds per stream
        self._queues: dict[str, deque[tuple]] = {name: deque() for name in streams}
        self._run = threading.Lock()  # held by the worker while it executes an op; pause() takes it
        self._paused = False
        self._running = threading.Event()  # cleared while paused: the worker sleeps on it
        self._running.set()
        self._stop = False
        self._idle = False  # the worker found nothing to run and sleeps until woken
        self._wake = threading.Event()
        self._worker = threading.Thread(target=self._loop, name="sim-device", daemon=True)
        self._worker.start()

    # ---------------------------------------------------------------- host side (the training loop)
    def launch(self, duration_ns: int, stream: str | None = None) -> None:
        self._enqueue(stream, ("kernel", duration_ns))

    def wait(self, marker: SimMarker, stream: str | None = None) -> None:
        """``stream`` waits until ``marker`` has completed (a cross-stream dependency)."""
        self._enqueue(stream, ("wait", marker))

    @contextmanager
    def on(self, stream: str) -> Iterator[None]:
        """Make ``stream`` the current stream, as ``torch.cuda.stream(s)`` does."""
        previous, self.current = self.current, stream
        try:
            yield
        finally:
            self.current = previous

    def _enqueue(self, stream: str | None, op: tuple) -> None:
        self._queues[stream or self.current].append(op)  # deque.append is atomic: no host lock
        if self._idle and not self._paused:  # wake only a sleeping worker that may run: waking costs the host
            self._wake.set()

    # ---------------------------------------------------------------- the Markers protocol
    def create(self) -> SimMarker:
        return SimMarker()

    def record(self, marker: SimMarker, stream: str | None = None) -> None:
        marker.done = False
        marker.generation += 1
        self._queues[stream or self.current].append(("record", marker, marker.generation))  # as _enqueue, inline
        if self._idle and not self._paused:
            self._wake.set()

    def query(self, marker: SimMarker) -> bool:
        return marker.done

    def elapsed_ns(self, start: SimMarker, end: SimMarker) -> int:
        if not (start.done and end.done):
            raise RuntimeError("elapsed time read from a marker the device has not reached")
        return end.time_ns - start.time_ns

    # ---------------------------------------------------------------- test control
    def pause(self) -> None:
        with self._run:
            self._paused = True
            self._running.clear()

    def resume(self) -> None:
        with self._run:
            self._paused = False
            self._running.set()
        self._wake.set()

    def idle(self, deadline_s: float = 10.0) -> None:
        """Poll until every stream has run dry (a test helper; the probe never does this)."""
        end = time.monotonic() + deadline_s
        while any(self._queues.values()):
            if time.monotonic() > end:
                raise TimeoutError("simulated device did not finish its queued work")
            time.sleep(0.001)
        with self._run:  # the last op popped has finished executing
            pass

    def close(self) -> None:
        self._stop = True
        self._running.set()
        self._wake.set()
        self._worker.join(timeout=5)

    # ---------------------------------------------------------------- the device
    def _loop(self) -> None:
        while not self._stop:
            self._running.wait()
            with self._run:
                ran = not self._paused and self._step()
            if ran:
                continue
            self._wake.clear()
            self._idle = True
            with self._run:  # again after saying idle: work enqueued before that would wake no one
                ran = not self._paused and self._step()
            if not ran:
                self._wake.wait(0.05)  # nothing can run until the host enqueues (which wakes us)
            self._idle = False

    def _step(self) -> bool:
        """Execute the first runnable op, streams in a fixed order; False if none can run."""
        for name, queue in self._queues.items():
            if not queue:
                continue
            op = queue[0]
            if op[0] == "wait" and not op[1].done:
                continue  # blocked on another stream
            queue.popleft()
            if op[0] == "kernel":
                self.clock[name] += op[1]
            elif op[0] == "wait":
                self.clock[name] = max(self.clock[name], op[1].time_ns)
            elif op[2] == op[1].generation:  # a record the host has not since replaced
                op[1].time_ns = self.clock[name]
                op[1].done = True
            return True
        return False


class FakeCuda:
    """Just enough of ``torch.cuda`` for the CUDA marker backend, run on a ``SimDevice``. Any synchronise
    raises, so a test fails if the backend ever calls one."""

    def __init__(self, device: SimDevice) -> None:
        self.device = device
        fake = self

        class Event:
            def __init__(self, enable_timing: bool = False) -> None:
                if not enable_timing:
                    raise AssertionError("markers must be created with enable_timing=True")
                self.marker = SimMarker()
                fake.events_created += 1

            def record(self, stream: str | None = None) -> None:
                device.record(self.marker, stream)

            def query(self) -> bool:
                return device.query(self.marker)

            def elapsed_time(self, end: Event) -> float:
                return device.elapsed_ns(self.marker, end.marker) / 1e6  # milliseconds, as CUDA gives them

            def synchronize(self) -> None:
                raise AssertionError("Event.synchronize() called on the training path")

        self.Event = Event
        self.events_created = 0

    def synchronize(self, device: object = None) -> None:
        raise AssertionError("torch.cuda.synchronize() called on the training path")
