"""Head side of Watchtower: collector, recordings, analysis, report and console."""

__version__ = "0.1.0"
