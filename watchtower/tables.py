"""Plain-text tables of a snapshot, for ``watchtower report`` (no colour: it may go to a file or a pipe)."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from watchtower.units import count, duration, hours, number, percent, rate, seconds, visible


def _table(headers: Sequence[str], rows: list[Sequence[str]], right: set[int]) -> list[str]:
    widths = [max(len(h), *(len(r[i]) for r in rows)) if rows else len(h) for i, h in enumerate(headers)]

    def line(cells: Sequence[str]) -> str:
        return "  ".join(c.rjust(w) if i in right else c.ljust(w)
                         for i, (c, w) in enumerate(zip(cells, widths, strict=True))).rstrip()

    return [line(headers), line(["-" * w for w in widths]), *(line(r) for r in rows)]


def format_snapshot(s: dict[str, Any]) -> str:
    eff, sp, loss = s["efficiency"], s["speedup"], s["loss"]
    out = []
    if s.get("invented"):
        out.append("INVENTED SCENARIO: " + visible(s.get("note", "")))
    out += [
        f"job {visible(s['job'])}: {s['ranks']} ranks on {len(s['nodes'])} nodes, {s['steps']} steps "
        f"(window {s['window']['first_step']}..{s['window']['last_step']}), step {seconds(s['window']['step_s'])}",
        f"parallel efficiency {percent(eff['parallel'])} = load balance {percent(eff['load_balance'])} x "
        f"communication {percent(eff['communication'])} (serialisation {percent(eff['serialisation'])}, "
        f"transfer {percent(eff['transfer'])})",
        f"speedup {number(sp['achieved'])} of {number(sp['workers'], 0)} workers; lost to the interconnect "
        f"{number(sp['lost_to_interconnect'])}, to imbalance {number(sp['lost_to_imbalance'])}",
        f"time to finish {duration(s['eta_s'])}; hours at stake on slow links {hours(s['hours_at_stake'])}",
        f"frames {count(loss['frames'])}, missing {count(loss['missing'])}, bad {count(loss['bad'])}",
        "",
        "layers (window sums over ranks; comm-bound when exchange > "
        f"{percent(s.get('comm_bound_threshold'))} of the layer)",
    ]
    out += _table(
        ["layer", "compute", "exchange", "comm", "worst rank", ""],
        [[visible(lay["name"]), seconds(lay["compute_s"]), seconds(lay["exchange_s"]), percent(lay["comm_fraction"]),
          percent(lay["comm_fraction_worst"]), "COMM-BOUND" if lay["comm_bound"] else ""]
         for lay in s["layers"]],
        right={1, 2, 3, 4},
    )
    out += ["", "links between nodes (beta: Hockney fit t = alpha + n/beta)"]
    out += _table(
        ["src", "dst", "bytes", "beta", "alpha", "throughput", "of nominal", "score", "", "hours at stake"],
        [[visible(lk["src"]), visible(lk["dst"]), count(lk["bytes"]), rate(lk["bandwidth_Bps"]),
          "clamped" if lk.get("latency_clamped") else seconds(lk["latency_s"]), rate(lk["throughput_Bps"]),
          percent(lk["of_nominal"]), number(lk["score"]),
          "SLOW" + (f" ({lk['reason']})" if lk.get("reason") else "") if lk["slow"] else "",
          hours(lk["hours_at_stake"]) if lk["slow"] else ""]
         for lk in s["links"]],
        right={2, 3, 4, 5, 6, 7, 9},
    )
    slow_ports = [p for p in s.get("ports", []) if p["slow"]]
    if slow_ports:
        out += ["", "slow ports (a node's way out or in; involve the site's network operators before touching "
                "hardware)"]
        out += _table(["port", "capacity", "score", "", "explains"],
                      [[f"{visible(p['node'])} {p['direction']}", rate(p["capacity_Bps"]), number(p["score"]),
                        p.get("reason", ""), ", ".join(f"{visible(a)}->{visible(b)}" for a, b in p["explains"])]
                       for p in slow_ports], right={1, 2})
    if s["stragglers"]:
        out += ["", "stragglers (compute outliers)"]
        out += _table(["rank", "node", "compute", "score"],
                      [[str(st["rank"]), visible(st["node"]), seconds(st["compute_s"]), number(st["score"])]
                       for st in s["stragglers"]], right={0, 2, 3})
    if s["alerts"]:
        out += ["", "alerts"]
        out += [f"  step {a['step_detected']} (began ~{a['step_began']}): {visible(a['message'])}"
                for a in s["alerts"]]
    recording = s.get("recording")
    if recording and not recording["complete"]:
        out += ["", f"recording stopped at byte {recording['torn_at']}: {recording['reason']}"]
    return "\n".join(out)


def format_comparison(c: dict[str, Any], a: str, b: str) -> str:
    def change(d: dict[str, Any], fmt: Any = seconds) -> str:
        ratio = d.get("ratio")
        return f"{fmt(d['a'])} -> {fmt(d['b'])}" + (f" ({ratio:.2f}x)" if ratio is not None else "")

    out = [f"A = {visible(a)}", f"B = {visible(b)}", f"step time {change(c['step_s'])}",
           f"parallel efficiency {change(c['efficiency']['parallel'], percent)}", "",
           "layers, most added exchange first"]
    out += _table(["layer", "exchange A -> B", "comm fraction A -> B"],
                  [[visible(r["name"]), change(r["exchange_s"]), change(r["comm_fraction"], percent)]
                   for r in c["layers"]], right=set())
    out += ["", "links, most bandwidth lost first"]
    out += _table(["src", "dst", "beta A -> B"],
                  [[visible(r["src"]), visible(r["dst"]), change(r["bandwidth_Bps"], rate)] for r in c["links"]],
                  right=set())
    for link in c["new_slow_links"]:
        out.append(f"new slow link in B: {visible(link['src'])} -> {visible(link['dst'])} ({link['reason']})")
    for st in c["new_stragglers"]:
        out.append(f"new straggler in B: rank {st['rank']} on {visible(st['node'])}")
    return "\n".join(out)
