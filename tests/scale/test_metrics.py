"""OpenMetrics export: scraped over HTTP and parsed with the client library's own parsers, it says what the
snapshot says; `collect --metrics` serves a live job's figures; bad addresses are one line and status 2."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
import urllib.request
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from prometheus_client.openmetrics.parser import text_string_to_metric_families as parse_openmetrics
from prometheus_client.parser import text_string_to_metric_families as parse_classic

from agent.clock import ManualClock
from agent.probe import Probe
from tests.conftest import free_tcp_port
from watchtower.cli import main
from watchtower.demo import DEMO_RECORDING
from watchtower.metrics import MetricsAddressError, MetricsServer, parse_address
from watchtower.report import load_recording

DEMO = DEMO_RECORDING
OPENMETRICS = "application/openmetrics-text; version=1.0.0; charset=utf-8"
DEADLINE_S = 30.0

Samples = dict[tuple[str, tuple[tuple[str, str], ...]], float]


def scrape(url: str, accept: str | None = OPENMETRICS) -> Samples:
    request = urllib.request.Request(url, headers={"Accept": accept} if accept else {})
    with urllib.request.urlopen(request, timeout=5) as response:
        text = response.read().decode()
        kind = response.headers["Content-Type"]
    parse = parse_openmetrics if kind.startswith("application/openmetrics-text") else parse_classic
    return {(s.name, tuple(sorted(s.labels.items()))): s.value for family in parse(text) for s in family.samples}


@pytest.fixture(scope="module")
def snapshot() -> dict[str, Any]:
    return load_recording(DEMO, None, None)  # the invented demo: slow links and ports, alerts


@pytest.fixture
def server() -> Iterator[MetricsServer]:
    served = MetricsServer(parse_address("127.0.0.1:0"))
    yield served
    served.close()


@pytest.mark.parametrize("accept", [OPENMETRICS, None])
def test_scrape_says_what_the_snapshot_says(snapshot: dict[str, Any], server: MetricsServer,
                                            accept: str | None) -> None:
    assert scrape(server.url, accept) == {}  # nothing before the first snapshot
    server.metrics.update(snapshot)
    got = scrape(server.url, accept)

    def value(name: str, **labels: str) -> float:
        return got[f"watchtower_{name}", tuple(sorted(labels.items()))]

    assert value("job", job=snapshot["job"], security=snapshot["security"]["mode"]) == 1
    assert value("ranks") == snapshot["ranks"] and value("last_step") == snapshot["last_step"]
    assert value("steps_total") == snapshot["steps"]
    assert value("step_seconds") == pytest.approx(snapshot["step_time"]["recent_s"])
    assert value("eta_seconds") == pytest.approx(snapshot["eta_s"])
    for figure, expected in snapshot["efficiency"].items():
        assert value("efficiency_ratio", figure=figure) == pytest.approx(expected)
    for kind in ("achieved", "lost_to_interconnect", "lost_to_imbalance"):
        assert value("speedup_workers", kind=kind) == pytest.approx(snapshot["speedup"][kind])
    assert value("time_at_stake_seconds") == pytest.approx(snapshot["hours_at_stake"] * 3600)
    for layer in snapshot["layers"]:
        assert value("layer_comm_fraction_ratio", layer=layer["name"]) == pytest.approx(layer["comm_fraction"])
    assert snapshot["links"] and any(link["slow"] for link in snapshot["links"])
    for link in snapshot["links"]:
        pair = {"src": link["src"], "dst": link["dst"]}
        assert value("link_bandwidth_bytes_per_second", **pair) == pytest.approx(link["bandwidth_Bps"])
        assert value("link_throughput_bytes_per_second", **pair) == pytest.approx(link["throughput_Bps"])
        assert value("link_latency_seconds", **pair) == pytest.approx(link["latency_s"])
        assert value("link_slow", **pair) == int(link["slow"])
    assert any(port["slow"] for port in snapshot["ports"])
    for port in snapshot["ports"]:
        where = {"node": port["node"], "direction": port["direction"]}
        assert value("port_slow", **where) == int(port["slow"])
        assert value("port_capacity_bytes_per_second", **where) == pytest.approx(port["capacity_Bps"])
    kinds = [alert["kind"] for alert in snapshot["alerts"]]
    assert kinds
    for kind in set(kinds):
        assert value("alerts", kind=kind) == kinds.count(kind)
    loss = snapshot["loss"]
    assert value("frames_received_total") == loss["frames"] and value("frames_missing") == loss["missing"]
    assert value("frames_duplicate_total") == loss["duplicates"]
    assert value("frames_dropped_at_senders_total") == loss["dropped_at_senders"]


def test_label_values_from_the_wire_are_kept_literally(snapshot: dict[str, Any], server: MetricsServer) -> None:
    odd = 'rack "7"\\a\nb,c=}{ \x1b[31m'
    link = {**snapshot["links"][0], "src": odd}
    server.metrics.update({**snapshot, "links": [link], "layers": [{**snapshot["layers"][0], "name": odd}]})
    got = scrape(server.url)
    assert got["watchtower_link_slow", (("dst", link["dst"]), ("src", odd))] == int(link["slow"])
    assert ("watchtower_layer_comm_fraction_ratio", (("layer", odd),)) in got


@pytest.mark.parametrize("text", ["", "host", "127.0.0.1:", "127.0.0.1:70000", "example.org:9100", "1.2.3:9",
                                  "[::1:9100", "127.0.0.1:9100/x"])
def test_bad_addresses_are_refused(text: str) -> None:
    with pytest.raises(MetricsAddressError):
        parse_address(text)


def test_an_address_defaults_to_loopback() -> None:
    assert parse_address("9100").host == "127.0.0.1"
    assert parse_address("[::1]:9100").host == "::1"
    assert parse_address("localhost:9100").host == "localhost"


@pytest.mark.parametrize("command", [["collect", "--record", "unused.wtrace"],
                                     ["watch", "--listen", "tcp://127.0.0.1:1"]])
def test_cli_refuses_a_bad_metrics_address(command: list[str], capsys: pytest.CaptureFixture[str],
                                           tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(tmp_path)
    assert main([*command, "--metrics", "nowhere:port"]) == 2
    assert capsys.readouterr().err.count("\n") == 1
    assert not (tmp_path / "unused.wtrace").exists()


def test_collect_serves_the_live_job(tmp_path: Path) -> None:
    listen, port = f"tcp://127.0.0.1:{free_tcp_port()}", free_tcp_port()
    env = {**os.environ, "WATCHTOWER_RUN_DIR": str(tmp_path / "run")}
    collect = subprocess.Popen([sys.executable, "-m", "watchtower.cli", "collect", "--listen", listen, "--record",
                                str(tmp_path / "run.wtrace"), "--metrics", f"127.0.0.1:{port}"],
                               env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    clock = ManualClock()
    probes = [Probe(rank, 2, f"node{rank}", listen, layers=["block"], clock=clock) for rank in range(2)]
    try:
        deadline = time.monotonic() + DEADLINE_S
        got: Samples = {}
        # the collect loop rebuilds the snapshot every few seconds: wait for one that has both ranks' steps
        while (got.get(("watchtower_steps_total", ())), got.get(("watchtower_ranks", ()))) != (3, 2):
            assert time.monotonic() < deadline and collect.poll() is None
            for probe in probes:
                if probe.step_index < 3:
                    with probe.compute("block"):
                        clock.advance(1000)
                    probe.end_step()
            try:
                got = scrape(f"http://127.0.0.1:{port}/metrics")
            except OSError:  # not listening yet
                got = {}
            time.sleep(0.05)
        assert got[("watchtower_frames_missing", ())] == 0 and got[("watchtower_last_step", ())] == 2
    finally:
        for probe in probes:
            probe.close()
        collect.send_signal(signal.SIGINT)
        _, err = collect.communicate(timeout=DEADLINE_S)
    assert collect.returncode == 0, err
    assert f"metrics on http://127.0.0.1:{port}/metrics" in err
