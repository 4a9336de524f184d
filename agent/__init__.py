"""Node side of Watchtower: the probe training code uses, the wire format, the node daemon."""

from agent.clock import ManualClock, default_clock
from agent.probe import Exchange, Probe
from agent.wire import Op, WireError

__all__ = ["Exchange", "ManualClock", "Op", "Probe", "WireError", "default_clock"]
