"""Writing the view on screen to files: its rows as shown (CSV) and as the snapshot has them (JSON)."""

from __future__ import annotations

import csv
import json
from pathlib import Path

from .table import RecordTable


def export_view(table: RecordTable, view: str, step: int, folder: Path) -> tuple[Path, Path]:
    """Write `watchtower-<view>-step<N>.csv` and `.json` into `folder`: every column (also those a narrow
    terminal leaves out), the rows in the order and filter on screen. Returns both paths."""
    base = folder / f"watchtower-{view}-step{step}"
    headers, rows, records = table.rows_as_shown()
    csv_path, json_path = base.with_suffix(".csv"), base.with_suffix(".json")
    with csv_path.open("w", newline="", encoding="utf-8") as out:
        writer = csv.writer(out)
        writer.writerow(headers)
        writer.writerows(rows)
    clean = [{k: v for k, v in record.items() if not k.startswith("_")} for record in records]
    json_path.write_text(json.dumps({"view": view, "step": step, "rows": clean}, indent=2) + "\n", encoding="utf-8")
    return csv_path, json_path
