"""The head-node command as a user meets it: exit codes, one-line errors, report output."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from watchtower.cli import main
from watchtower.demo import DEMO_RECORDING

DEMO = DEMO_RECORDING


def run(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "watchtower.cli", *args], capture_output=True, text=True,
                          timeout=120, check=False)


@pytest.mark.parametrize("args", [
    ["nonsense"], ["collect"], ["collect", "--record", "x", "--listen", "tcp://127.0.0.1"],
    ["collect", "--record", "x", "--listen", "tcp://0.0.0.0:5555"], ["collect", "--record", "x", "--duration", "-1"],
    ["report"], ["report", "/nonexistent/run.wtrace"], ["report", "a", "b", "c"],
])
def test_usage_errors_are_one_line_and_status_2(args: list[str], tmp_path: Path) -> None:
    result = run(*[a.replace("x", str(tmp_path / "x.wtrace")) if a == "x" else a for a in args])
    assert result.returncode == 2
    assert "Traceback" not in result.stderr
    assert len(result.stderr.strip().splitlines()) == 1 and result.stderr.startswith("watchtower: error:")


def test_report_of_a_file_that_is_not_a_recording(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "notes.txt"
    path.write_text("hello")
    assert main(["report", str(path)]) == 2
    assert "not a Watchtower recording" in capsys.readouterr().err


def test_report_json_has_the_promised_keys(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["report", str(DEMO), "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["ranks"] == 24 and report["invented"] is True
    for key in ("steps", "layers", "links", "loss", "efficiency", "speedup", "alerts", "eta_s", "hours_at_stake"):
        assert key in report
    assert {"name", "compute_s", "exchange_s", "comm_fraction"} <= report["layers"][0].keys()
    assert {"src", "dst", "bytes", "bandwidth_Bps", "latency_s", "slow", "score"} <= report["links"][0].keys()
    assert {"frames", "missing", "bad"} <= report["loss"].keys()


def test_truncated_recording_reports_what_is_complete(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    import gzip

    raw = gzip.decompress(DEMO.read_bytes())
    cut = tmp_path / "cut.wtrace"
    cut.write_bytes(raw[: len(raw) // 3 + 7])
    assert main(["report", str(cut), "--json"]) == 0
    captured = capsys.readouterr()
    report = json.loads(captured.out)
    assert report["recording"]["complete"] is False and report["recording"]["torn_at"] > 0
    assert "stopped at byte" in captured.err and len(captured.err.strip().splitlines()) == 1
    assert 0 < report["steps"] < 420


def test_comparing_two_recordings(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    import gzip

    raw = gzip.decompress(DEMO.read_bytes())
    early = tmp_path / "early.wtrace"
    early.write_bytes(raw[: len(raw) // 2])  # the first half: before the demo's way out degrades
    assert main(["report", str(early), str(DEMO), "--json"]) == 0
    comparison = json.loads(capsys.readouterr().out)
    assert comparison["step_s"]["ratio"] > 1.0


def test_collect_restarted_on_its_recording_counts_the_whole_run(tmp_path: Path, endpoint: str) -> None:
    from agent import Probe
    from agent.clock import ManualClock
    from watchtower.recording import Recorder

    probe = Probe(0, 1, "n0", None, clock=ManualClock())
    for _ in range(5):
        probe.end_step()
    path = tmp_path / "run.wtrace"
    with Recorder(path) as recorder:  # the first life of the collector: everything but frame 3 arrived
        recorder.write_many([(i, frames) for i, frames in enumerate(probe.sent_frames) if i != 3])
    result = run("collect", "--listen", endpoint, "--record", str(path), "--duration", "0.2")
    assert result.returncode == 0, result.stderr
    assert f"{len(probe.sent_frames) - 1} frames, 0 bad, 1 missing" in result.stdout
    assert run("collect", "--listen", endpoint, "--record", str(DEMO), "--duration", "0.2").returncode == 2
