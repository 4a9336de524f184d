"""Plain text and CSV of a snapshot, for ``watchtower report`` (no colour: it may go to a file or a pipe).

Every line fits the width given (the terminal's by default): a table that would not fit is printed as one
block per row instead, names whole, and prose wraps. Columns with nothing in them are left out.
"""

from __future__ import annotations

import csv
import io
import json
import textwrap
from collections.abc import Iterable, Sequence
from typing import Any

from watchtower.units import count, duration, hours, number, percent, rate, seconds, size, visible

MIN_WIDTH = 20
GAP = "  "
BARE = frozenset({"bound", "verdict"})  # columns whose values say what they are: no header in a row's block


def _wrap(text: str, width: int, indent: str = "  ") -> list[str]:
    """Prose at ``width``: continuation lines indented, a word longer than a line broken (never overflowing)."""
    return textwrap.wrap(text, width, subsequent_indent=indent, break_on_hyphens=False) or [""]


def _table(headers: Sequence[str], rows: list[Sequence[str]], right: set[int], width: int, keys: int = 1,
           join: str = " → ") -> list[str]:
    """Columns if they fit in ``width``, else one block per row: its ``keys`` first cells (joined by ``join``)
    as a title, then "header value" pairs. Columns empty in every row are dropped either way."""
    keep = [i for i in range(len(headers)) if any(r[i] for r in rows)] if rows else list(range(len(headers)))
    headers = [headers[i] for i in keep]
    right = {n for n, i in enumerate(keep) if i in right}
    rows = [[r[i] for i in keep] for r in rows]
    widths = [max(len(h), *(len(r[i]) for r in rows)) if rows else len(h) for i, h in enumerate(headers)]
    if sum(widths) + len(GAP) * (len(widths) - 1) <= width:
        def line(cells: Sequence[str]) -> str:
            return GAP.join(c.rjust(w) if i in right else c.ljust(w)
                            for i, (c, w) in enumerate(zip(cells, widths, strict=True))).rstrip()

        return [line(headers), line(["-" * w for w in widths]), *(line(r) for r in rows)]
    out: list[str] = []
    for row in rows:
        out += _wrap(join.join(row[:keys]), width)
        pairs = [c if h in BARE else f"{h} {c}" for h, c in zip(headers[keys:], row[keys:], strict=True) if c]
        out += _wrap("  " + ", ".join(pairs), width, indent="    ") if pairs else []
    return out


_PER_STEP = ("compute_s", "exchange_s", "compute_worst_s", "exchange_worst_s")  # a layer's ``per_step`` keys


def _note(s: dict[str, Any]) -> str:
    """The recording's note, less a leading "invented…" of its own (the line already says so)."""
    note = visible(s.get("note", "")).strip()
    head, sep, rest = note.partition(":")
    if sep and head.strip().lower().startswith("invented"):
        note = rest.strip()
    return note


def format_snapshot(s: dict[str, Any], width: int = 100) -> str:
    width = max(width, MIN_WIDTH)
    eff, sp, loss = s["efficiency"], s["speedup"], s["loss"]
    prose: list[str] = []
    if s.get("invented"):
        prose.append("INVENTED SCENARIO: " + (_note(s) or "made-up figures, nothing here was measured"))
    elif s.get("note"):
        prose.append("note: " + _note(s))
    prose += [
        f"job {visible(s['job'])}: {s['ranks']} ranks on {len(s['nodes'])} nodes, {s['steps']} steps "
        f"(window {s['window']['first_step']}..{s['window']['last_step']}), step {seconds(s['window']['step_s'])}"
        + ("; finished (every rank signed off)" if s.get("liveness", {}).get("finished") else ""),
        f"parallel efficiency {percent(eff['parallel'])} = load balance {percent(eff['load_balance'])} × "
        f"communication {percent(eff['communication'])} (serialisation {percent(eff['serialisation'])}, "
        f"transfer {percent(eff['transfer'])})",
        f"speedup {number(sp['achieved'])} of {number(sp['workers'], 0)} workers; lost to the interconnect "
        f"{number(sp['lost_to_interconnect'])}, to imbalance {number(sp['lost_to_imbalance'])}",
        f"time to finish {duration(s['eta_s'])}; hours at stake on slow links {hours(s['hours_at_stake'])}",
        f"frames {count(loss['frames'])}, missing {count(loss['missing'])}, bad {count(loss['bad'])}",
    ]
    out = [line for text in prose for line in _wrap(text, width)]
    out += [""]
    widest = max(((lay.get("per_step") or {}).get(key) or 0.0 for lay in s["layers"] for key in _PER_STEP),
                 default=0.0)  # the unit a zero is shown in
    out += _wrap("layers (time per step: on the mean rank, and on the rank with the most; comm-bound when "
                 f"exchange > {percent(s.get('comm_bound_threshold'))} of the layer)", width)
    out += _table(
        ["layer", "compute/step", "exchange/step", "worst compute", "worst exchange", "comm", "worst comm",
         "bound"],
        [[visible(lay["name"]) + (f" (gradients of {visible(lay['carries'])})" if lay.get("carries") else ""),
          *(seconds((lay.get("per_step") or {}).get(key), widest) for key in _PER_STEP),
          percent(lay["comm_fraction"]), percent(lay["comm_fraction_worst"]), "COMM-BOUND" if lay["comm_bound"] else ""]
         for lay in s["layers"]],
        right={1, 2, 3, 4, 5, 6}, width=width,
    )
    out += ["", *_wrap("links between nodes (beta: Hockney fit t = alpha + n/beta)", width)]
    out += _table(
        ["src", "dst", "measured by", "bytes", "beta", "alpha", "throughput", "of nominal", "score", "verdict",
         "hours at stake"],
        [[visible(lk["src"]), visible(lk["dst"]), "pair check" if lk.get("measured_by") == "check" else "",
          size(lk["bytes"]), rate(lk["bandwidth_Bps"]),
          "clamped" if lk.get("latency_clamped") else seconds(lk["latency_s"]), rate(lk["throughput_Bps"]),
          percent(lk["of_nominal"]), number(lk["score"]),
          "SLOW" + (f" ({lk['reason']})" if lk.get("reason") else "") if lk["slow"] else "",
          hours(lk["hours_at_stake"]) if lk["slow"] else ""]
         for lk in s["links"]],
        right={3, 4, 5, 6, 7, 8, 10}, width=width, keys=2,
    )
    above = [lk for lk in s["links"] if lk["nominal_Bps"] and lk["bandwidth_Bps"] is not None
             and lk["bandwidth_Bps"] > lk["nominal_Bps"]]
    if above:
        most = max(lk["bandwidth_Bps"] / lk["nominal_Bps"] - 1 for lk in above)
        out += ["", *_wrap(f"beta above nominal on {count(len(above))} of {count(len(s['links']))} links (up to "
                     f"{percent(most)}): the fit's error, no card beats its rate", width)]
    slow_ports = [p for p in s.get("ports", []) if p["slow"]]
    if slow_ports:
        out += ["", *_wrap("slow ports (a node's way out or in; involve the site's network operators before "
                           "touching hardware)", width)]
        out += _table(["port", "capacity", "score", "why", "explains"],
                      [[f"{visible(p['node'])} {p['direction']}", rate(p["capacity_Bps"]), number(p["score"]),
                        p.get("reason", ""), ", ".join(f"{visible(a)}→{visible(b)}" for a, b in p["explains"])]
                       for p in slow_ports], right={1, 2}, width=width)
    if s["stragglers"]:
        out += ["", "stragglers (compute outliers)"]
        out += _table(["rank", "node", "compute", "score"],
                      [[str(st["rank"]), visible(st["node"]), seconds(st["compute_s"]), number(st["score"])]
                       for st in s["stragglers"]], right={0, 2, 3}, width=width)
    if s.get("standing"):
        out += ["", *_wrap("standing findings (slow for the whole window)", width)]
        for f in s["standing"]:
            out += _wrap(f"  {visible(f['message'])}; {hours(f['hours_at_stake'])} at stake if fixed alone, "
                         f"{hours(f.get('hours_once_others_fixed'))} once the other slow links are fixed", width,
                         indent="    ")
    if s["alerts"]:
        out += ["", *_wrap("alerts, by the step they began", width)]
        for a in sorted(s["alerts"], key=_alert_order):
            closed = "" if a.get("step_closed") is None else f", back from {a['step_closed']}"
            out += _wrap(f"  step {a['step_detected']} (began ~{a['step_began']}{closed}): {visible(a['message'])}",
                         width, indent="    ")
    if s.get("changes"):
        out += ["", *_wrap("changes below the alert bar (recorded, no alert)", width)]
        for a in sorted(s["changes"], key=_alert_order):
            out += _wrap(f"  step {a['step_detected']} (began ~{a['step_began']}): {visible(a['message'])}", width,
                         indent="    ")
    early = s.get("liveness", {}).get("stopped_early", [])
    if early:
        out += ["", *_wrap("ranks that stopped early: " + ", ".join(
            f"rank {r['rank']} on {visible(r['node'])} at step {r['last_step']}" for r in early), width)]
    for gap in s.get("recording_gaps", []):
        out += ["", *_wrap(f"recording stopped: {gap['reason']} at byte {gap['stopped_at']}; {gap['unrecorded']} "
                           f"messages not recorded; resumed at byte {gap['resumed_at']}", width)]
    security = s.get("security", {})
    loss = s.get("loss", {})
    out += ["", *_wrap(f"transport: {security.get('mode')}; refused handshakes: {loss.get('rejected', 0)}"
                       + "".join(f", {reason} {n}" for reason, n in loss.get("rejected_reasons", {}).items()), width)]
    recorder = s.get("recorder")
    if recorder and recorder.get("message"):
        out += ["", *_wrap(f"{recorder['message']}; {recorder['unrecorded']} messages not recorded", width)]
    recording = s.get("recording")
    if recording and recording.get("skipped_bytes"):
        out += ["", *_wrap(f"recording damaged: {recording['skipped_bytes']} bytes stepped over, intact records kept",
                           width)]
    if recording and recording["torn_at"] is not None:
        out += ["", *_wrap(f"recording stopped at byte {recording['torn_at']}: {recording['reason']}", width)]
    return "\n".join(out)


def _alert_order(alert: dict[str, Any]) -> tuple[float, float]:
    began, detected = alert.get("step_began"), alert.get("step_detected")
    return (float("inf") if began is None else began, float("inf") if detected is None else detected)


def format_comparison(c: dict[str, Any], a: str, b: str, width: int = 100) -> str:
    width = max(width, MIN_WIDTH)

    def change(d: dict[str, Any], fmt: Any = seconds) -> str:
        ratio = d.get("ratio")
        return f"{fmt(d['a'])} → {fmt(d['b'])}" + (f" ({ratio:.2f}×)" if ratio is not None else "")

    out = [*_wrap(f"A = {visible(a)}", width), *_wrap(f"B = {visible(b)}", width),
           *_wrap(f"step time {change(c['step_s'])}", width),
           *_wrap(f"parallel efficiency {change(c['efficiency']['parallel'], percent)}", width), "",
           "layers, most added exchange first"]
    out += _table(["layer", "exchange A → B", "comm fraction A → B"],
                  [[visible(r["name"]), change(r["exchange_s"]), change(r["comm_fraction"], percent)]
                   for r in c["layers"]], right=set(), width=width)
    out += ["", "links, most bandwidth lost first"]
    out += _table(["src", "dst", "beta A → B"],
                  [[visible(r["src"]), visible(r["dst"]), change(r["bandwidth_Bps"], rate)] for r in c["links"]],
                  right=set(), width=width, keys=2)
    for link in c["new_slow_links"]:
        out += _wrap(f"new slow link in B: {visible(link['src'])} → {visible(link['dst'])} ({link['reason']})", width)
    for st in c["new_stragglers"]:
        out += _wrap(f"new straggler in B: rank {st['rank']} on {visible(st['node'])}", width)
    return "\n".join(out)


SNAPSHOT_TABLES = ("layers", "links", "ports", "nodes", "stragglers", "alerts")
COMPARISON_TABLES = ("layers", "links", "new_slow_links", "new_stragglers")


def _flat(row: dict[str, Any], prefix: str = "") -> dict[str, Any]:
    """One CSV row: nested figures become ``key.sub`` columns; lists are written as JSON in their cell."""
    out: dict[str, Any] = {}
    for key, value in row.items():
        if isinstance(value, dict):
            out.update(_flat(value, f"{prefix}{key}."))
        elif isinstance(value, list):
            out[prefix + key] = json.dumps(value, ensure_ascii=False)
        elif isinstance(value, bool):
            out[prefix + key] = "true" if value else "false"  # as JSON writes them
        else:
            out[prefix + key] = "" if value is None else value
    return out


def format_csv(rows: Iterable[dict[str, Any]]) -> str:
    """Rows of one snapshot table as CSV: the snapshot's own keys as columns, figures in SI base units
    (seconds, bytes, bytes/s, fractions), a missing figure as an empty cell."""
    flat = [_flat(row) for row in rows]
    columns: list[str] = []
    for row in flat:
        columns += [key for key in row if key not in columns]
    buffer = io.StringIO()
    writer = csv.DictWriter(buffer, fieldnames=columns, lineterminator="\n", restval="")
    writer.writeheader()
    writer.writerows(flat)
    return buffer.getvalue().rstrip("\n")
