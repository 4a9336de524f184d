"""The CLI never prints a traceback for bad input.

Reproduced first: ``watchtower-agent workload --node`` of 300 characters raised ValueError, ``--exchange-bytes
100000000000`` MemoryError, and ``replay --speed nan`` / ``inf`` were accepted. Each is now refused with the
option's name in one line, exit status 2.
"""

from __future__ import annotations

import pytest

from agent import cli as agent_cli
from watchtower import cli

PEERS = ["--rank", "0", "--peers", "127.0.0.1:1", "--collector", "tcp://127.0.0.1:2"]


@pytest.mark.parametrize(("argv", "option"), [
    (["workload", *PEERS, "--node", "n" * 300], "--node"),
    (["workload", *PEERS, "--node", "é" * 129], "--node"),  # 258 UTF-8 bytes
    (["workload", *PEERS, "--exchange-bytes", "100000000000"], "--exchange-bytes"),
    (["workload", *PEERS, "--compute-ms", "nan"], "--compute-ms"),
    (["run", "--collector", "tcp://127.0.0.1:2", "--node", "n" * 300], "--node"),
])
def test_agent_refuses_with_the_options_name(argv: list[str], option: str,
                                             capsys: pytest.CaptureFixture[str]) -> None:
    assert agent_cli.main(argv) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and f"argument {option}:" in err[0] and "Traceback" not in err[0]


@pytest.mark.parametrize("value", ["nan", "inf", "-inf", "-1", "0", "fast"])
@pytest.mark.parametrize("command", [["replay", "x.wtrace", "--speed"], ["demo", "--speed"],
                                     ["collect", "--record", "x.wtrace", "--duration"]])
def test_head_refuses_nan_inf_and_negative_with_the_options_name(command: list[str], value: str,
                                                                  capsys: pytest.CaptureFixture[str]) -> None:
    assert cli.main([*command, value]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and f"argument {command[-1]}:" in err[0]


def test_the_largest_node_name_and_halo_are_accepted() -> None:
    args = agent_cli.build_parser().parse_args(["workload", *PEERS, "--node", "n" * 256, "--exchange-bytes",
                                                str(1 << 29)])
    assert len(args.node) == 256 and args.exchange_bytes == 1 << 29
