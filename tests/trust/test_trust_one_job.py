"""One job per recording.

Reproduced first: two jobs appended to one recording merged into "2 ranks on 4 nodes", with nodes that
held no ranks. Now the first job named owns the recording; another job's frames are refused (counted bad
as ``other-job``, not recorded after its schema, never merged) and ``collect`` says so in one line.
"""

from __future__ import annotations

import json
import signal
from pathlib import Path

import pytest
import zmq
from trust_helpers import kill, start_collector, wait_for

from agent import Probe
from tests.conftest import free_tcp_port
from watchtower import cli
from watchtower.attach import find_collectors


def run_job(listen: str, job: str, ranks: int, steps: int, zmq_context: zmq.Context) -> None:
    probes = [Probe(r, ranks, f"{job}-node{r}", listen, layers=["a"], job=job, context=zmq_context)
              for r in range(ranks)]
    for _ in range(steps):
        for probe in probes:
            with probe.compute("a"):
                pass
            probe.end_step()
    for probe in probes:
        probe.close()


def report(path: Path, capsys: pytest.CaptureFixture[str]) -> dict:
    capsys.readouterr()
    assert cli.main(["report", str(path), "--json"]) == 0
    return json.loads(capsys.readouterr().out)


def test_a_second_job_appended_to_a_recording_is_refused_not_merged(
        tmp_path: Path, zmq_context: zmq.Context, capsys: pytest.CaptureFixture[str]) -> None:
    record = tmp_path / "run.wtrace"
    listen = f"tcp://127.0.0.1:{free_tcp_port()}"
    first = start_collector(listen, record)
    try:
        run_job(listen, "alpha", 1, 5, zmq_context)
        wait_for(lambda: report(record, capsys)["steps"] == 5, "the first job recorded")
    finally:
        kill(first, signal.SIGTERM)
    second = start_collector(listen, record)  # restarted on the same file
    try:
        wait_for(lambda: bool(find_collectors()), "the restarted collector listening")  # the file exists already
        run_job(listen, "beta", 2, 5, zmq_context)
        wait_for(lambda: report(record, capsys)["loss"]["bad_reasons"].get("other-job", 0) >= 2, "beta refused")
    finally:
        kill(second, signal.SIGTERM)
    snap = report(record, capsys)
    assert snap["job"] == "alpha" and snap["ranks"] == 1 and [n["name"] for n in snap["nodes"]] == ["alpha-node0"]
    assert snap["steps"] == 5 and snap["loss"]["missing"] == 0
    err = second.stderr.read().decode()  # type: ignore[union-attr]
    assert f"refusing frames of job 'beta': {record} belongs to job 'alpha'" in err
    assert err.count("refusing frames") == 1
