"""Fixtures for the trust tests: a key folder with a listed agent (endpoints, contexts: tests/conftest.py)."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import pytest


@dataclass(frozen=True)
class KeyFolder:
    path: Path
    agent_secret: Path
    head_public: Path


@pytest.fixture
def keys(tmp_path: Path) -> KeyFolder:
    from watchtower.keys import init_keys, new_agent

    folder = tmp_path / "keys"
    public, _ = init_keys(folder)
    agent = new_agent("node7", folder)
    return KeyFolder(folder, agent.secret, public)
