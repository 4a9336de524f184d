"""A rank under test control, run as its own process: it steps only when told, so a test can stop,
kill or restart things between steps and know exactly what the probe counted.

stdin: ``steps N`` (take N steps, then answer) or ``quit``. stdout: one JSON line per command,
{"sender", "seq", "dropped", "slowest_step_s"}; the first line is sent at start-up.
"""

from __future__ import annotations

import argparse
import json
import sys
import time

from agent import Op, Probe
from agent.keys import curve_keys

LAYERS = ("embed", "attn", "mlp", "head")


def main() -> int:
    parser = argparse.ArgumentParser()
    parser.add_argument("--endpoint", required=True)
    parser.add_argument("--rank", type=int, default=0)
    parser.add_argument("--world", type=int, default=2)
    parser.add_argument("--node", default="node0")
    parser.add_argument("--queue", type=int, default=16)
    parser.add_argument("--spool")
    parser.add_argument("--keys", nargs=2, metavar=("SECRET_FILE", "SERVER_FILE"))
    args = parser.parse_args()
    keys = None if args.keys is None else curve_keys(*args.keys)
    probe = Probe(args.rank, args.world, args.node, args.endpoint, layers=LAYERS, job="trust",
                  queue_frames=args.queue, spool=args.spool, curve_keys=keys)
    answer(probe, 0.0)
    for line in sys.stdin:
        command = line.split()
        if command == ["quit"]:
            break
        slowest = 0.0
        for _ in range(int(command[1])):
            for layer in LAYERS:
                with probe.compute(layer):
                    pass
            with probe.exchange("attn", peer=(args.rank + 1) % args.world, nbytes=4096, op=Op.RECV):
                pass
            began = time.perf_counter()
            probe.end_step()
            slowest = max(slowest, time.perf_counter() - began)
        answer(probe, slowest)
    probe.close()
    return 0


def answer(probe: Probe, slowest: float) -> None:
    print(json.dumps({"sender": probe.sender, "seq": probe.seq, "dropped": probe.dropped,
                      "slowest_step_s": slowest}), flush=True)


if __name__ == "__main__":
    sys.exit(main())
