"""Real multi-process PyTorch training on CPU (gloo), watched through ``watch_module`` and ``TimedDist``:
ranks publish to ``watchtower collect``, then ``report --json`` and the recording are checked."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from collections import defaultdict
from pathlib import Path
from typing import Any

import pytest

pytest.importorskip("torch", reason="PyTorch is not installed (pip install torch==2.13.0, or the [torch] extra)")

from agent import wire
from agent.records import is_note
from tests.conftest import free_tcp_port
from watchtower.recording import RecordingReader

JOB = Path(__file__).with_name("torch_job.py")
STEPS = 4
BATCH, IN, HIDDEN, OUT = 8, 32, 64, 4  # as in torch_job.py
NET_PARAMS = (IN * HIDDEN + HIDDEN) + (HIDDEN * HIDDEN + HIDDEN) + (HIDDEN * OUT + OUT)  # 6532, counted by hand


def read_recording(path: Path) -> tuple[dict[int, tuple[str, ...]], dict[int, list[tuple[str, int, int, int, int]]]]:
    """Per rank: its layer names, and its exchange records (layer, op, peer, group, nbytes)."""
    schemas: dict[int, wire.Schema] = {}
    records: dict[int, list[tuple[str, int, int, int, int]]] = defaultdict(list)
    with RecordingReader(path) as reader:
        for _, frames in reader:
            if not frames or is_note(frames):  # the collector's clock ticks and notes are not agents' frames
                continue
            message = wire.decode(frames)
            if isinstance(message, wire.Schema):
                schemas[message.header.sender] = message
            elif isinstance(message, wire.Step):
                schema = schemas[message.header.sender]
                for layer, op, peer, group, nbytes, *_ in message.exchanges.T.tolist():
                    records[schema.rank].append((schema.layers[layer], op, peer, group, nbytes))
    return {s.rank: s.layers for s in schemas.values()}, dict(records)


def steps_recorded(path: Path) -> int:
    if not path.exists() or path.stat().st_size == 0:
        return 0
    with RecordingReader(path) as reader:
        return sum(1 for _, frames in reader if frames and wire.peek_kind(frames[0]) == wire.Kind.STEP)


def run_job(tmp_path: Path, mode: str, world: int) -> tuple[dict[str, Any], Path, list[dict[str, int]]]:
    """Run ``world`` ranks of ``mode`` against a collector; the report, the recording and each rank's summary."""
    recording = tmp_path / "run.wtrace"
    listen = f"tcp://127.0.0.1:{free_tcp_port()}"
    env = {**os.environ, "WATCHTOWER_RUN_DIR": str(tmp_path / "run")}
    collect = subprocess.Popen([sys.executable, "-m", "watchtower.cli", "collect", "--listen", listen,
                                "--record", str(recording)], env=env, stdout=subprocess.PIPE, text=True)
    port = free_tcp_port()
    ranks = [subprocess.Popen([sys.executable, str(JOB), mode, "--rank", str(r), "--world", str(world),
                               "--port", str(port), "--collector", listen, "--steps", str(STEPS)],
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
             for r in range(world)]
    try:
        summaries = []
        for rank in ranks:
            out, err = rank.communicate(timeout=120)
            assert rank.returncode == 0, err
            summaries.append(json.loads(out.splitlines()[-1]))
        deadline = time.monotonic() + 30
        while steps_recorded(recording) < world * STEPS:  # every rank's every step reached the recording
            assert time.monotonic() < deadline, "steps missing from the recording"
            time.sleep(0.05)
    finally:
        for rank in ranks:
            if rank.poll() is None:
                rank.kill()
                rank.wait()
        collect.send_signal(signal.SIGINT)
        collect.communicate(timeout=30)
    assert collect.returncode == 0
    report = subprocess.run([sys.executable, "-m", "watchtower.cli", "report", str(recording), "--json"],
                            capture_output=True, text=True, timeout=120, check=True)
    return json.loads(report.stdout), recording, summaries


def test_ddp_training_reports_every_module_and_the_gradient_bytes(tmp_path: Path) -> None:
    world = 2
    data, recording, summaries = run_job(tmp_path, "ddp", world)
    assert all(s == {"params": NET_PARAMS, "dropped": 0, "steps": STEPS} for s in summaries)
    assert data["ranks"] == world and data["steps"] == STEPS
    assert data["loss"]["missing"] == 0 and data["loss"]["bad"] == 0
    layers = {layer["name"]: layer for layer in data["layers"]}
    modules = ["encoder.0", "encoder.1", "encoder.2", "head", "optimizer"]
    assert all(layers[name]["compute_s"] > 0 for name in modules)
    buckets = [name for name in layers if name.startswith("ddp.bucket.")]
    assert len(buckets) >= 2 and all(layers[name]["exchange_s"] > 0 for name in buckets)

    names, records = read_recording(recording)
    for rank in range(world):
        assert names[rank][:len(modules)] == tuple(modules)  # announced in model order before the first step
        allreduces = [r for r in records[rank] if r[1] == wire.Op.ALLREDUCE]
        assert {(peer, group) for _, _, peer, group, _ in allreduces} == {(wire.NO_PEER, world)}
        # DDP's flat CPU buckets hold each gradient once, unpadded: the bytes are exactly the parameters'.
        assert sum(r[4] for r in allreduces) == NET_PARAMS * 4 * STEPS == 104_512


def test_pipeline_split_over_two_ranks_shows_per_layer_exchanges(tmp_path: Path) -> None:
    data, recording, summaries = run_job(tmp_path, "pipe", 2)
    stage0 = IN * HIDDEN + HIDDEN
    stage1 = HIDDEN * HIDDEN + HIDDEN + HIDDEN * OUT + OUT
    assert all(s == {"params": stage0 + stage1, "dropped": 0, "steps": STEPS} for s in summaries)  # all_gather
    layers = {layer["name"]: layer for layer in data["layers"]}
    for name in ["stage0.0", "stage0.1", "stage1.0", "stage1.1", "stage1.2", "optimizer"]:
        assert layers[name]["compute_s"] > 0
    for name in ["pipe.activations", "pipe.gradients", "targets", "metrics", "setup"]:
        assert layers[name]["exchange_s"] > 0
    links = {(link["src"], link["dst"]): link["bytes"] for link in data["links"]}
    assert links == {("host0", "host1"): STEPS * BATCH * HIDDEN * 4, ("host1", "host0"): STEPS * BATCH * HIDDEN * 4}

    _, records = read_recording(recording)
    per_step = BATCH * HIDDEN * 4
    assert [r for r in records[0] if r[0].startswith("pipe.")] == [
        ("pipe.activations", wire.Op.SEND, 1, 0, per_step), ("pipe.gradients", wire.Op.RECV, 1, 0, per_step)] * STEPS
    assert [r for r in records[1] if r[0].startswith("pipe.")] == [
        ("pipe.activations", wire.Op.RECV, 0, 0, per_step), ("pipe.gradients", wire.Op.SEND, 0, 0, per_step)] * STEPS
    for rank in (0, 1):
        collectives = {(layer, op, peer, group, nbytes) for layer, op, peer, group, nbytes in records[rank]
                       if op in wire.COLLECTIVE_OPS}
        assert collectives == {("setup", wire.Op.ALLGATHER, -1, 2, 8), ("metrics", wire.Op.ALLREDUCE, -1, 2, 4),
                               ("targets", wire.Op.BROADCAST, -1, 2, BATCH * OUT * 4)}
