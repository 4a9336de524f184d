"""Builders of synthetic windows that obey the analysis' own step model, handed to tests as fixtures."""

from __future__ import annotations

import sys
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest

from watchtower.analysis import Transfers, Window

sys.path.insert(0, str(Path(__file__).parents[2] / "demo"))  # the demo's fluid model (flowsim.py)

WindowBuilder = Callable[..., Window]


def synchronous_window(compute: np.ndarray, transfer: np.ndarray, *, ranks_per_node: int = 1,
                       transfers: Transfers | None = None) -> Window:
    """Per-layer synchronous steps: every rank waits for the slowest rank's compute in the layer, then all
    spend ``transfer[s, l]`` moving data, so exchange = (max_r C − C) + transfer and all step times agree."""
    n_steps, n_ranks, n_layers = compute.shape
    exchange = compute.max(axis=1, keepdims=True) - compute + transfer[:, None, :]
    step = (compute + exchange).sum(axis=2)
    n_nodes = -(-n_ranks // ranks_per_node)
    return Window(
        layers=tuple(f"layer{i}" for i in range(n_layers)),
        nodes=tuple(f"n{i}" for i in range(n_nodes)),
        ranks=np.arange(n_ranks, dtype=np.int32),
        rank_node=(np.arange(n_ranks) // ranks_per_node).astype(np.int32),
        steps=np.arange(n_steps, dtype=np.int64),
        compute_s=compute, exchange_s=exchange, step_s=step,
        transfers=transfers or Transfers.empty(),
    )


def make_transfers(step: list[int] | np.ndarray, src: list[int] | np.ndarray, dst: list[int] | np.ndarray,
                   nbytes: list[float] | np.ndarray, seconds: list[float] | np.ndarray,
                   layer: list[int] | np.ndarray | int = 0) -> Transfers:
    """Transfers laid end to end, 1 ms apart, with unknown waits (so transfer_s is end − start).

    No two overlap, so none shares a port with another: these windows test the fit, not concurrency."""
    n = len(step)
    seconds = np.asarray(seconds, np.float64)
    start = np.concatenate([[0.0], np.cumsum(seconds + 1e-3)[:-1]])
    return Transfers(
        step=np.asarray(step, np.int64), layer=np.broadcast_to(np.asarray(layer, np.int32), (n,)).copy(),
        src=np.asarray(src, np.int32), dst=np.asarray(dst, np.int32), nbytes=np.asarray(nbytes, np.int64),
        start_s=start, end_s=start + seconds, wait_s=np.full(n, np.nan))


@pytest.fixture(scope="session")
def build_window() -> WindowBuilder:
    return synchronous_window


@pytest.fixture(scope="session")
def build_transfers() -> Callable[..., Transfers]:
    return make_transfers


@pytest.fixture
def rng() -> np.random.Generator:
    return np.random.default_rng(20240611)
