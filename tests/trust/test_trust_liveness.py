"""Silence shown as silence, end to end with real processes.

Reproduced first: after one rank was killed the console kept showing every rank and the last step rate
thirty seconds later, and ``heard 0 s``. Now each rank has an age that grows while it is silent (measured
against the wall clock, with the collector's clock ticks in the recording), a rank silent longer than a few
of its own steps is marked and raises ``rank-silent``, ``job-stalled`` when none advances, and the step rate
shows "stalled". Each test states the time within which the console and ``report --json`` must say so.
"""

from __future__ import annotations

import json
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest
from trust_helpers import REPO, AgentProc, start_collector, wait_for

from watchtower.cli import main
from watchtower.console import ConsoleApp
from watchtower.console.header import JobHeader
from watchtower.feeds import AttachFeed
from watchtower.snapshot import SILENT_MIN_S


def free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


SAYS_SO_WITHIN_S = SILENT_MIN_S + 8.0  # silent after 2 s; a tick, a snapshot and a redraw follow within a second


@pytest.fixture
def collect(tmp_path: Path) -> Iterator[tuple[str, Path]]:
    listen = f"tcp://127.0.0.1:{free_port()}"
    path = tmp_path / "run.wtrace"
    proc = start_collector(listen, path)
    yield listen, path
    proc.send_signal(signal.SIGTERM)
    proc.communicate(timeout=20)


async def console_says(path: Path, wanted: Callable[[str], bool], within_s: float,
                       meanwhile: Callable[[], None] = lambda: None) -> str:
    """Follow the recording in the console (Pilot) until the header says what is wanted; its text."""
    app = ConsoleApp(AttachFeed(path, security=None))
    async with app.run_test(size=(160, 40)) as pilot:
        deadline = time.monotonic() + within_s
        while True:
            meanwhile()
            await pilot.pause(0.1)
            text = app.query_one(JobHeader).render().plain
            if wanted(text):
                return text
            assert time.monotonic() < deadline, f"the console did not say so within {within_s} s:\n{text}"


def report(path: Path, capsys: pytest.CaptureFixture[str]) -> dict:
    capsys.readouterr()
    assert main(["report", str(path), "--json"]) == 0
    return json.loads(capsys.readouterr().out)


def report_says(path: Path, capsys: pytest.CaptureFixture[str], wanted: Callable[[dict], object], within_s: float,
                meanwhile: Callable[[], None] = lambda: None) -> dict:
    """``report --json`` of the recording, until it says what is wanted (its clock is the collector's ticks,
    recorded every second, so it may say so up to a second after a console on the wall clock)."""
    deadline = time.monotonic() + within_s
    while not wanted(snap := report(path, capsys)):
        assert time.monotonic() < deadline, f"report did not say so within {within_s} s: {snap['liveness']}"
        meanwhile()
        time.sleep(0.1)
    return snap


async def test_a_stopped_rank_is_silent_while_the_others_advance_and_clears_when_it_speaks(
        collect: tuple[str, Path], capsys: pytest.CaptureFixture[str]) -> None:
    listen, path = collect
    agents = [AgentProc(listen, rank=r, world=3, node=f"node{r}") for r in range(3)]
    try:
        for agent in agents:
            agent.steps(3)
        agents[1].proc.send_signal(signal.SIGSTOP)

        def others_advance() -> None:
            agents[0].steps(1)
            agents[2].steps(1)

        text = await console_says(path, lambda t: "SILENT: rank 1" in t, SAYS_SO_WITHIN_S, others_advance)
        assert "ranks ▲2/3" in text and "STALLED" not in text, text
        snap = report_says(path, capsys, lambda s: s["liveness"]["silent_ranks"], SAYS_SO_WITHIN_S, others_advance)
        assert snap["liveness"]["silent_ranks"] == [1] and not snap["liveness"]["stalled"]
        assert [a["subject"] for a in snap["alerts"] if a["kind"] == "rank-silent"] == ["rank 1"]
        assert snap["liveness"]["stopped_early"] == [{"rank": 1, "node": "node1", "last_step": 2}]
        assert next(n for n in snap["nodes"] if n["name"] == "node1")["silent"]
        agents[1].proc.send_signal(signal.SIGCONT)
        agents[1].steps(1)
        text = await console_says(path, lambda t: "SILENT" not in t, SAYS_SO_WITHIN_S, others_advance)
        assert "ranks 3/3" in text, text
    finally:
        for agent in agents:
            agent.proc.send_signal(signal.SIGCONT)
            agent.close()


def workload(listen: str, ranks: int = 3) -> list[subprocess.Popen]:
    peers = ",".join(f"127.0.0.1:{free_port()}" for _ in range(ranks))
    return [subprocess.Popen([sys.executable, "-m", "agent.cli", "workload", "--rank", str(r), "--peers", peers,
                              "--collector", listen, "--node", f"host{r}", "--steps", "1000000", "--layers", "2",
                              "--exchange-bytes", "4096", "--compute-ms", "2"], cwd=REPO,
                             stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
            for r in range(ranks)]


def running(path: Path, capsys: pytest.CaptureFixture[str]) -> Callable[[], bool]:
    return lambda: report(path, capsys)["steps"] >= 20


@pytest.mark.parametrize("how", ["kill one rank", "stop every rank"])
async def test_a_job_that_stops_is_shown_stalled(how: str, collect: tuple[str, Path],
                                                 capsys: pytest.CaptureFixture[str]) -> None:
    listen, path = collect
    ranks = workload(listen)
    try:
        wait_for(running(path, capsys), "the job to run")
        if how == "kill one rank":
            ranks[1].kill()
        else:
            for rank in ranks:
                rank.send_signal(signal.SIGSTOP)
        text = await console_says(path, lambda t: "JOB STALLED" in t, SAYS_SO_WITHIN_S + 20.0)
        assert "stalled" in text.split("JOB STALLED")[0]  # the step rate no longer shows its last value
        snap = report_says(path, capsys, lambda s: s["liveness"]["stalled"], SAYS_SO_WITHIN_S)
        assert snap["steps_per_s"] == 0.0 and snap["eta_s"] is None
        assert "job-stalled" in {a["kind"] for a in snap["alerts"]}
        assert sorted(snap["liveness"]["silent_ranks"]) == [0, 1, 2]
        if how == "kill one rank":  # the others stop with an error when their neighbour goes away
            stopped = ranks[0].wait(30), ranks[2].wait(30)
            assert all(code != 0 for code in stopped)
    finally:
        for rank in ranks:
            if rank.poll() is None:
                rank.send_signal(signal.SIGCONT)
                rank.kill()
            rank.communicate(timeout=30)
