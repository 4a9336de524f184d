"""Security you can see: the transport mode in force and the refused handshakes, where people look.

Reproduced first: with keys, refused agents were counted in the collector's log and metrics, but
``report --json`` said ``rejected: 0`` and ``security.mode: loopback``, a console following the recording
showed "loopback only", and a refused agent only said how many monitoring frames it dropped.
"""

from __future__ import annotations

import json
import signal
from pathlib import Path

import pytest
import zmq
from trust_helpers import kill, run_steps, start_collector, wait_for

from agent import Probe
from agent import cli as agent_cli
from agent.keys import curve_keys
from tests.conftest import free_tcp_port
from tests.trust.conftest import KeyFolder
from watchtower import cli
from watchtower.console import ConsoleApp, StaticFeed
from watchtower.console.header import JobHeader
from watchtower.feeds import AttachFeed
from watchtower.keys import init_keys, new_agent


def stranger(folder: Path) -> Path:
    init_keys(folder)
    return new_agent("stranger", folder).secret


def test_report_and_a_following_console_show_keys_and_every_refusal_by_reason(
        keys: KeyFolder, tmp_path: Path, zmq_context: zmq.Context, capsys: pytest.CaptureFixture[str]) -> None:
    listen = f"tcp://127.0.0.1:{free_tcp_port()}"
    record = tmp_path / "head.wtrace"
    collector = start_collector(listen, record, "--keys", str(keys.path))
    foes = {"unlisted-key": curve_keys(stranger(tmp_path / "a"), keys.head_public), "no-curve": None}
    probes = {who: Probe(0, 1, "node7", listen, context=zmq_context, curve_keys=k, queue_frames=4)
              for who, k in foes.items()}
    try:
        for probe in probes.values():
            run_steps(probe, 3)

        def reported() -> dict:
            capsys.readouterr()
            assert cli.main(["report", str(record), "--json"]) == 0
            return json.loads(capsys.readouterr().out)

        seen: dict = {}

        def noted() -> bool:
            """Both refusals, by reason. An agent without keys hangs up on a CURVE server's greeting as soon as
            it reads it; when that comes before the server has read the agent's own greeting, libzmq can only
            report a handshake that failed with no detail ("handshake"), not the mechanism mismatch."""
            seen.update(reported()["loss"]["rejected_reasons"])
            return "unlisted-key" in seen and ("no-curve" in seen or "handshake" in seen)

        try:
            wait_for(noted, "refusals noted in the recording", 60.0)  # a collector process, two handshakes, loaded
        except AssertionError:
            raise AssertionError(f"refusals noted by reason: {seen}") from None
        snap = reported()
        assert snap["security"]["mode"] == "keys" and snap["loss"]["rejected"] >= 2
        feed = AttachFeed(record, security=None)
        feed.catch_up()
        attached = feed._snapshots.build()
        assert attached["security"]["mode"] == "keys" and attached["loss"]["rejected"] >= 2
    finally:
        for probe in probes.values():
            probe.close()
        kill(collector, signal.SIGTERM)


@pytest.mark.parametrize("who", ["unlisted-key", "wrong-server-key"])
def test_a_refused_probe_knows_why(who: str, keys: KeyFolder, endpoint: str, zmq_context: zmq.Context,
                                   tmp_path: Path) -> None:
    from watchtower.collector import Collector
    from watchtower.ingest import Ingest
    from watchtower.keys import load_head

    collector = Collector(endpoint, Ingest(), context=zmq_context, keys=load_head(keys.path))
    if who == "unlisted-key":
        agent_keys = curve_keys(stranger(tmp_path / "other"), keys.head_public)
        expected = "allow-list"
    else:
        stranger(tmp_path / "other")
        agent_keys = curve_keys(keys.agent_secret, tmp_path / "other" / "head.key")
        expected = ""  # the collector cannot decrypt: the agent sees its handshake fail
    probe = Probe(0, 1, "node7", collector.bound, context=zmq_context, curve_keys=agent_keys)
    try:
        def refused() -> bool:
            collector.drain(10)
            return probe.refused() is not None

        wait_for(refused, "the probe to learn it was refused")
        assert expected in probe.refused()  # type: ignore[operator]
    finally:
        probe.close()
        collector.close()


def test_a_refused_workload_says_so_in_one_line(keys: KeyFolder, endpoint: str, zmq_context: zmq.Context,
                                                tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    import threading

    from watchtower.collector import Collector
    from watchtower.ingest import Ingest
    from watchtower.keys import load_head

    collector = Collector(endpoint, Ingest(), context=zmq_context, keys=load_head(keys.path))
    stop = threading.Event()
    thread = threading.Thread(target=collector.run, args=(stop,))
    thread.start()
    try:
        status = agent_cli.main(["workload", "--rank", "0", "--peers", f"127.0.0.1:{free_tcp_port()}",
                                 "--collector", collector.bound, "--steps", "30", "--layers", "2", "--compute-ms",
                                 "5", "--keys", str(stranger(tmp_path / "other")), "--server-key",
                                 str(keys.head_public)])
    finally:
        stop.set()
        thread.join()
        collector.close()
    err = capsys.readouterr().err.strip().splitlines()
    assert status == 0 and len(err) == 1
    assert "refused this agent: its key is not on the collector's allow-list" in err[0]


async def test_the_header_shows_the_mode_and_the_refusals() -> None:
    from watchtower.ingest import Ingest
    from watchtower.snapshot import build_snapshot, cluster_for

    ingest = Ingest()
    ingest.ledger.refuse("unlisted-key")
    ingest.ledger.refuse("no-curve")
    snap = build_snapshot(ingest, cluster_for({}, None), source={"kind": "live", "where": "x"},
                          security={"mode": "keys", "warning": None})
    app = ConsoleApp(StaticFeed([snap]))
    async with app.run_test(size=(160, 40)) as pilot:
        await pilot.pause()
        await pilot.pause()
        text = app.query_one(JobHeader).render().plain
    assert "refused ▲2" in text and "CURVE keys" in text
