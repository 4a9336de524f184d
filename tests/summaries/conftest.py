"""Recordings read into a window, for comparing the summary path with the full analysis."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import pytest

from watchtower.analysis import RunSeries, Window
from watchtower.analysis.summaries import StepSummary, fold
from watchtower.analysis.summary_window import SummaryWindow
from watchtower.cluster import Cluster
from watchtower.demo import DEMO_RECORDING
from watchtower.ingest import Ingest
from watchtower.recording import RecordingReader
from watchtower.snapshot import cluster_for

NETNS_RECORDING = Path(__file__).parent / "data" / "netns-egress.wtrace"  # rebuilt by netns_recording.py


@dataclass(frozen=True)
class Recorded:
    window: Window
    cluster: Cluster
    name: str
    series: RunSeries


def read(path: Path) -> Recorded:
    """Everything the store still holds of a recording, as ``watchtower report`` analyses it."""
    ingest = Ingest()
    with RecordingReader(path) as reader:
        ingest.feed_all(reader)
        meta = reader.meta
    return Recorded(ingest.store.window(), cluster_for(meta, None), path.name, ingest.store.series())


@pytest.fixture(scope="session", params=["demo", "netns"])
def recorded(request: pytest.FixtureRequest) -> Recorded:
    """The bundled demo recording, and one of a ring job between network namespaces with one node's way out
    shaped by tbf (a real TCP run; see netns_recording.py)."""
    return read(DEMO_RECORDING if request.param == "demo" else NETNS_RECORDING)


@dataclass(frozen=True)
class Folded:
    own: list[StepSummary]  # each step folded against its own α and busy levels
    converged: list[StepSummary]  # folded again against the window's reference, as collect converges


@pytest.fixture(scope="session")
def folded(recorded: Recorded) -> Folded:
    """Each recording's steps folded (once per session: the folds are what the tests share)."""
    own = fold(recorded.window, recorded.cluster)
    window = SummaryWindow(len(own))
    for summary in own:
        window.push(summary)
    return Folded(own, fold(recorded.window, recorded.cluster, window.figures(recorded.cluster).reference))
