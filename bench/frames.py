"""Step messages for the benchmarks: a fixed exchange table of two RECV transfers, built once."""

from __future__ import annotations

import numpy as np

from agent import wire


def recv_table(layers: int) -> np.ndarray:
    """Two 4 MiB receives, in the first and second thirds of the layers, waits unknown."""
    table = np.zeros((len(wire.EXCHANGE_COLUMNS), 2), np.int64)
    table[wire.X_LAYER] = [layers // 3, 2 * layers // 3]
    table[wire.X_OP] = wire.Op.RECV
    table[wire.X_NBYTES] = 1 << 22
    table[wire.X_START] = [1_000_000, 5_000_000]
    table[wire.X_END] = [3_000_000, 6_500_000]
    table[wire.X_WAIT] = wire.UNKNOWN_WAIT
    return table
