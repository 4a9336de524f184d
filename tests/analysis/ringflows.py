"""Ring traffic with known port capacities for the port tests, run through the demo's fluid model
(``demo/flowsim.py``: max-min fair sharing at the ports)."""

from __future__ import annotations

import numpy as np
from flowsim import max_min_rates, run_flows

from watchtower.analysis import Transfers

__all__ = ["max_min_rates", "ring_transfers", "run_flows"]


def ring_transfers(egress: np.ndarray, ingress: np.ndarray, rng: np.random.Generator, *, steps: int = 24,
                   alpha: float = 2e-5, slow_pairs: dict[tuple[int, int], float] | None = None) -> Transfers:
    """One rank per node; every step each node sends a halo to both ring neighbours at once.

    Sizes cycle over 1, 2, 4 and 8 MB so the Hockney fit has a slope; nodes become ready up to a third of
    a healthy transfer apart, and the receiver records the time it waited for the later of the two.
    ``slow_pairs`` gives a directed node pair a private path of that capacity (a fault no port explains).
    """
    n = len(egress)
    slow_pairs = slow_pairs or {}
    extra = {pair: 2 * n + k for k, pair in enumerate(slow_pairs)}
    capacity = np.concatenate([egress, ingress, list(slow_pairs.values())])
    src = np.tile(np.repeat(np.arange(n), 2), steps)
    dst = (src + np.tile([-1, 1], n * steps)) % n
    step = np.repeat(np.arange(steps), 2 * n)
    nbytes = (1 << 20) * 2.0 ** (step % 4)
    ready = step * 1.0 + rng.uniform(0.0, 0.33, (steps, n)).ravel().repeat(2) * nbytes / np.median(egress)
    ready_dst = step * 1.0 + rng.uniform(0.0, 0.33, (steps, n))[step, dst] * nbytes / np.median(egress)
    release = np.maximum(ready, ready_dst) + alpha
    paths = [(s, n + d, *((extra[s, d],) if (s, d) in extra else ())) for s, d in zip(src, dst, strict=True)]
    end = run_flows(release, paths, nbytes, capacity)
    k = len(src)
    # The receiver's probe starts at its own readiness; the wait until the peer is known.
    return Transfers(step.astype(np.int64), np.zeros(k, np.int32), src.astype(np.int32), dst.astype(np.int32),
                     nbytes.astype(np.int64), ready_dst, end, release - alpha - ready_dst)
