"""The Layers view says whose gradients a bucket layer carries (the snapshot's ``carries``)."""

from __future__ import annotations

from watchtower.console import ConsoleApp, StaticFeed

from .conftest import FakeClock, screen_text, settle
from .scenario import make_snapshot


async def test_selected_bucket_names_the_layers_whose_gradients_it_carries(clock: FakeClock) -> None:
    snapshot = make_snapshot()
    top = max(snapshot["layers"], key=lambda layer: layer["exchange_s"])  # the first row, by exchange
    top["carries"] = "encoder.layers.10–11"
    app = ConsoleApp(StaticFeed([snapshot]), clock=clock)
    async with app.run_test(size=(160, 48)) as pilot:
        await settle(pilot)
        text = screen_text(app)
    assert f"layer {top['name']}" in text
    assert "gradients of encoder.layers.10–11" in text


async def test_layers_without_buckets_say_nothing_of_gradients(clock: FakeClock) -> None:
    app = ConsoleApp(StaticFeed([make_snapshot()]), clock=clock)
    async with app.run_test(size=(160, 48)) as pilot:
        await settle(pilot)
        assert "gradients of" not in screen_text(app)
