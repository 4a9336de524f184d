"""The terminal console: a textual App that renders job snapshots from a live or replayed feed."""

from .app import ConsoleApp
from .feed import Feed, ReplayControls, Snapshot, StaticFeed

__all__ = ["ConsoleApp", "Feed", "ReplayControls", "Snapshot", "StaticFeed"]
