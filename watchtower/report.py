"""``watchtower report``: stream a recording through the ingest path and print the job snapshot.

The recording is read record by record (never whole); the store keeps a bounded window, so memory does
not grow with the file. Two recordings are compared: what got slower from A to B, where and by how much.
Output: text fitted to a width, JSON with a schema version (docs/snapshot.md), or one table as CSV.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path
from typing import Any

from watchtower.analysis.summary import compare
from watchtower.cluster import Cluster
from watchtower.errors import UsageError
from watchtower.ingest import Ingest
from watchtower.recording import RecordingError, RecordingReader
from watchtower.snapshot import build_snapshot, cluster_for
from watchtower.tables import COMPARISON_TABLES, SNAPSHOT_TABLES, format_comparison, format_csv, format_snapshot

SCHEMA_VERSION = 1
"""Version of ``report --json``'s layout (docs/snapshot.md): raised when a key is renamed, removed or changes
meaning; adding a key does not raise it."""


def load_recording(path: Path, cluster: Cluster | None, window: int | None) -> dict[str, Any]:
    """The snapshot of a whole recording; a torn tail is reported in it, not raised."""
    ingest = Ingest()
    try:
        with RecordingReader(path) as reader:
            ingest.feed_all(reader)
            meta, tail = reader.meta, reader.tail
    except RecordingError as exc:
        raise UsageError(str(exc)) from None
    snapshot = build_snapshot(ingest, cluster_for(meta, cluster), source={"kind": "recording", "where": str(path)},
                              meta=meta, window_steps=window)
    snapshot["recording"] = {"records": tail.records, "complete": tail.clean, "torn_at": tail.offset,
                             "reason": tail.reason or None, "skipped_bytes": tail.skipped_bytes,
                             "resumes": tail.resumes,
                             "skipped": [{"start": s.start, "end": s.end, "reason": s.reason} for s in tail.skipped]}
    return snapshot


def run_report(paths: list[Path], *, output: str, cluster: Cluster | None, window: int | None, width: int,
               table: str | None = None) -> int:
    """Print one recording's snapshot, or what changed from A to B, as text, JSON or one table as CSV."""
    if len(paths) > 2:
        raise UsageError("give one recording, or two to compare")
    tables = COMPARISON_TABLES if len(paths) == 2 else SNAPSHOT_TABLES
    if table is not None and output != "csv":
        raise UsageError("--table goes with --format csv")
    if output == "csv" and table not in tables:
        given = "" if table is None else f", not {table!r}"
        raise UsageError(f"--format csv prints one table: give --table {' | '.join(tables)}{given}")
    snapshots = [load_recording(path, cluster, window) for path in paths]
    for path, snapshot in zip(paths, snapshots, strict=True):
        skipped = snapshot["recording"]["skipped"]
        if skipped:
            print(f"watchtower: warning: {path}: stepped over {snapshot['recording']['skipped_bytes']} damaged "
                  f"bytes in {len(skipped)} place(s), first at byte {skipped[0]['start']} ({skipped[0]['reason']}); "
                  "every intact record around them is read", file=sys.stderr)
        if snapshot["recording"]["torn_at"] is not None:
            print(f"watchtower: warning: {path}: stopped at byte {snapshot['recording']['torn_at']} "
                  f"({snapshot['recording']['reason']}); figures cover the complete records before it",
                  file=sys.stderr)
    if len(snapshots) == 2:
        document = {"schema_version": SCHEMA_VERSION, "report": "comparison", "a": str(paths[0]), "b": str(paths[1]),
                    **compare(snapshots[0], snapshots[1])}
        text = format_comparison(document, *map(str, paths), width=width)
    else:
        document = {"schema_version": SCHEMA_VERSION, "report": "snapshot", **snapshots[0]}
        text = format_snapshot(document, width=width)
    if output == "json":
        text = json.dumps(document, indent=2, ensure_ascii=False)
    elif output == "csv":
        text = format_csv(document[table])
    print(text)
    return 0
