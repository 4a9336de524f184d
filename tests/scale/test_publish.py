"""``collect`` builds snapshots and publishes them; an attached console only draws them.

Each test runs real ``watchtower collect`` processes (in the test's own run folder), feeds them frames over
TCP (the bundled demo recording replayed, or a seeded synthetic job) and subscribes as a console does. The
published figures are checked against ``report --json`` of what collect recorded (a separate process reading
the file through the one-process path), and a stuck subscriber against a control collector without one.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import zmq

from agent import wire
from agent.records import is_note
from tests.conftest import free_tcp_port
from watchtower import cli
from watchtower.attach import RunningCollector, find_collectors
from watchtower.console import ConsoleApp
from watchtower.console.header import JobHeader
from watchtower.demo import DEMO_RECORDING
from watchtower.recording import RecordingReader
from watchtower.subscribe import SubscribedFeed, decode, subscribe

REPO = Path(__file__).parents[2]
DEADLINE_S = 60.0  # bounds a broken test only (two collectors and a console on a loaded 2-core machine)
# What a published snapshot and `report --json --window 120` of collect's own recording must both say: every
# figure of the analysis and of the store. Not compared: `source`, `security`, `recorder`, `liveness`,
# `nodes[]` ages, `steps_per_s` (the live collector measures ages on the wall clock, `report` on the file's).
FIGURES = ("job", "ranks", "world", "steps", "last_step", "window", "layers", "links", "local_links", "ports",
           "stragglers", "efficiency", "speedup", "alerts", "recoveries", "changes", "standing", "model", "whatif",
           "hours_at_stake", "recent_step_s", "remaining_steps", "eta_s", "run_totals", "loss", "alert_design")


def wait_for(condition: Callable[[], object], what: str, timeout_s: float = DEADLINE_S) -> None:
    deadline = time.monotonic() + timeout_s
    while not condition():
        assert time.monotonic() < deadline, f"timed out waiting for {what}"
        time.sleep(0.02)


def start_collect(record: Path, listen: str, *extra: str) -> tuple[subprocess.Popen, RunningCollector]:
    """A ``watchtower collect`` process; returns once its beacon names where it publishes."""
    proc = subprocess.Popen([sys.executable, "-m", "watchtower.cli", "collect", "--listen", listen, "--record",
                             str(record), *extra], cwd=REPO, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    found: list[RunningCollector] = []

    def announced() -> bool:
        assert proc.poll() is None, proc.communicate()[1].decode()
        found[:] = [c for c in find_collectors() if c.pid == proc.pid]
        return bool(found) and found[0].snapshots is not None

    wait_for(announced, "collect to announce itself")
    return proc, found[0]


def stop(proc: subprocess.Popen) -> None:
    if proc.poll() is None:
        proc.send_signal(signal.SIGTERM)
    proc.communicate(timeout=DEADLINE_S)


@pytest.fixture
def procs() -> Iterator[list[subprocess.Popen]]:
    started: list[subprocess.Popen] = []
    yield started
    for proc in started:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()


def demo_frames() -> list[list[bytes]]:
    """Every message of the bundled recording, in order (its clock ticks and notes are not messages)."""
    with RecordingReader(DEMO_RECORDING) as reader:
        return [frames for _, frames in reader if frames and not is_note(frames)]


def send(context: zmq.Context, listen: str, messages: list[list[bytes]]) -> None:
    sock = context.socket(zmq.DEALER)
    sock.setsockopt(zmq.SNDHWM, 0)
    sock.connect(listen)
    for frames in messages:
        sock.send_multipart([b"", *frames])
    sock.close(linger=-1)


def newest(sock: zmq.Socket, until: Callable[[dict[str, Any]], bool], what: str) -> dict[str, Any]:
    """Published snapshots, read until one satisfies ``until``."""
    deadline = time.monotonic() + DEADLINE_S
    while True:
        assert time.monotonic() < deadline, f"no published snapshot {what}"
        if sock.poll(200):
            snapshot = decode(sock.recv())
            assert snapshot is not None
            if until(snapshot):
                return snapshot


def test_published_figures_equal_report_json_of_the_same_recording(tmp_path: Path, zmq_context: zmq.Context,
                                                                    procs: list[subprocess.Popen],
                                                                    capsys: pytest.CaptureFixture[str]) -> None:
    record, listen = tmp_path / "run.wtrace", f"tcp://127.0.0.1:{free_tcp_port()}"
    proc, found = start_collect(record, listen)
    procs.append(proc)
    sub = subscribe(zmq_context, found.snapshots)  # type: ignore[arg-type]
    messages = demo_frames()
    send(zmq_context, listen, messages)
    published = newest(sub, lambda s: s["loss"]["frames"] == len(messages), "with every frame sent")
    stop(proc)
    capsys.readouterr()
    assert cli.main(["report", str(record), "--json", "--window", "120"]) == 0
    reported = json.loads(capsys.readouterr().out)
    assert reported["recording"]["records"] >= len(messages)
    for key in FIGURES:
        assert published[key] == reported[key], key
    # not vacuous: the demo's figures are there (its story has slow links and an alert)
    assert published["loss"]["missing"] == 0 and published["window"]["steps"] == 120
    assert any(link["slow"] for link in published["links"]) and published["alerts"]
    assert published["source"] == {"kind": "live", "where": listen}


def synthetic_job(ranks: int, layers: int, steps: int, seed: int) -> tuple[list[list[bytes]], list[list[list[bytes]]]]:
    """A seeded job: each rank's schema, then per step every rank's step frame with two halo receives."""
    rng = np.random.default_rng(seed)
    names = [f"layer.{i:02d}" for i in range(layers)]
    schemas = [wire.encode_schema(rank + 1, 0, time.time_ns(), schema_id=1, rank=rank, world=ranks,
                                  node=f"n{rank // 8:02d}", layers=names) for rank in range(ranks)]
    layer_ns = rng.integers(100_000, 2_000_000, (ranks, 2, layers))
    table = np.zeros((len(wire.EXCHANGE_COLUMNS), 2), np.int64)
    table[wire.X_LAYER] = [layers // 3, 2 * layers // 3]
    table[wire.X_OP] = wire.Op.RECV
    table[wire.X_NBYTES] = 1 << 20
    table[wire.X_START] = [1_000_000, 5_000_000]
    table[wire.X_END] = [3_000_000, 6_500_000]
    table[wire.X_WAIT] = wire.UNKNOWN_WAIT
    by_step = []
    for step in range(steps):
        frames = []
        for rank in range(ranks):
            table[wire.X_PEER] = [(rank - 8) % ranks, (rank + 8) % ranks]
            frames.append(wire.encode_step(rank + 1, step + 1, time.time_ns(), step=step, duration_ns=900_000_000,
                                           dropped_total=0, schema_id=1, layer_ns=layer_ns[rank], exchanges=table))
        by_step.append(frames)
    return schemas, by_step


STUCK_SUBSCRIBER = """
import json, sys, zmq
sock = zmq.Context().socket(zmq.SUB)  # no CONFLATE and the default queue: the worst a client can do
sock.setsockopt(zmq.SUBSCRIBE, b"")
sock.connect(sys.argv[1])
sock.recv()
print("ready", flush=True)
final = int(sys.stdin.readline())  # stopped here (SIGSTOP); then continued and told the newest step
stale = 0
while json.loads(sock.recv())["last_step"] < final:
    stale += 1
print(stale, flush=True)
"""
STALE_AT_MOST = 5  # what a conflated pipe and the kernel's socket buffers can hold of ~100 KB snapshots


def test_a_stuck_subscriber_neither_slows_collect_nor_makes_it_queue(tmp_path: Path, zmq_context: zmq.Context,
                                                                     procs: list[subprocess.Popen]) -> None:
    """A subscriber process stopped (SIGSTOP) after its first snapshot, and one that never reads: collect
    ingests every frame of a seeded job and keeps publishing to a healthy subscriber meanwhile. When the
    stopped one continues, what it reads before the newest snapshot is all collect held for it: a handful
    (the conflated pipe and the socket buffers), not the dozens published while it was stopped, so collect's
    memory stays bounded however long a console stays stuck."""
    listen = f"tcp://127.0.0.1:{free_tcp_port()}"
    proc, found = start_collect(tmp_path / "run.wtrace", listen)
    procs.append(proc)
    stuck = subprocess.Popen([sys.executable, "-c", STUCK_SUBSCRIBER, str(found.snapshots)],
                             stdin=subprocess.PIPE, stdout=subprocess.PIPE)
    procs.append(stuck)
    never_reads = subscribe(zmq_context, found.snapshots)  # type: ignore[arg-type]
    healthy = subscribe(zmq_context, found.snapshots)  # type: ignore[arg-type]
    schemas, by_step = synthetic_job(ranks=256, layers=24, steps=48, seed=16)
    send(zmq_context, listen, schemas)
    assert stuck.stdin is not None and stuck.stdout is not None
    assert stuck.stdout.readline().strip() == b"ready"
    os.kill(stuck.pid, signal.SIGSTOP)
    try:
        for step, frames in enumerate(by_step):  # each step in a snapshot of its own: 48 published while stuck
            send(zmq_context, listen, frames)
            newest(healthy, lambda s, step=step: s["last_step"] >= step, f"of step {step}")
        expected = len(schemas) + sum(len(frames) for frames in by_step)
        final = newest(healthy, lambda s: s["loss"]["frames"] == expected, "with every frame")
    finally:
        os.kill(stuck.pid, signal.SIGCONT)
    assert final["loss"]["missing"] == 0 and final["steps"] == len(by_step)
    stuck.stdin.write(f"{len(by_step) - 1}\n".encode())
    stuck.stdin.flush()
    stale = int(stuck.stdout.readline())
    assert stale <= STALE_AT_MOST < len(by_step) // 4, stale
    never_reads.close()


async def test_console_draws_published_figures_and_survives_collect_stopping_and_restarting(
        tmp_path: Path, zmq_context: zmq.Context, procs: list[subprocess.Popen]) -> None:
    record, listen = tmp_path / "run.wtrace", f"tcp://127.0.0.1:{free_tcp_port()}"
    proc, found = start_collect(record, listen)
    procs.append(proc)
    messages = demo_frames()
    send(zmq_context, listen, messages)
    feed = cli._subscribed(found)
    assert isinstance(feed, SubscribedFeed)
    feed.stopped_after_s = 1.0
    app = ConsoleApp(feed)
    async with app.run_test(size=(160, 40)) as pilot:
        async def until(condition: Callable[[], bool], what: str) -> None:
            deadline = time.monotonic() + DEADLINE_S
            while not condition():
                assert time.monotonic() < deadline, f"the console did not show {what}"
                await pilot.pause(0.05)

        def header() -> str:
            return app.query_one(JobHeader).render().plain

        await until(lambda: app.snapshot is not None and app.snapshot["loss"]["frames"] == len(messages),
                    "every frame sent")
        shown = app.snapshot
        assert shown is not None and shown["source"] == {"kind": "attached", "where": str(record.resolve())}
        assert shown["job"] and shown["job"] in header() and f"step {shown['last_step']}" in header()
        proc.send_signal(signal.SIGTERM)
        proc.communicate(timeout=DEADLINE_S)
        await until(lambda: "stopped answering" in header(), "that collect stopped")
        line = next(text for text in header().splitlines() if "stopped answering" in text)
        assert f"pid {found.pid}" in line
        assert app.snapshot is not None and all(app.snapshot[k] == shown[k] for k in FIGURES)  # the last figures
        again, _ = start_collect(record, listen)
        procs.append(again)
        await until(lambda: feed.publisher.pid == again.pid and "stopped answering" not in header(),
                    "the restarted collect's snapshots")
        assert app.snapshot is not None and app.snapshot["loss"]["frames"] == len(messages)  # resumed from the file
        assert all(app.snapshot[k] == shown[k] for k in ("layers", "links", "ports", "efficiency"))
    stop(again)


def test_an_attached_console_takes_no_analysis_options(tmp_path: Path, procs: list[subprocess.Popen],
                                                       capsys: pytest.CaptureFixture[str]) -> None:
    proc, _ = start_collect(tmp_path / "run.wtrace", f"tcp://127.0.0.1:{free_tcp_port()}")
    procs.append(proc)
    assert cli.main(["watch", "--window", "10"]) == 2
    err = capsys.readouterr().err
    assert "give --cluster, --window and the alert options to collect" in err and len(err.splitlines()) == 1
