"""Fixtures shared by every test folder: loopback endpoints and a ZeroMQ context that is cleaned up."""

from __future__ import annotations

import socket
import threading
from collections.abc import Iterator
from pathlib import Path

import pytest
import zmq

from watchtower.collector import Collector
from watchtower.ingest import Ingest
from watchtower.recording import Recorder


def free_tcp_port() -> int:
    """A port nobody listens on right now (bound and released by the kernel)."""
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


@pytest.fixture(autouse=True)
def private_run_dir(tmp_path_factory: pytest.TempPathFactory, monkeypatch: pytest.MonkeyPatch) -> None:
    """Every test, and every process it starts, announces collectors in a run folder of its own, never in
    the user's real one (where a console of theirs would find the test's collector)."""
    folder = tmp_path_factory.mktemp("run")
    folder.chmod(0o700)
    monkeypatch.setenv("WATCHTOWER_RUN_DIR", str(folder))


@pytest.fixture
def endpoint() -> str:
    return f"tcp://127.0.0.1:{free_tcp_port()}"


@pytest.fixture
def zmq_context() -> Iterator[zmq.Context]:
    ctx = zmq.Context()
    yield ctx
    ctx.destroy(linger=0)


@pytest.fixture
def running(endpoint: str, tmp_path: Path, zmq_context: zmq.Context) -> Iterator[tuple[Collector, Path]]:
    """A collector recording to a file of the test's own, running on a thread until the test ends."""
    path = tmp_path / "run.wtrace"
    collector = Collector(endpoint, Ingest(), Recorder(path), context=zmq_context)
    stop = threading.Event()
    thread = threading.Thread(target=collector.run, args=(stop,))
    thread.start()
    yield collector, path
    stop.set()
    thread.join()
    collector.close()
