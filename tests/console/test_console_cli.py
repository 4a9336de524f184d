"""The console's options on the command line: the redraw period and the low-bandwidth mode reach the app,
and a period that is not a positive number is a usage error (one line, exit 2)."""

from __future__ import annotations

from typing import Any

import pytest

from watchtower import cli
from watchtower.console import ConsoleApp
from watchtower.demo import DEMO_RECORDING


def test_interval_and_low_bandwidth_reach_the_console(monkeypatch: pytest.MonkeyPatch) -> None:
    seen: list[dict[str, Any]] = []

    def run(app: ConsoleApp) -> None:
        seen.append({"interval": app._throttle.interval_s, "low": app.low_bandwidth})

    monkeypatch.setattr(ConsoleApp, "run", run)
    assert cli.main(["replay", str(DEMO_RECORDING), "--interval", "0.5"]) == 0
    assert cli.main(["replay", str(DEMO_RECORDING), "--interval", "0.5", "--low-bandwidth"]) == 0
    assert seen == [{"interval": 0.5, "low": False}, {"interval": 1.0, "low": True}]  # at most one redraw a second


@pytest.mark.parametrize("value", ["0", "-1", "soon"])
def test_interval_must_be_a_positive_number(value: str, capsys: pytest.CaptureFixture[str]) -> None:
    assert cli.main(["replay", str(DEMO_RECORDING), "--interval", value]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--interval" in err[0]
