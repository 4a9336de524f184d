"""The bundled demo: rebuilt byte for byte from its generator, marked invented, and telling its story."""

from __future__ import annotations

import gzip
import importlib.util
import sys
from pathlib import Path

from watchtower.demo import DEMO_RECORDING
from watchtower.report import load_recording

GENERATOR = Path(__file__).parents[2] / "demo" / "kestrel.py"


def test_bundled_recording_is_what_the_generator_makes(tmp_path: Path) -> None:
    spec = importlib.util.spec_from_file_location("kestrel", GENERATOR)
    assert spec is not None and spec.loader is not None
    kestrel = importlib.util.module_from_spec(spec)
    sys.modules["kestrel"] = kestrel
    spec.loader.exec_module(kestrel)
    fresh = tmp_path / "kestrel.wtrace.gz"
    kestrel.write(fresh)
    assert gzip.decompress(fresh.read_bytes()) == gzip.decompress(DEMO_RECORDING.read_bytes())


def test_the_demo_finds_what_was_planted() -> None:
    snapshot = load_recording(DEMO_RECORDING, None, None)
    assert snapshot["invented"] and "INVENTED" in snapshot["note"]
    slow_ports = {f"{p['node']} {p['direction']}" for p in snapshot["ports"] if p["slow"]}
    assert slow_ports == {"kestrel-04 out", "kestrel-04 in"}  # the card that came up at 10 Gb/s
    slow_links = {(lk["src"], lk["dst"]) for lk in snapshot["links"] if lk["slow"]}
    assert slow_links == {("kestrel-03", "kestrel-04"), ("kestrel-04", "kestrel-03"),
                          ("kestrel-04", "kestrel-05"), ("kestrel-05", "kestrel-04")}
    alerts = {(a["kind"], a["subject"]): a for a in snapshot["alerts"]}
    assert set(alerts) == {("step-time", "step time"), ("link-throughput", "kestrel-02→kestrel-01"),
                           ("link-throughput", "kestrel-02→kestrel-03")}  # kestrel-02's way out degrades at 260
    assert all(abs(a["step_began"] - 260) <= 4 for a in alerts.values())
    assert [s["rank"] for s in snapshot["stragglers"]] == [9]  # the throttled rank
