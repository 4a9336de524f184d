"""A small fluid model of flows through node ports: max-min fair sharing over time.

Each flow crosses resources (its sender's way out, its receiver's way in, optionally a private path); at
every moment the active flows get max-min fair rates (progressive filling, Bertsekas & Gallager, Data
Networks, §6.5), and time advances to the next arrival or completion. It drives the invented demo
(``quorvex.py``) and the port tests, so both see flows that share ports the way TCP flows roughly do.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np


def max_min_rates(paths: Sequence[Sequence[int]], capacity: np.ndarray) -> np.ndarray:
    """Max-min fair rates by progressive filling: raise every unfrozen flow's rate together until a
    resource fills, freeze the flows through it, repeat."""
    n = len(paths)
    rate = np.zeros(n)
    frozen = np.zeros(n, bool)
    residual = np.asarray(capacity, np.float64).copy()
    use = np.zeros((n, len(residual)))
    for i, path in enumerate(paths):
        use[i, list(path)] = 1.0
    while not frozen.all():
        users = use[~frozen].sum(axis=0)
        busy = users > 0
        step = np.min(residual[busy] / users[busy])
        rate[~frozen] += step
        residual -= step * users
        full = busy & (residual <= 1e-9 * np.asarray(capacity)[busy].max())
        frozen |= (use[:, full] > 0).any(axis=1)
    return rate


def run_flows(release: np.ndarray, paths: Sequence[Sequence[int]], nbytes: np.ndarray,
              capacity: np.ndarray) -> np.ndarray:
    """End time of each flow whose bytes start moving at ``release``."""
    n = len(release)
    left = np.asarray(nbytes, np.float64).copy()
    end = np.full(n, np.nan)
    now = float(np.min(release))
    while np.isnan(end).any():
        active = np.flatnonzero((release <= now) & np.isnan(end))
        pending = release[(release > now) & np.isnan(end)]
        rates = max_min_rates([paths[i] for i in active], capacity) if len(active) else np.zeros(0)
        finish = left[active] / rates if len(active) else np.zeros(0)
        dt = min(finish.min() if len(active) else np.inf, (pending.min() - now) if len(pending) else np.inf)
        left[active] -= rates * dt
        now += dt
        done = active[left[active] <= 1e-6 * nbytes[active]]
        end[done] = now
    return end
