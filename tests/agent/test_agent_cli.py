"""``watchtower-agent`` usage and start-up errors: one line on stderr, status 2, never a traceback."""

from __future__ import annotations

import socket
import subprocess
import sys
from pathlib import Path

import pytest

from agent.cli import main

GOOD = ["--collector", "tcp://127.0.0.1:5555"]
JOB = ["workload", "--rank", "0", "--peers", "127.0.0.1:7001,127.0.0.1:7002", *GOOD]


def _one_error_line(stderr: str) -> str:
    lines = stderr.splitlines()
    assert len(lines) == 1, stderr
    assert lines[0].startswith("watchtower-agent: error: ")
    assert "Traceback" not in stderr
    return lines[0]


@pytest.mark.parametrize(("argv", "reason"), [
    (["bogus"], "invalid choice"),
    (["run", *GOOD, "--bogus"], "unrecognized arguments"),
    (["run"], "--collector"),
    (["run", "--collector", "tcp://127.0.0.1"], "not HOST:PORT"),
    (["run", "--collector", "tcp://:5555"], "not HOST:PORT"),
    (["run", "--collector", "tcp://head:70000"], "bad port"),
    (["run", "--collector", "tcp://bad host:1"], "bad host"),
    (["run", "--collector", "tcp://[::zz]:1"], "IPv6"),
    (["run", "--collector", "udp://head:1"], "tcp://HOST:PORT or ipc://PATH"),
    (["run", "--collector", "127.0.0.1:5555"], "tcp://HOST:PORT or ipc://PATH"),
    (["run", "--collector", "ipc://"], "ipc path"),
    (["run", *GOOD, "--local", "ipc://" + "x" * 200], "ipc path"),
    (["run", *GOOD, "--interval", "0"], "must be > 0"),
    (["run", *GOOD, "--interval", "nan"], "must be > 0"),
    (["workload", "--rank", "2", "--peers", "127.0.0.1:7001,127.0.0.1:7002", *GOOD], "outside the 2 ranks"),
    (["workload", "--rank", "-1", "--peers", "127.0.0.1:7001", *GOOD], "must be >= 0"),
    (["workload", "--rank", "0", "--peers", "127.0.0.1", *GOOD], "not HOST:PORT"),
    (["workload", "--rank", "0", "--peers", "h:1,h:1", *GOOD], "listed twice"),
    (["workload", "--rank", "0", "--peers", "h:x", *GOOD], "bad port"),
    ([*JOB, "--steps", "-3"], "must be >= 0"),
    ([*JOB, "--layers", "0"], "must be > 0"),
    ([*JOB, "--layers", "5000"], "capped at 4096"),
    ([*JOB, "--compute-ms", "fast"], "not a number"),
])
def test_usage_errors_are_one_line_and_status_2(argv: list[str], reason: str,
                                                capsys: pytest.CaptureFixture[str]) -> None:
    assert main(argv) == 2
    out, err = capsys.readouterr()
    assert out == ""
    assert reason in _one_error_line(err)


def test_help_exits_zero(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["workload", "--help"]) == 0
    out, _ = capsys.readouterr()
    for flag in ("--rank", "--peers", "--collector", "--node", "--steps", "--layers", "--exchange-bytes",
                 "--compute-ms", "--seed", "--connect-timeout"):
        assert flag in out


def test_daemon_that_cannot_bind_is_a_one_line_error(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    not_a_folder = tmp_path / "file"
    not_a_folder.touch()
    assert main(["run", *GOOD, "--local", f"ipc://{not_a_folder}/d.ipc"]) == 2
    assert "cannot create" in _one_error_line(capsys.readouterr().err)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_unreachable_peer_is_a_one_line_error_without_traceback() -> None:
    with socket.socket() as blocker:  # bound, never listening: every connection attempt is refused
        blocker.bind(("127.0.0.1", 0))
        peers = f"127.0.0.1:{_free_port()},127.0.0.1:{blocker.getsockname()[1]}"
        proc = subprocess.run(
            [sys.executable, "-m", "agent.cli", "workload", "--rank", "0", "--peers", peers, *GOOD,
             "--connect-timeout", "0.3", "--compute-ms", "0"],
            capture_output=True, text=True, timeout=30)
    assert proc.returncode == 2
    assert "cannot reach rank 1" in _one_error_line(proc.stderr)
    assert proc.stdout == ""
