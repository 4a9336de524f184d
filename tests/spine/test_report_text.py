"""``watchtower report`` as text, CSV and JSON: lines fit the width, nothing said twice or left empty,
alerts in step order, CSV that a spreadsheet reads back to the snapshot's figures, a documented JSON layout."""

from __future__ import annotations

import copy
import csv
import io
import json
import re
import subprocess
import sys
from functools import cache
from pathlib import Path
from typing import Any

import pytest

import watchtower.report as report_module
from watchtower.cli import main
from watchtower.demo import DEMO_RECORDING
from watchtower.report import SCHEMA_VERSION, load_recording
from watchtower.tables import format_snapshot
from watchtower.units import seconds

DOCS = Path(__file__).parents[2] / "docs" / "snapshot.md"


@cache
def _demo() -> dict[str, Any]:
    return load_recording(DEMO_RECORDING, None, None)


@pytest.fixture(autouse=True)
def _read_the_demo_once(monkeypatch: pytest.MonkeyPatch) -> None:
    """The command runs whole, but the demo recording is read once for all these tests (it takes seconds)."""
    def load(path: Path, cluster: object, window: int | None) -> dict[str, Any]:
        assert (path, cluster, window) == (DEMO_RECORDING, None, None)
        return demo()

    monkeypatch.setattr(report_module, "load_recording", load)


def demo() -> dict[str, Any]:
    return copy.deepcopy(_demo())


def report(capsys: pytest.CaptureFixture[str], *args: str) -> str:
    assert main(["report", *args]) == 0
    return capsys.readouterr().out


@pytest.mark.parametrize("width", [40, 60, 80, 100, 160])
def test_no_line_is_wider_than_asked_and_names_stay_whole(width: int, capsys: pytest.CaptureFixture[str]) -> None:
    text = report(capsys, str(DEMO_RECORDING), "--width", str(width))
    assert max(len(line) for line in text.splitlines()) <= width
    snap = _demo()
    words = set(text.split())
    for name in [*snap["window"]["nodes"], *(lay["name"] for lay in snap["layers"])]:
        assert name in words or any(name in w for w in words), name  # never cut across a line
    for port in (p for p in snap["ports"] if p["slow"]):  # the culprit, named whole on one line
        assert any(f"{port['node']} {port['direction']}" in line for line in text.splitlines())


def test_the_width_defaults_to_the_terminal() -> None:
    run = subprocess.run([sys.executable, "-m", "watchtower.cli", "report", str(DEMO_RECORDING)],
                         capture_output=True, text=True, timeout=120, env={"COLUMNS": "70", "PATH": ""})
    assert run.returncode == 0, run.stderr
    assert max(len(line) for line in run.stdout.splitlines()) <= 70


def test_invented_is_said_once() -> None:
    old_style = demo()
    old_style["note"] = "INVENTED demo scenario: " + old_style["note"]  # a recording made before the rename
    for snap in (demo(), old_style):
        first = format_snapshot(snap, width=200).splitlines()[0]
        assert first.startswith("INVENTED SCENARIO: ") and first.upper().count("INVENTED") == 1, first


def _tables(text: str) -> list[tuple[str, list[str]]]:
    """(header line, rows) of every column table: a table is the line above a rule of dash groups."""
    lines = text.splitlines()
    out = []
    for i, line in enumerate(lines):
        if i and re.fullmatch(r"-+( +-+)*", line):
            rows = []
            for row in lines[i + 1:]:
                if not row.strip() or re.fullmatch(r"-+( +-+)*", row):
                    break
                rows.append(row)
            out.append((lines[i - 1], [line, *rows]))
    return out


def test_every_column_has_a_title_and_something_in_it(capsys: pytest.CaptureFixture[str]) -> None:
    text = report(capsys, str(DEMO_RECORDING), "--width", "250")
    tables = _tables(text)
    assert len(tables) >= 4  # layers, links, slow ports, stragglers
    for header, (rule, *rows) in tables:
        for group in re.finditer(r"-+", rule):
            lo, hi = group.span()
            assert header[lo:hi].strip(), (header, rule)
            assert any(row[lo:hi].strip() for row in rows), (header, lo)


def test_a_column_empty_in_every_row_is_left_out() -> None:
    snap = demo()
    for lay in snap["layers"]:
        lay["comm_bound"] = False
    text = format_snapshot(snap, width=250)
    header = next(h for h, _ in _tables(text) if h.startswith("layer "))
    assert header.split()[-1] != "bound" and "COMM-BOUND" not in text


def test_layer_times_are_per_step_as_their_titles_say() -> None:
    """Per step on the mean rank = the mean rank's window sum ÷ the window's steps (the definition in
    docs/snapshot.md, worked by hand in tests/analysis/test_console_figures.py); the worst columns are the
    rank with the most."""
    snap = demo()
    text = format_snapshot(snap, width=250)
    header, (rule, *rows) = next((h, body) for h, body in _tables(text) if h.startswith("layer "))
    spans = {header[g.start():g.end()].strip(): g.span() for g in re.finditer(r"-+", rule)}
    by_name = {row[slice(*spans["layer"])].strip(): row for row in rows}
    steps = snap["window"]["steps"]
    for lay in snap["layers"]:
        row = by_name[lay["name"]]
        mean = lay["compute_s"] / steps
        assert lay["per_step"]["compute_s"] == pytest.approx(mean, rel=1e-9)
        cell = row[slice(*spans["compute/step"])].strip()
        if mean:
            assert cell == seconds(mean)
        else:  # a zero among milliseconds says "0.00 ms", the unit of the table's largest figure (189 ms)
            assert cell == "0.00 ms"
        assert row[slice(*spans["worst exchange"])].strip() == seconds(lay["per_step"]["exchange_worst_s"])
        assert lay["per_step"]["exchange_worst_s"] >= lay["per_step"]["exchange_s"]


def test_a_fitted_beta_above_its_nominal_rate_is_explained_as_the_fits_error() -> None:
    snap = demo()
    above = [lk for lk in snap["links"] if lk["nominal_Bps"] and lk["bandwidth_Bps"] > lk["nominal_Bps"]]
    assert above  # the demo's healthy links fit up to a few % above their cards (a known limit of the fit)
    text = format_snapshot(snap, width=250)
    assert f"beta above nominal on {len(above)} of {len(snap['links'])} links" in text
    for lk in above:
        lk["bandwidth_Bps"] = lk["nominal_Bps"] * 0.99
    assert "above nominal" not in format_snapshot(snap, width=250)


def test_links_measured_by_pair_checks_say_so_and_job_only_reports_have_no_such_column() -> None:
    snap = demo()
    assert "measured by" not in format_snapshot(snap, width=250)  # the demo's links are all the job's
    checked = snap["links"][0]
    checked.update(measured_by="check", hours_at_stake=None)
    text = format_snapshot(snap, width=250)
    header, (rule, *rows) = next((h, body) for h, body in _tables(text) if h.startswith("src "))
    lo, hi = next(g.span() for g in re.finditer(r"-+", rule) if header[g.start():g.end()].strip() == "measured by")
    by_row = {tuple(row.split()[:2]): row[lo:hi].strip() for row in rows}
    assert by_row.pop((checked["src"], checked["dst"])) == "pair check"
    assert set(by_row.values()) == {""}
    narrow = format_snapshot(snap, width=60)  # as blocks, one per link: the checked one says it
    assert "measured by pair check" in narrow


def test_alerts_are_listed_in_the_order_they_began() -> None:
    snap = demo()
    snap["alerts"] = [{**a, "step_began": began, "step_detected": began + 9, "message": f"alert {began}"}
                      for a, began in zip(snap["alerts"] * 2, [300, 12, 260, 77, 150, 5], strict=False)]
    text = format_snapshot(snap, width=200)
    alerts = text.split("\nalerts, by the step they began\n", 1)[1].split("\n\n", 1)[0]
    listed = [int(m) for m in re.findall(r"\(began ~(\d+)[,)]", alerts)]
    assert listed == sorted(listed) and len(listed) == len(snap["alerts"])


@pytest.mark.parametrize("table", ["layers", "links", "ports", "nodes", "stragglers", "alerts"])
def test_csv_reads_back_to_the_snapshot_figures(table: str, capsys: pytest.CaptureFixture[str]) -> None:
    rows = list(csv.DictReader(io.StringIO(report(capsys, str(DEMO_RECORDING), "--format", "csv", "--table", table))))
    expected = report(capsys, str(DEMO_RECORDING), "--json")
    want = json.loads(expected)[table]
    assert len(rows) == len(want) > 0
    for got, row in zip(rows, want, strict=True):
        for key, value in row.items():
            if isinstance(value, bool):
                assert got[key] == ("true" if value else "false")
            elif isinstance(value, float):
                assert float(got[key]) == value  # written in full, SI base units
            elif value is None:
                assert got[key] == ""
            elif isinstance(value, (int, str)):
                assert got[key] == str(value)
            elif isinstance(value, list):
                assert json.loads(got[key]) == value
            else:  # a nested figure: one column per part
                assert all(f"{key}.{part}" in got for part in value)


def test_csv_of_a_comparison(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    text = report(capsys, str(DEMO_RECORDING), str(DEMO_RECORDING), "--format", "csv", "--table", "links")
    rows = list(csv.DictReader(io.StringIO(text)))
    assert len(rows) == len(_demo()["links"])
    assert all(float(r["bandwidth_Bps.ratio"]) == 1.0 and r["bandwidth_Bps.a"] == r["bandwidth_Bps.b"] for r in rows)


@pytest.mark.parametrize("args", [["--format", "csv"], ["--format", "csv", "--table", "nothing"],
                                  ["--table", "links"], ["--json", "--format", "csv"], ["--width", "5"]])
def test_report_format_mistakes_are_one_line(args: list[str], capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["report", str(DEMO_RECORDING), *args]) == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1 and err.startswith("watchtower: error:")


def _documented(section: str) -> set[str]:
    """The keys a table of docs/snapshot.md lists under the heading ``section``."""
    text = DOCS.read_text()
    body = text.split(f"\n## {section}\n", 1)[1].split("\n## ", 1)[0]
    return set(re.findall(r"^\| `([a-z_]+)(?:\[\])?`", body, flags=re.MULTILINE))


def test_the_json_layout_is_versioned_and_documented(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    one = json.loads(report(capsys, str(DEMO_RECORDING), "--json"))
    assert one["schema_version"] == SCHEMA_VERSION and one["report"] == "snapshot"
    assert f"`schema_version` | int | {SCHEMA_VERSION}" in DOCS.read_text()
    assert set(one) == _documented("Keys")
    two = json.loads(report(capsys, str(DEMO_RECORDING), str(DEMO_RECORDING), "--json"))
    assert two["schema_version"] == SCHEMA_VERSION and two["report"] == "comparison"
    assert set(two) == _documented("Comparing two recordings")
