"""What a node daemon reads from a cluster file for pair checks (the head's own reader is watchtower.cluster;
the node side keeps its own small reader so that ``agent`` never imports ``watchtower``).

Keys used (all optional; the rest of the file is the head's business)::

    [network]
    nic_Bps = 5e7                 # nominal rate per node, bytes/s; the budget is a share of it
    [network.nodes]
    node3 = 1.25e7                # per-node overrides
    [checks]
    budget = 0.005                # share of nominal the checks may use (default 0.01)
    [checks.endpoints]            # where each node's check listener is, instead of asking the collector
    node0 = "10.0.0.1:7170"
"""

from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from agent import wire


class CheckFileError(ValueError):
    """A cluster file the daemon cannot use; the message is one line naming the file and the problem."""


@dataclass(frozen=True)
class CheckFile:
    nominal_Bps: float | None = None  # this node's nominal rate
    budget: float | None = None
    endpoints: dict[str, str] = field(default_factory=dict)


def _rate(value: object, where: str) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value) or value <= 0:
        raise CheckFileError(f"{where} must be a positive number of bytes/s")
    return float(value)


def load_check_file(path: str | Path, node: str) -> CheckFile:
    """Read the pair-check keys for ``node``; raise ``CheckFileError`` with a one-line reason."""
    path = Path(path)
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise CheckFileError(f"cannot read cluster file {path}: {exc.strerror}") from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise CheckFileError(f"cluster file {path} is not valid TOML: {exc}") from None
    network = data.get("network", {})
    checks = data.get("checks", {})
    if not isinstance(network, dict) or not isinstance(checks, dict):
        raise CheckFileError(f"{path}: [network] and [checks] must be tables")
    nodes = network.get("nodes", {})
    nominal = nodes.get(node, network.get("nic_Bps")) if isinstance(nodes, dict) else network.get("nic_Bps")
    budget = checks.get("budget")
    if budget is not None and (isinstance(budget, bool) or not isinstance(budget, int | float)
                               or not 0 < budget <= 1):
        raise CheckFileError(f"{path}: [checks] budget must be a share of nominal in (0, 1]")
    endpoints = checks.get("endpoints", {})
    if not isinstance(endpoints, dict):
        raise CheckFileError(f"{path}: [checks.endpoints] must be a table of node = \"HOST:PORT\"")
    checked = {}
    for name, value in endpoints.items():
        try:
            wire.decode(wire.encode_check_hello(0, 0, 0, node=name, endpoint=value if isinstance(value, str) else ""))
        except (wire.WireError, ValueError):
            raise CheckFileError(f"{path}: [checks.endpoints] {name} is not \"HOST:PORT\"") from None
        checked[name] = value
    return CheckFile(None if nominal is None else _rate(nominal, f"{path}: nominal rate of {node}"),
                     None if budget is None else float(budget), checked)
