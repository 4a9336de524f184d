"""Helpers for the trust tests: processes driven line by line, recordings read back, polling with deadlines."""

from __future__ import annotations

import json
import os
import select
import signal
import subprocess
import sys
import time
from collections.abc import Callable
from pathlib import Path

from agent import Probe, wire
from watchtower.ingest import Ingest
from watchtower.recording import RecordingError, RecordingReader

DEADLINE_S = 20.0  # bounds a broken test only; every wait returns as soon as its condition holds
AGENT = Path(__file__).with_name("agent_proc.py")
REPO = Path(__file__).resolve().parents[2]


def wait_for(condition: Callable[[], bool], what: str, timeout_s: float = DEADLINE_S) -> None:
    deadline = time.monotonic() + timeout_s
    while not condition():
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out waiting for {what}")
        time.sleep(0.01)


def recorded(path: Path) -> dict[int, set[int]]:
    """Sequence numbers per sender in a recording (empty while the collector has not written it yet)."""
    seqs: dict[int, set[int]] = {}
    try:
        with RecordingReader(path) as reader:
            for _, frames in reader:
                if not frames:  # the collector's clock tick
                    continue
                try:
                    header = wire.decode_header(frames[0])
                except wire.WireError:
                    continue
                seqs.setdefault(header.sender, set()).add(header.seq)
    except RecordingError:  # not written yet (or only part of its preamble)
        return {}
    return seqs


def delivered(path: Path, figures: dict) -> bool:
    """Whether the recording holds every frame a sender numbered and did not drop (``figures``: its answer)."""
    return len(recorded(path).get(figures["sender"], ())) == figures["seq"] - figures["dropped"]


def settle(agents: list[AgentProc], path: Path) -> None:
    """Step each agent until its newest frame is recorded. Then every frame it dropped lies before a frame
    that arrived, so the ledger sees it as a gap (a drop at the very end has no later frame to show it)."""
    deadline = time.monotonic() + DEADLINE_S
    for agent in agents:
        while True:
            wait_for(lambda agent=agent: delivered(path, agent.last), "every frame not dropped",  # type: ignore[misc]
                     deadline - time.monotonic())
            if max(recorded(path)[agent.sender]) == agent.last["seq"] - 1:
                break
            agent.steps(1)


def ingest(*paths: Path) -> Ingest:
    """A recording (or several, one after the other) through the collector's own ingest path."""
    result = Ingest()
    for path in paths:
        with RecordingReader(path) as reader:
            result.feed_all(reader)
    return result


def python(*args: str, **kwargs: object) -> subprocess.Popen:
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    return subprocess.Popen([sys.executable, *args], env=env, cwd=REPO, **kwargs)  # type: ignore[call-overload]


def start_collector(listen: str, record: Path, *extra: str) -> subprocess.Popen:
    """``watchtower collect`` as its own process; returns once it has written its recording's preamble."""
    proc = python("-m", "watchtower.cli", "collect", "--listen", listen, "--record", str(record), *extra,
                  stdout=subprocess.PIPE, stderr=subprocess.PIPE)  # one summary line at the end
    wait_for(lambda: _started(proc, record), "the collector to start")
    return proc


def _started(proc: subprocess.Popen, record: Path) -> bool:
    if proc.poll() is not None:
        raise AssertionError(f"collector exited: {proc.stderr.read().decode()}")  # type: ignore[union-attr]
    return record.exists() and record.stat().st_size > 0


def kill(proc: subprocess.Popen, signum: int = signal.SIGKILL) -> None:
    proc.send_signal(signum)
    proc.wait(DEADLINE_S)


class AgentProc:
    """A rank in its own process (agent_proc.py) that steps when told and reports what its probe counted."""

    def __init__(self, endpoint: str, *, rank: int, world: int = 2, spool: Path | None = None,
                 queue: int = 16, node: str = "node0", keys: tuple[Path, Path] | None = None) -> None:
        args = [str(AGENT), "--endpoint", endpoint, "--rank", str(rank), "--world", str(world), "--node", node,
                "--queue", str(queue)]
        if spool is not None:
            args += ["--spool", str(spool)]
        if keys is not None:
            args += ["--keys", *map(str, keys)]
        self.proc = python(*args, stdin=subprocess.PIPE, stdout=subprocess.PIPE)
        self.last = self._answer()
        self.sender: int = self.last["sender"]

    def steps(self, n: int) -> dict:
        """Take ``n`` steps and return the probe's figures after them."""
        self.proc.stdin.write(f"steps {n}\n".encode())  # type: ignore[union-attr]
        self.proc.stdin.flush()  # type: ignore[union-attr]
        self.last = self._answer()
        return self.last

    def _answer(self) -> dict:
        ready, _, _ = select.select([self.proc.stdout], [], [], DEADLINE_S)
        assert ready, "the agent did not answer in time (blocked?)"
        line = self.proc.stdout.readline()  # type: ignore[union-attr]
        assert line, f"the agent exited with {self.proc.wait(DEADLINE_S)}"
        return json.loads(line)

    def close(self) -> None:
        if self.proc.poll() is None:
            kill(self.proc)
        for stream in (self.proc.stdin, self.proc.stdout):
            stream.close()  # type: ignore[union-attr]


def run_steps(probe: Probe, steps: int) -> float:
    """Take ``steps`` steps of one layer; return the slowest ``end_step`` in seconds (what training feels)."""
    slowest = 0.0
    for _ in range(steps):
        with probe.compute("layer"):
            pass
        began = time.perf_counter()
        probe.end_step()
        slowest = max(slowest, time.perf_counter() - began)
    return slowest
