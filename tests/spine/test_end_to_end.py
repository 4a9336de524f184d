"""The whole spine as a user runs it: three workload ranks on loopback, `collect`, then `report --json`."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

from agent import wire
from tests.conftest import free_tcp_port
from watchtower.recording import RecordingReader

RANKS = 3
STEPS = 12
LAYERS = 4


def steps_recorded(path: Path) -> int:
    if not path.exists() or path.stat().st_size == 0:
        return 0
    with RecordingReader(path) as reader:
        return sum(1 for _, frames in reader if frames and wire.peek_kind(frames[0]) == wire.Kind.STEP)


def test_workload_collect_report(tmp_path: Path) -> None:
    recording = tmp_path / "run.wtrace"
    listen = f"tcp://127.0.0.1:{free_tcp_port()}"
    env = {**os.environ, "WATCHTOWER_RUN_DIR": str(tmp_path / "run")}
    collect = subprocess.Popen([sys.executable, "-m", "watchtower.cli", "collect", "--listen", listen,
                                "--record", str(recording)], env=env, stdout=subprocess.PIPE, text=True)
    peers = ",".join(f"127.0.0.1:{free_tcp_port()}" for _ in range(RANKS))
    ranks = [subprocess.Popen([sys.executable, "-m", "agent.cli", "workload", "--rank", str(r), "--peers", peers,
                               "--collector", listen, "--node", f"host{r}", "--steps", str(STEPS),
                               "--layers", str(LAYERS), "--exchange-bytes", "32768", "--compute-ms", "1",
                               "--seed", "3"], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
             for r in range(RANKS)]
    try:
        for rank in ranks:
            out, err = rank.communicate(timeout=120)
            assert rank.returncode == 0, err
            assert "0 monitoring frames dropped" in out
        deadline = time.monotonic() + 30
        while steps_recorded(recording) < RANKS * STEPS:  # every rank's every step reached the recording
            assert time.monotonic() < deadline
            time.sleep(0.05)
    finally:
        collect.send_signal(signal.SIGINT)
        summary, _ = collect.communicate(timeout=30)
    assert collect.returncode == 0
    assert f"{RANKS} ranks" in summary and "0 bad, 0 missing" in summary

    report = subprocess.run([sys.executable, "-m", "watchtower.cli", "report", str(recording), "--json"],
                            capture_output=True, text=True, timeout=120, check=True)
    data = json.loads(report.stdout)
    assert data["ranks"] == RANKS and data["steps"] == STEPS
    assert [layer["name"] for layer in data["layers"]] == [f"layer.{i:02d}" for i in range(LAYERS)]
    assert all(layer["compute_s"] > 0 and layer["exchange_s"] > 0 for layer in data["layers"])
    pairs = {(link["src"], link["dst"]) for link in data["links"]}
    assert pairs == {(f"host{a}", f"host{b}") for a in range(RANKS) for b in range(RANKS) if a != b}
    assert all(link["bytes"] > 0 and link["bandwidth_Bps"] for link in data["links"])
    assert data["loss"]["missing"] == 0 and data["loss"]["bad"] == 0
