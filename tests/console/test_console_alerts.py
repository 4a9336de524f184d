"""The Alerts view on the bundled demo: the card slow from the first step is a standing finding above the
change alerts, names are never cut, and the header and Links view say what fixing the slow links buys.

Node and link names come from the recording itself (the demo is being renamed), never from this file.
"""

from __future__ import annotations

from typing import Any

import pytest

from watchtower.console import ConsoleApp, StaticFeed
from watchtower.console import format as fmt
from watchtower.demo import DEMO_RECORDING
from watchtower.report import load_recording

from .conftest import FakeClock, screen_text, settle


@pytest.fixture(scope="module")
def demo() -> dict[str, Any]:
    return load_recording(DEMO_RECORDING, None, None)


def test_the_slow_card_is_a_standing_finding_with_its_stake(demo: dict[str, Any]) -> None:
    """The demo's story: one node's card runs slow from the first step (both ways), another node's way out
    degrades mid-run. The first is a standing finding naming the node's ports; the second is a change alert
    only, so no standing finding names its port."""
    slow_ports = [p for p in demo["ports"] if p["slow"]]
    changed_ports = {al["port"] for al in demo["alerts"] if al["port"]}
    standing_nodes = {p["node"] for p in slow_ports if f"{p['node']} {p['direction']}" not in changed_ports}
    assert len(standing_nodes) == 1, (slow_ports, changed_ports)
    (node,) = standing_nodes
    (finding,) = demo["standing"]
    assert finding["kind"] == "slow-port" and finding["culprit"] == f"{node} out and in"
    held = {f"{lk['src']}→{lk['dst']}" for lk in demo["links"] if lk["slow"] and lk["port"] in
            (f"{node} out", f"{node} in")}
    assert set(finding["links"]) == held and len(held) == 4
    # Its stake is what fixing those links buys; in the demo they are the only slow links of the window, so it
    # is the job's stake and the "slow links fixed" what-if's saving over the remaining steps.
    fixed = next(w for w in demo["whatif"] if w["slow_fixed"])
    assert finding["hours_at_stake"] == pytest.approx(demo["hours_at_stake"])
    assert demo["hours_at_stake"] == pytest.approx(
        demo["remaining_steps"] * (demo["model"]["measured_step_s"] - fixed["step_s"]) / 3600, rel=1e-6)
    assert finding["hours_at_stake"] > 1.0


def test_the_mid_run_degradation_is_caught_within_a_few_steps(demo: dict[str, Any]) -> None:
    """The generator degrades a way out from step 260 (the demo's story); the old block design saw it at 275."""
    link_alerts = [al for al in demo["alerts"] if al["kind"] == "link-throughput"]
    assert link_alerts and all(abs(al["step_began"] - 260) <= 2 and al["step_detected"] <= 265
                               for al in link_alerts), link_alerts
    assert len({al["port"] for al in link_alerts}) == 1  # one culprit port, named on each
    step = [al for al in demo["alerts"] if al["kind"] == "step-time"]
    assert len(step) == 1 and step[0]["hours_at_stake"] < demo["hours_at_stake"] * 2  # its own stake, not the job's


async def test_alerts_view_lists_standing_first_and_never_cuts_a_name(demo: dict[str, Any]) -> None:
    app = ConsoleApp(StaticFeed([demo]), clock=FakeClock())
    async with app.run_test(size=(160, 48)) as pilot:
        await settle(pilot)
        await pilot.press("4")
        await pilot.pause()
        text = screen_text(app)
        table = app.query_one("#alerts-table")
        first = table.get_row_at(0)
    assert first[0].plain == "■" and first[2].plain == demo["standing"][0]["subject"]
    for alert in demo["alerts"]:
        assert alert["subject"] in text and alert["kind"] in text
        assert alert["port"] is None or alert["port"] in text
    assert demo["standing"][0]["culprit"] in text
    assert "…" not in "".join(line for line in text.splitlines() if "→" in line and "▲" in line)


async def test_header_and_links_view_show_the_step_with_slow_links_fixed(demo: dict[str, Any]) -> None:
    fixed = next(w for w in demo["whatif"] if w["slow_fixed"])
    app = ConsoleApp(StaticFeed([demo]), clock=FakeClock())
    async with app.run_test(size=(160, 48)) as pilot:
        await settle(pilot)
        await pilot.press("2")
        await pilot.pause()
        text = screen_text(app)
    assert f"slow links fixed {fmt.seconds(fixed['step_s'])}/step" in text
    assert f"(fixed: step {fmt.seconds(fixed['step_s'])}, speedup {fmt.number(fixed['speedup'])})" in text


def test_the_alert_bar_comes_from_the_cluster_file_and_the_flags(demo: dict[str, Any], tmp_path: Any) -> None:
    """The demo's mid-run change moves the step time by about 20 % and puts over 10 h at stake: above the
    default bar (10 %, 1 h), below a bar of 50 % and 100 h, whether set in the cluster file or by flags
    (which win over the file). Below the bar the change is still recorded."""
    import json
    import subprocess
    import sys

    assert demo["alerts"] and all(0.1 <= al["effect"] < 0.5 and 1.0 <= al["hours_at_stake"] < 100
                                  for al in demo["alerts"])
    job = f"[job]\ntotal_steps = {demo['remaining_steps'] + demo['window']['last_step'] + 1}\n"  # the demo's own
    cluster = tmp_path / "cluster.toml"
    cluster.write_text(job + "[alerts]\nmin_effect = 0.5\nmin_hours = 100\n")
    loose = tmp_path / "loose.toml"
    loose.write_text(job + "[alerts]\nmin_effect = 0.5\nmin_hours = 100000\n")

    def alerts(*extra: str) -> dict[str, Any]:
        done = subprocess.run([sys.executable, "-m", "watchtower.cli", "report", str(DEMO_RECORDING), "--json",
                               *extra], capture_output=True, text=True, timeout=120, check=True)
        return json.loads(done.stdout)

    by_file = alerts("--cluster", str(cluster))
    assert by_file["remaining_steps"] == demo["remaining_steps"]
    assert by_file["alerts"] == [] and {c["step_began"] for c in by_file["changes"]} >= {260}
    by_flags = alerts("--alert-min-effect", "0.5", "--alert-min-hours", "100")
    assert by_flags["alerts"] == []
    flags_win = alerts("--cluster", str(loose), "--alert-min-hours", "1")
    assert {al["step_began"] for al in flags_win["alerts"]} == {260}
