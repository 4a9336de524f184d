"""The bundled demo: an INVENTED scenario, generated deterministically from a timing model.

Nothing here was measured. "Quorvex" is a made-up cluster of 6 nodes x 4 ranks training "Nimbrel-12", a
made-up 12-layer model split over all 24 ranks (each layer exchanges halos with its ring neighbours, and
gradients are summed with a ring allreduce at the end of each step). The fault story:

- qvx-04's network card came up at 10 Gb/s instead of 25 Gb/s: every transfer in or out of it is slow
  from the first step;
- qvx-02's way out degrades from step 260 (think of a failing transceiver): a degradation to catch;
- rank 9 (on qvx-03) computes 30% slower than its peers (think of a throttled GPU): a straggler.

Halos between nodes share ports max-min fairly (``flowsim.py``). The recording is produced by the real
``agent.Probe`` driven by manual clocks, so it goes through exactly
the code path a live job uses. Run ``python demo/quorvex.py`` to rebuild ``watchtower/data/quorvex.wtrace.gz``;
the output is byte-for-byte the same on every run.
"""

from __future__ import annotations

import gzip
import io
import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from agent import Op, Probe, wire
from agent.clock import ManualClock
from watchtower.recording import Recorder

sys.path.insert(0, str(Path(__file__).parent))  # flowsim.py, beside this file
from flowsim import run_flows

NODES = tuple(f"qvx-{i:02d}" for i in range(1, 7))
RANKS_PER_NODE = 4
WORLD = len(NODES) * RANKS_PER_NODE
LAYERS = ("embed", *(f"blk{b}.{part}" for b in range(1, 6) for part in ("attn", "mlp")), "head")
GRAD_SYNC = "grad-sync"
STEPS = 420
TOTAL_STEPS = 600_000  # what the invented job plans to run: about three days
SEED = 20261202

NOMINAL_BPS = 25e9 / 8  # 25 Gb/s cards
PAYLOAD = 0.94  # share of the line rate left for payload after protocol headers (common practice, no source)
SLOW_NODE = "qvx-04"
SLOW_FACTOR = 10 / 25  # came up at 10 Gb/s
DEGRADING_NODE = "qvx-02"
DEGRADE_AT = 260
DEGRADED_FACTOR = 0.30
STRAGGLER_RANK = 9
STRAGGLER_FACTOR = 1.30
INTRA_NODE_BPS = 40e9  # between ranks of one node (shared memory / on-board links)
ALPHA_INTER_S = 14e-6
ALPHA_INTRA_S = 3e-6
GRADIENT_BYTES = 48 << 20
EPOCH_NS = 1_795_000_000_000_000_000  # the invented run's start, as wall-clock nanoseconds
CLOCK_SKEW_NS = (0, 1_200_000, -800_000, 3_100_000, -2_200_000, 400_000)  # each node's clock error

# per layer: compute milliseconds, halo megabytes (attention layers light, MLP halos heavy)
LAYER_COMPUTE_MS = {"embed": 6.0, "head": 9.0, **{f"blk{b}.attn": 14.0 for b in range(1, 6)},
                    **{f"blk{b}.mlp": 11.0 for b in range(1, 6)}}
LAYER_HALO_MB = {"embed": 1.0, "head": 2.0, **{f"blk{b}.attn": 1.5 + 0.5 * b for b in range(1, 6)},
                 **{f"blk{b}.mlp": 6.0 + 3.0 * b for b in range(1, 6)}}

META = {
    "tool": "demo/quorvex.py",
    "invented": True,
    "note": "cluster 'Quorvex' (6 nodes x 4 ranks) training 'Nimbrel-12'. Nothing here was measured; see "
            "demo/quorvex.py for the fault story.",
    "cluster": {
        "job": {"name": "nimbrel-12 (invented)", "total_steps": TOTAL_STEPS, "ranks_per_node": RANKS_PER_NODE},
        "network": {"nic_Bps": NOMINAL_BPS},
    },
}


def node_of(rank: int) -> int:
    return rank // RANKS_PER_NODE


def port_capacity(step: int) -> np.ndarray:
    """Payload capacity (bytes/s) of every node's way out (first 6) and way in (last 6) at ``step``."""
    out = np.full(len(NODES), NOMINAL_BPS * PAYLOAD)
    out[NODES.index(SLOW_NODE)] *= SLOW_FACTOR
    inn = out.copy()
    if step >= DEGRADE_AT:
        out[NODES.index(DEGRADING_NODE)] *= DEGRADED_FACTOR
    return np.concatenate([out, inn])


@dataclass
class _Sent:
    at_ns: int
    frames: list[bytes]


def generate() -> tuple[dict, list[tuple[int, list[bytes]]]]:
    """Simulate the run; return the recording metadata and its (received_ns, frames) records in order."""
    rng = np.random.default_rng(SEED)
    clocks = [ManualClock() for _ in range(WORLD)]
    skews = [CLOCK_SKEW_NS[node_of(r)] for r in range(WORLD)]
    probes = [
        Probe(r, WORLD, NODES[node_of(r)], None, layers=(*LAYERS, GRAD_SYNC), job="nimbrel-12 (invented)",
              sender=1000 + r, clock=clocks[r], wall_clock=lambda r=r: EPOCH_NS + clocks[r].now - skews[r])
        for r in range(WORLD)
    ]
    out: list[_Sent] = []
    daemons = _Daemons(out)
    t = np.zeros(WORLD)  # each rank's simulated time, seconds since the epoch
    compute_ms = np.array([LAYER_COMPUTE_MS[name] for name in LAYERS])
    speed = np.ones(WORLD)
    speed[STRAGGLER_RANK] = STRAGGLER_FACTOR
    for step in range(STEPS):
        sent_before = [len(p.sent_frames) for p in probes]
        for layer, name in enumerate(LAYERS):
            work = compute_ms[layer] * 1e-3 * speed * rng.lognormal(0.0, 0.03, WORLD)
            ready = t + work
            for r in range(WORLD):
                _run(probes[r], clocks[r], t[r], ready[r], lambda p=probes[r], n=name: p.compute(n))
            halo = int(LAYER_HALO_MB[name] * (1 << 20))
            t = _halo_exchange(probes, clocks, name, halo, ready, step, rng, daemons)
        t = _allreduce(probes, clocks, t, step, rng)
        for r, probe in enumerate(probes):
            clocks[r].now = _ns(t[r])
            probe.end_step()
            for frames in probe.sent_frames[sent_before[r]:]:
                out.append(_Sent(_ns(t[r]) + 150_000 + r * 1_000, frames))
        daemons.sample(step, float(t.max()))
    out.sort(key=lambda sent: sent.at_ns)
    return META, [(EPOCH_NS + sent.at_ns, sent.frames) for sent in out]


def _ns(seconds: float) -> int:
    return round(seconds * 1e9)


def _run(probe: Probe, clock: ManualClock, start: float, end: float, region: object) -> None:
    clock.now = _ns(start)
    with region():  # type: ignore[operator]
        clock.now = _ns(end)


def _halo_exchange(probes: list[Probe], clocks: list[ManualClock], name: str, nbytes: int, ready: np.ndarray,
                   step: int, rng: np.random.Generator, daemons: _Daemons) -> np.ndarray:
    """Every rank sends its halo to both ring neighbours and waits for theirs; returns when each is done.

    Halos between ranks of one node move at the on-board rate. Halos between nodes share ports: a node's
    two outgoing halos share its way out, and its two incoming ones its way in, max-min fairly over time
    (``flowsim``), the way concurrent TCP flows roughly do."""
    done = ready.copy()
    pairs = [(src, dst) for dst in range(WORLD) for src in ((dst - 1) % WORLD, (dst + 1) % WORLD)]
    start = np.array([max(ready[src], ready[dst]) for src, dst in pairs])
    jitter = rng.lognormal(0.0, 0.02, len(pairs))
    hiccup = rng.random(len(pairs)) < 0.04
    jitter[hiccup] *= 1.0 + rng.exponential(0.5, hiccup.sum())  # an occasional hiccup, as real links have
    end = start + (ALPHA_INTRA_S + nbytes / INTRA_NODE_BPS) * jitter
    remote = [i for i, (src, dst) in enumerate(pairs) if node_of(src) != node_of(dst)]
    paths = [(node_of(pairs[i][0]), len(NODES) + node_of(pairs[i][1])) for i in remote]
    release = start[remote] + ALPHA_INTER_S
    end[remote] = release + (run_flows(release, paths, np.full(len(remote), float(nbytes)), port_capacity(step))
                             - release) * jitter[remote]
    for (src, dst), began, ended in zip(pairs, start, end, strict=True):
        clocks[dst].now = _ns(ready[dst])
        exchange = probes[dst].exchange(name, peer=src, nbytes=nbytes, op=Op.RECV)
        exchange.peer_ready_at(_ns(began))
        clocks[dst].now = _ns(ended)
        exchange.stop()
        done[dst] = max(done[dst], ended)
        daemons.traffic(node_of(src), node_of(dst), nbytes)
    return done


def _allreduce(probes: list[Probe], clocks: list[ManualClock], t: np.ndarray, step: int,
               rng: np.random.Generator) -> np.ndarray:
    """Ring allreduce of the gradients: 2(p-1)a + 2((p-1)/p) n/b on the slowest hop of the ring
    (Thakur, Rabenseifner & Gropp 2005), after the last rank arrives."""
    alpha = ALPHA_INTER_S
    beta = port_capacity(step).min()  # the ring's slowest hop between nodes
    p = WORLD
    cost = (2 * (p - 1) * alpha + 2 * (p - 1) / p * GRADIENT_BYTES / beta) * rng.lognormal(0.0, 0.01)
    end = t.max() + cost
    for r in range(WORLD):
        clocks[r].now = _ns(t[r])
        exchange = probes[r].exchange(GRAD_SYNC, op=Op.ALLREDUCE, group=WORLD, nbytes=GRADIENT_BYTES)
        clocks[r].now = _ns(end)
        exchange.stop()
    return np.full(WORLD, end)


class _Daemons:
    """Stand-ins for the node daemons: a schema, a clock offset and about one NIC sample per second each."""

    def __init__(self, out: list[_Sent]) -> None:
        self.out = out
        self.seq = [0] * len(NODES)
        self.sender = [7_000_000 + i for i in range(len(NODES))]
        self.bytes_out = np.zeros(len(NODES))
        self.bytes_in = np.zeros(len(NODES))
        self.total_out = np.zeros(len(NODES))
        self.total_in = np.zeros(len(NODES))
        self.last_s = 0.0
        self.rng = np.random.default_rng(SEED + 1)
        for i, node in enumerate(NODES):
            self._send(i, 0, wire.encode_schema(self.sender[i], 0, EPOCH_NS, schema_id=1, rank=-1, world=1,
                                                node=node, layers=[]))
            self._send(i, 1000, wire.encode_offset(self.sender[i], 1, EPOCH_NS, CLOCK_SKEW_NS[i], 80_000))

    def _send(self, node: int, at_ns: int, frames: list[bytes]) -> None:
        self.out.append(_Sent(at_ns, frames))
        self.seq[node] += 1

    def traffic(self, src: int, dst: int, nbytes: int) -> None:
        if src != dst:
            self.bytes_out[src] += nbytes
            self.bytes_in[dst] += nbytes

    def sample(self, step: int, now_s: float) -> None:
        interval = now_s - self.last_s
        if interval < 1.0:
            return
        self.total_out += self.bytes_out
        self.total_in += self.bytes_in
        for i in range(len(NODES)):
            values = np.array([[self.bytes_out[i] / interval], [self.bytes_in[i] / interval],
                               [self.total_out[i]], [self.total_in[i]]])
            cpu = float(np.clip(self.rng.normal(78.0, 4.0), 0, 100))
            frames = wire.encode_node(self.sender[i], self.seq[i], EPOCH_NS + _ns(now_s), cpu_percent=cpu,
                                      memory_percent=41.5 + i, interval_s=interval, nics=["ens1f0"],
                                      nic_values=values)
            self._send(i, _ns(now_s) + 50_000, frames)
        self.bytes_out[:] = 0
        self.bytes_in[:] = 0
        self.last_s = now_s


def write(path: Path) -> int:
    """Write the recording gzip-compressed, reproducibly (no timestamps in the gzip header)."""
    meta, records = generate()
    raw = io.BytesIO()
    Recorder(raw, meta).write_many(records)
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "wb") as sink, gzip.GzipFile(fileobj=sink, mode="wb", mtime=0, compresslevel=9) as zipped:
        zipped.write(raw.getvalue())
    return len(records)


if __name__ == "__main__":
    default = Path(__file__).parents[1] / "watchtower" / "data" / "quorvex.wtrace.gz"
    target = Path(sys.argv[1]) if len(sys.argv) > 1 else default
    count = write(target)
    print(f"wrote {count} records to {target} ({target.stat().st_size / 1e6:.1f} MB)")
