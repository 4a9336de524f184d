"""What the analysis needs to know about the cluster that the wire does not carry.

A cluster file is TOML (read with the standard library's ``tomllib``)::

    [job]
    name = "llm-pretrain"        # shown in the console title and reports
    total_steps = 200000         # optional; enables the ETA and "hours at stake"
    ranks_per_node = 8           # optional; a check on what the agents report

    [network]
    nic_Bps = 12.5e9             # optional default nominal NIC rate per node, bytes/s (100 Gb/s)

    [network.nodes]              # optional per-node overrides, bytes/s
    node017 = 3.125e9            # this one has a 25 Gb/s card

    [groups]                     # optional; e.g. racks. A node in no group is in group "".
    rack-a = ["node001", "node002"]
    rack-b = ["node017", "node018"]

    [alerts]                     # optional; the bar a change must clear to raise an alert
    min_effect = 0.10            # step-time change, as a fraction (default 0.10)
    min_hours = 1.0              # or hours of the remaining run at stake (default 1.0)

A link's nominal rate is the lower of its two NICs (either end can limit it). A link's *class* is the group
of its ends when both ends share one ("rack-a"), else the two groups joined by "|" in sorted order
("rack-a|rack-b"); without ``[groups]`` every link is in the one class "". Slow links are judged against
the links of their own class, so links that cross a spine are not held to the rate of links within a rack.
Every key is optional; an empty file is the same as ``Cluster.default()``.
"""

from __future__ import annotations

import math
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import Any


class ClusterConfigError(ValueError):
    """A cluster file that cannot be used; the message is one line naming the file and the problem."""


def _frozen(mapping: Mapping[str, Any] | None = None) -> Mapping[str, Any]:
    return MappingProxyType(dict(mapping or {}))


@dataclass(frozen=True)
class Cluster:
    """The cluster as configured: job facts, nominal NIC rates and node groups."""

    name: str = "job"
    total_steps: int | None = None
    ranks_per_node: int | None = None
    nic_Bps: float | None = None  # default nominal NIC rate, bytes/s
    node_nic_Bps: Mapping[str, float] = field(default_factory=_frozen)
    node_group: Mapping[str, str] = field(default_factory=_frozen)
    alert_min_effect: float | None = None  # None: the analysis's default
    alert_min_hours: float | None = None

    @classmethod
    def default(cls) -> Cluster:
        """No knowledge: no nominal rates, no total, one link class."""
        return cls()

    def nominal_Bps(self, node: str) -> float | None:
        """Nominal NIC rate of ``node`` in bytes/s, or None when the file gives none."""
        return self.node_nic_Bps.get(node, self.nic_Bps)

    def link_nominal_Bps(self, src: str, dst: str) -> float | None:
        """Nominal rate of a directed link: the slower of its two NICs (None if either is unknown)."""
        a, b = self.nominal_Bps(src), self.nominal_Bps(dst)
        return None if a is None or b is None else min(a, b)

    def link_class(self, src: str, dst: str) -> str:
        """Class of a link: the shared group of its ends, else both groups joined by "|" (sorted)."""
        a, b = self.node_group.get(src, ""), self.node_group.get(dst, "")
        return a if a == b else "|".join(sorted((a, b)))


def load_cluster(path: str | Path) -> Cluster:
    """Read a cluster file; raise ``ClusterConfigError`` with a one-line reason when it is unusable."""
    path = Path(path)
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise ClusterConfigError(f"{path}: cannot read: {exc.strerror or exc}") from exc
    except UnicodeDecodeError as exc:
        raise ClusterConfigError(f"{path}: not UTF-8 text") from exc
    except tomllib.TOMLDecodeError as exc:
        raise ClusterConfigError(f"{path}: bad TOML: {_one_line(str(exc))}") from exc
    try:
        return cluster_from_dict(data)
    except ClusterConfigError as exc:
        raise ClusterConfigError(f"{path}: {exc}") from None


def cluster_from_dict(data: Mapping[str, Any]) -> Cluster:
    """Validate an already-parsed cluster document (the TOML layout in the module docstring)."""
    _only(data, "", {"job", "network", "groups", "alerts"})
    job = _table(data, "job")
    network = _table(data, "network")
    groups = _table(data, "groups")
    alerts = _table(data, "alerts")
    _only(alerts, "alerts.", {"min_effect", "min_hours"})
    _only(job, "job.", {"name", "total_steps", "ranks_per_node"})
    _only(network, "network.", {"nic_Bps", "nodes"})

    name = job.get("name", "job")
    if not isinstance(name, str) or not name:
        raise ClusterConfigError("job.name must be a non-empty string")
    nodes = _table(network, "nodes", "network.")
    node_group: dict[str, str] = {}
    for group, members in groups.items():
        if not isinstance(members, list) or not all(isinstance(m, str) for m in members):
            raise ClusterConfigError(f"groups.{group} must be a list of node names")
        for member in members:
            if member in node_group:
                raise ClusterConfigError(f"node {member!r} is in groups {node_group[member]!r} and {group!r}")
            node_group[member] = group
    return Cluster(
        name=name,
        total_steps=_count(job, "total_steps", "job."),
        ranks_per_node=_count(job, "ranks_per_node", "job."),
        nic_Bps=_rate(network.get("nic_Bps"), "network.nic_Bps"),
        node_nic_Bps=_frozen({node: _rate(v, f"network.nodes.{node}") for node, v in nodes.items()}),
        node_group=_frozen(node_group),
        alert_min_effect=_non_negative(alerts.get("min_effect"), "alerts.min_effect"),
        alert_min_hours=_non_negative(alerts.get("min_hours"), "alerts.min_hours"),
    )


def _non_negative(value: Any, where: str) -> float | None:
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value) or value < 0:
        raise ClusterConfigError(f"{where} must be a number ≥ 0, got {value!r}")
    return float(value)


def _one_line(text: str) -> str:
    return " ".join(text.split())


def _only(table: Mapping[str, Any], prefix: str, allowed: set[str]) -> None:
    """Reject unknown keys: a misspelt key silently ignored would give silently wrong figures."""
    unknown = sorted(set(table) - allowed)
    if unknown:
        raise ClusterConfigError(f"unknown key {prefix}{unknown[0]} (expected one of {', '.join(sorted(allowed))})")


def _table(data: Mapping[str, Any], key: str, prefix: str = "") -> Mapping[str, Any]:
    value = data.get(key, {})
    if not isinstance(value, dict):
        raise ClusterConfigError(f"{prefix}{key} must be a table")
    return value


def _count(table: Mapping[str, Any], key: str, prefix: str) -> int | None:
    value = table.get(key)
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, int) or value < 1:
        raise ClusterConfigError(f"{prefix}{key} must be a positive integer, got {value!r}")
    return value


def _rate(value: Any, where: str) -> float | None:
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value) or value <= 0:
        raise ClusterConfigError(f"{where} must be a positive number of bytes/s, got {value!r}")
    return float(value)
