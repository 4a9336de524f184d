"""Wire checks touched by the node side: the envelope-free round trip and the layer-range fix."""

from __future__ import annotations

import numpy as np
import pytest

from agent import wire


def _step(n_layers: int, exchange_layers: list[int]) -> list[bytes]:
    exchanges = np.zeros((len(wire.EXCHANGE_COLUMNS), len(exchange_layers)), dtype=np.int64)
    exchanges[wire.X_LAYER] = exchange_layers
    exchanges[wire.X_WAIT] = wire.UNKNOWN_WAIT
    return wire.encode_step(1, 0, 0, step=0, duration_ns=10, dropped_total=0, schema_id=1,
                            layer_ns=np.zeros((2, n_layers), dtype=np.int64), exchanges=exchanges)


def test_step_round_trip_keeps_every_column() -> None:
    message = wire.decode(_step(3, [0, 2]))
    assert isinstance(message, wire.Step)
    assert message.exchanges[wire.X_LAYER].tolist() == [0, 2]
    assert message.layer_ns.shape == (2, 3)


@pytest.mark.parametrize(("n_layers", "exchange_layers"), [(0, [0]), (2, [2]), (2, [-1])])
def test_exchange_outside_the_layer_list_is_rejected(n_layers: int, exchange_layers: list[int]) -> None:
    with pytest.raises(wire.WireError) as caught:
        wire.decode(_step(n_layers, exchange_layers))
    assert caught.value.reason == "bad-exchange"


def test_clock_offset_is_the_ntp_estimate() -> None:
    # Collector 1000 ns ahead, 100 ns each way, 50 ns between receiving and answering.
    t0 = 10_000
    t1 = t0 + 100 + 1_000
    t2 = t1 + 50
    t3 = t2 - 1_000 + 100
    assert wire.clock_offset(t0, t1, t2, t3) == (1_000, 200)
