"""``watch`` that asks, and a console that ends cleanly when its recording vanishes.

Reproduced first: ``watch`` attached to whichever collector it found first (during a test run, the test
suite's own, registered in the user's real run folder), and when that run's recording vanished it died with
a full-screen traceback from ``feeds.py``. Tests now announce collectors in a run folder of their own
(tests/conftest.py), ``watch`` lists the running collectors and lets the user pick (or ``--pid``/``--job``),
and a vanished recording ends the console with one line.
"""

from __future__ import annotations

import os
import signal
import time
from pathlib import Path

import pytest
import zmq
from trust_helpers import kill, start_collector, wait_for

from agent import Probe
from tests.conftest import free_tcp_port
from watchtower import cli
from watchtower.attach import choose, find_collectors, run_dir
from watchtower.console import ConsoleApp
from watchtower.errors import UsageError
from watchtower.feeds import AttachFeed
from watchtower.recording import Recorder


def test_tests_never_announce_in_the_users_run_folder() -> None:
    assert run_dir() != Path(f"/tmp/watchtower-{os.getuid()}") and "WATCHTOWER_RUN_DIR" in os.environ


def test_with_two_collectors_watch_lists_them_and_the_user_picks(tmp_path: Path, zmq_context: zmq.Context,
                                                                 capsys: pytest.CaptureFixture[str]) -> None:
    listens = [f"tcp://127.0.0.1:{free_tcp_port()}" for _ in range(2)]
    records = [tmp_path / "a.wtrace", tmp_path / "b.wtrace"]
    procs = [start_collector(listen, record) for listen, record in zip(listens, records, strict=True)]
    try:
        probe = Probe(0, 1, "n0", listens[1], layers=["x"], job="bravo", context=zmq_context)
        probe.end_step()
        wait_for(lambda: any(c.job == "bravo" for c in find_collectors()), "the job named in the beacon")
        running = find_collectors()
        assert sorted(c.recording for c in running) == sorted(r.resolve() for r in records)
        prompts: list[str] = []
        picked = choose(running, ask=lambda text: prompts.append(text) or "2")
        assert picked == running[1] and "2 collectors are running" in prompts[0]
        assert all(str(c.recording) in prompts[0] and c.listen in prompts[0] for c in running)
        assert choose(running, job="bravo").recording == records[1].resolve()
        assert choose(running, pid=procs[0].pid).recording == records[0].resolve()
        with pytest.raises(UsageError, match="expected a number from 1 to 2"):
            choose(running, ask=lambda _: "7")
        with pytest.raises(UsageError, match="no running 'watchtower collect' of job 'nobody'"):
            choose(running, job="nobody")
        capsys.readouterr()
        assert cli.main(["watch"]) == 2  # not a terminal: a one-line error that lists them
        err = capsys.readouterr().err
        assert "2 collectors are running; choose one with --pid or --job" in err and len(err.splitlines()) == 1
        probe.close()
    finally:
        for proc in procs:
            kill(proc, signal.SIGTERM)


@pytest.mark.parametrize("argv", [["watch", "--listen", "tcp://127.0.0.1:5999", "--pid", "1"],
                                  ["watch", "--follow", "x.wtrace", "--job", "a"]])
def test_contradicting_choices_are_one_line_errors(argv: list[str], capsys: pytest.CaptureFixture[str]) -> None:
    assert cli.main(argv) == 2
    assert len(capsys.readouterr().err.strip().splitlines()) == 1


async def test_a_recording_that_vanishes_ends_the_console_with_one_line(tmp_path: Path) -> None:
    path = tmp_path / "run.wtrace"
    Recorder(path, {}).close()
    app = ConsoleApp(AttachFeed(path, security=None, poll_s=0.05))
    async with app.run_test(size=(100, 30)) as pilot:
        await pilot.pause(0.2)
        path.unlink()
        deadline = time.monotonic() + 10
        while app.ended is None:
            assert time.monotonic() < deadline, "the console did not end"
            await pilot.pause(0.05)
    assert app.ended.startswith(f"the recording {path} is gone") and "\n" not in app.ended
    assert app.return_code == 1
