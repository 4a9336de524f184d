"""Fixtures for the node-side tests: a collector stand-in on loopback (contexts: tests/conftest.py)."""

from __future__ import annotations

import pytest
import zmq
from agent_helpers import FakeCollector


@pytest.fixture
def collector(zmq_context: zmq.Context) -> FakeCollector:
    return FakeCollector(zmq_context)
