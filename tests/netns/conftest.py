"""Fixtures for the network-namespace tests: skip cleanly where namespaces cannot be made, and always tear
down what a module built.

The namespace code is shared with ``demo/netns-cluster`` and lives in ``demo/netns_cluster.py``; the demo
folder is put on ``sys.path`` here so the tests import that same module.
"""

from __future__ import annotations

import itertools
import os
import sys
from collections.abc import Iterator
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[2] / "demo"))

from netns_cluster import NetnsCluster, NetnsError, missing_tools

NODES = 4
_serial = itertools.count()


def _prefix() -> str:
    """Unique per test run and per cluster: the pid, then a counter."""
    return f"wtt{os.getpid()}-{next(_serial)}"


@pytest.fixture(scope="session")
def netns_ready() -> None:
    """Skip (with the reason) unless this process can build a namespace pair and shape it with tbf."""
    if os.geteuid() != 0:
        pytest.skip("network-namespace tests need root (ip netns, veth, tc)")
    if missing := missing_tools():
        pytest.skip(f"network-namespace tests need {' and '.join(missing)} (iproute2)")
    probe = NetnsCluster(_prefix(), 1)
    try:
        probe.up()
        probe.shape("node0", "40mbit")
    except NetnsError as exc:
        pytest.skip(f"cannot build network namespaces here: {exc}")
    finally:
        probe.down()


@pytest.fixture(scope="module")
def netns_cluster(netns_ready: None) -> Iterator[NetnsCluster]:
    """Four node namespaces and a hub on one bridge, removed with every process in them afterwards."""
    cluster = NetnsCluster(_prefix(), NODES)
    cluster.up()
    try:
        yield cluster
    finally:
        cluster.down()
