"""Deferred device timing against a simulated asynchronous device (tests/agent/simdevice.py).

The device runs queued kernels of known durations on a virtual clock in a worker thread. What the probe
publishes must be those device durations (not the microseconds the host spent launching), must appear
without the host ever waiting, and every step must be published exactly once and in order.
"""

from __future__ import annotations

import threading
from collections.abc import Callable, Iterator

import pytest
from simdevice import COMM, SimDevice

from agent import wire
from agent.device import split_exposed, union_ns
from agent.probe import MAX_PENDING_STEPS, Probe
from agent.wire import Op

LAYERS = ("embed", "block.0", "block.1", "head")
MS = 1_000_000


@pytest.fixture
def device() -> Iterator[SimDevice]:
    sim = SimDevice()
    yield sim
    sim.close()


def _probe(device: SimDevice, **kwargs: object) -> Probe:
    return Probe(0, 4, "node-a", None, layers=LAYERS, device=device, sender=7, **kwargs)


def _steps(probe: Probe) -> list[wire.Step]:
    return [m for m in map(wire.decode, probe.sent_frames) if isinstance(m, wire.Step)]


def _kernel_ns(step: int, layer: int) -> int:
    """Known per-layer kernel times that differ by step and layer (and are no round numbers)."""
    return (layer + 1) * MS + step * 1_337 + 17


def _returns_while_device_is_held(call: Callable[[], bool]) -> bool:
    """Run ``call`` on another thread and insist it returns within a deadline: a probe that waited for the
    held device would never return (the test fails instead of hanging)."""
    result: list[bool] = []
    thread = threading.Thread(target=lambda: result.append(call()), daemon=True)
    thread.start()
    thread.join(timeout=10.0)
    assert not thread.is_alive(), "end_step waited for the device"
    return result[0]


def _run_step(probe: Probe, device: SimDevice, step: int, *, gap_ns: int = 0) -> None:
    for i, name in enumerate(LAYERS):
        with probe.compute(name):
            device.launch(_kernel_ns(step, i))
        device.launch(gap_ns)  # untimed work between layers (an activation copy)


def test_layers_get_device_durations_published_later_and_never_while_the_device_lags(device: SimDevice) -> None:
    probe = _probe(device)
    device.pause()  # the device is busy: the host runs three steps ahead
    for step in range(3):
        _run_step(probe, device, step, gap_ns=500)
        assert _returns_while_device_is_held(probe.end_step)  # publishing nothing yet
    assert _steps(probe) == [] and probe.pending_steps == 3
    device.resume()
    device.idle()
    _run_step(probe, device, 3)
    probe.end_step()  # the device has passed steps 0-2 by now: all three go out, in order
    steps = _steps(probe)
    assert [s.step for s in steps] == [0, 1, 2]
    for s in steps:
        want = [_kernel_ns(s.step, i) for i in range(len(LAYERS))]
        assert s.layer_ns[0].tolist() == want  # exact device nanoseconds; the 1% target holds with room
        assert s.layer_ns[1].tolist() == [0] * len(LAYERS)
        assert s.duration_ns == sum(want) + 500 * len(LAYERS)  # the step on the device, gaps included
    assert probe.pending_steps == 1


def test_every_step_published_exactly_once_in_order_while_the_device_runs_concurrently(device: SimDevice) -> None:
    probe = _probe(device)
    for step in range(60):
        _run_step(probe, device, step)
        probe.end_step()
    device.idle()
    assert probe.drain(deadline_s=5.0) == 0
    steps = _steps(probe)
    assert [s.step for s in steps] == list(range(60))
    seqs = [s.header.seq for s in steps]
    assert seqs == sorted(set(seqs))
    for s in steps:
        assert s.layer_ns[0].tolist() == [_kernel_ns(s.step, i) for i in range(len(LAYERS))]


def test_a_device_that_never_catches_up_costs_bounded_memory_and_says_so(
        device: SimDevice, capsys: pytest.CaptureFixture[str]) -> None:
    probe = _probe(device)
    extra = 5
    device.pause()  # stuck: the host keeps ending steps the device never reaches
    for step in range(MAX_PENDING_STEPS + extra):
        _run_step(probe, device, step)
        assert _returns_while_device_is_held(probe.end_step)
    assert probe.pending_steps == MAX_PENDING_STEPS and probe.abandoned_steps == extra
    said = capsys.readouterr().err.splitlines()
    assert len(said) == 1 and "has not finished step 0" in said[0]  # once, naming the first step given up
    device.resume()
    device.idle()
    assert probe.drain(deadline_s=5.0) == 0
    steps = _steps(probe)  # the oldest steps are missing, the rest exact and in order
    assert [s.step for s in steps] == list(range(extra, MAX_PENDING_STEPS + extra))
    for s in steps:
        assert s.layer_ns[0].tolist() == [_kernel_ns(s.step, i) for i in range(len(LAYERS))]


def test_markers_are_reused_from_one_pool_not_allocated_per_region(device: SimDevice) -> None:
    probe = _probe(device)
    for step in range(4):
        _run_step(probe, device, step)
        probe.end_step()
        device.idle()
    created = probe._pool.created  # type: ignore[union-attr]
    for step in range(4, 40):
        _run_step(probe, device, step)
        probe.end_step()
        device.idle()
    assert probe._pool.created == created  # type: ignore[union-attr]
    assert created <= 2 * 2 * len(LAYERS) + 3  # two steps' regions in flight at most, plus step marks


def test_a_layer_added_while_steps_are_pending_pads_their_columns(device: SimDevice) -> None:
    probe = _probe(device)
    device.pause()
    _run_step(probe, device, 0)
    probe.end_step()
    with probe.compute("late"):  # a new layer: the schema grows before step 0 is published
        device.launch(3 * MS)
    device.resume()
    probe.end_step()
    device.idle()
    assert probe.drain(deadline_s=5.0) == 0
    schema = [m for m in map(wire.decode, probe.sent_frames) if isinstance(m, wire.Schema)][-1]
    steps = _steps(probe)
    assert [s.schema_id for s in steps] == [schema.schema_id] * 2  # a collector accepts both
    assert steps[0].layer_ns[0].tolist() == [_kernel_ns(0, i) for i in range(len(LAYERS))] + [0]
    assert steps[1].layer_ns[0].tolist() == [0] * len(LAYERS) + [3 * MS]


def _exchange_step(probe: Probe, device: SimDevice, compute_ns: list[int], transfer_ns: list[int],
                   ) -> list[tuple[int, int]]:
    """A backward pass in ``compute_ns`` layer kernels on the compute stream; after layer i's gradients
    are ready, bucket i's allreduce of ``transfer_ns[i]`` runs on the comm stream; then the compute stream
    waits for all of them and runs the optimizer. Returns the buckets' (start, end) on the device clock,
    computed by hand from the durations."""
    transfers = []
    clock = comm_free = 0
    expected = []
    for i, ns in enumerate(compute_ns):
        with probe.compute(LAYERS[i]):
            device.launch(ns)
        clock += ns
        ready = probe.mark()  # gradients of layer i are ready here
        with device.on(COMM):
            device.wait(ready)
            t = probe.transfer(f"bucket.{i}", op=Op.ALLREDUCE, nbytes=1 << 20, group=4)
            device.launch(transfer_ns[i])
            probe.finish(t)
        transfers.append(t)
        start = max(clock, comm_free)
        comm_free = start + transfer_ns[i]
        expected.append((start, comm_free))
    since = probe.last_mark  # the end of the backward compute
    for t in transfers:
        device.wait(t.end)  # the compute stream waits for the allreduces (as DDP's finalize does)
    probe.wait_window(since, transfers)
    with probe.compute(LAYERS[-1]):
        device.launch(MS)  # the optimizer step
    return expected


@pytest.mark.parametrize(("compute_ns", "transfer_ns"), [
    ([20 * MS, 20 * MS, 20 * MS], [5 * MS, 5 * MS, 5 * MS]),  # all hidden but the last bucket's 5 ms
    ([10 * MS, 10 * MS, 10 * MS], [30 * MS, 2 * MS, 40 * MS]),  # transfers queue up behind each other
    ([30 * MS, 1 * MS, 1 * MS], [1 * MS, 1 * MS, 0]),  # the last bucket is empty
])
def test_exposed_exchange_is_the_compute_streams_wait(device: SimDevice, compute_ns: list[int],
                                                       transfer_ns: list[int]) -> None:
    probe = _probe(device)
    expected = _exchange_step(probe, device, compute_ns, transfer_ns)
    device.idle()
    probe.end_step()
    device.idle()
    assert probe.drain(deadline_s=5.0) == 0
    step = _steps(probe)[0]
    backward_end = sum(compute_ns)
    wait = max(0, expected[-1][1] - backward_end)  # by hand: the compute stream idles until the last one ends
    buckets = [probe.layers.index(f"bucket.{i}") for i in range(len(compute_ns))]
    exposed = step.layer_ns[1][buckets]
    assert int(exposed.sum()) == pytest.approx(wait, rel=0.01)  # the 1% target; here it is exact
    assert int(exposed.sum()) == wait
    # each bucket carries the wait up to its own end not carried by an earlier one
    assert exposed.tolist() == split_exposed(backward_end, backward_end + wait, expected)
    # the records keep each whole transfer on the device clock, for the link models
    table = step.exchanges
    assert list(zip(table[wire.X_START].tolist(), table[wire.X_END].tolist(), strict=True)) == expected
    assert step.duration_ns == backward_end + wait + MS


def test_a_fully_overlapped_transfer_costs_nothing(device: SimDevice) -> None:
    probe = _probe(device)
    _exchange_step(probe, device, [10 * MS, 10 * MS, 10 * MS], [1 * MS, 1 * MS, 0])
    device.idle()
    probe.end_step()
    device.idle()
    probe.drain(deadline_s=5.0)
    step = _steps(probe)[0]
    assert step.layer_ns[1].tolist() == [0] * len(probe.layers)  # never comm-bound
    assert step.exchanges.shape[1] == 3  # yet every transfer is recorded


def test_blocking_exchange_on_the_compute_stream_counts_its_union(device: SimDevice) -> None:
    probe = _probe(device)
    a = probe.exchange("embed", peer=1, nbytes=64, op=Op.SEND)
    device.launch(4 * MS)
    b = probe.exchange("embed", peer=2, nbytes=64, op=Op.RECV)  # overlaps a: counted once
    device.launch(2 * MS)
    a.stop()
    device.launch(1 * MS)
    b.stop()
    probe.end_step()
    device.idle()
    probe.drain(deadline_s=5.0)
    step = _steps(probe)[0]
    assert step.layer_ns[1][0] == 7 * MS
    assert step.exchanges[wire.X_WAIT].tolist() == [wire.UNKNOWN_WAIT] * 2


def test_host_clock_probe_refuses_device_calls() -> None:
    probe = Probe(0, 2, "node-a", None)
    with pytest.raises(RuntimeError, match="device"):
        probe.mark()
    assert probe.pending_steps == 0


def test_split_exposed_matches_a_worked_example() -> None:
    # by hand: wait from 100 to 160; A ends at 90 (hidden), B runs 80-130, C runs 120-170 (capped at 160)
    assert split_exposed(100, 160, [(50, 90), (80, 130), (120, 170)]) == [0, 30, 30]
    assert union_ns([(0, 4), (3, 6), (10, 11)]) == 7


def test_figures_do_not_depend_on_when_the_device_ran() -> None:
    """The same work, once with the device held until the end and once running alongside: the published
    figures are identical, only the moment of publication differs."""
    tables = []
    for hold in (True, False):
        device = SimDevice()
        probe = _probe(device)
        if hold:
            device.pause()
        for step in range(4):
            _exchange_step(probe, device, [3 * MS + step, 2 * MS, 4 * MS], [5 * MS, 1 * MS, 7 * MS])
            probe.end_step()
        device.resume()
        device.idle()
        assert probe.drain(deadline_s=5.0) == 0
        tables.append([(s.step, s.duration_ns, s.layer_ns.tolist(), s.exchanges.tolist()) for s in _steps(probe)])
        device.close()
    assert tables[0] == tables[1]
    assert [row[0] for row in tables[0]] == [0, 1, 2, 3]
