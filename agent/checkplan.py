"""The pair-check schedule: which node checks which, when, with what sizes, under a byte budget. Pure.

Time is cut into slots of equal length on the wall clock (NTP-synchronised across nodes), and slots into
cycles of a fixed number of rounds. A round is a *rotation*: with the nodes sorted by name as 0 … n−1,
rotation r (1 ≤ r < n) has every node i check the link i → (i + r) mod n. In a rotation every node sends
exactly one check and receives exactly one, so no port (a node's way out or way in) carries two checks at
once, and the n − 1 rotations together cover all n(n − 1) ordered pairs. This is the round-robin of a
tournament schedule (every team meets every other once per round of play); here the pairs are ordered, so
the plain cyclic shift suffices.

A cycle runs the n − 1 rotations, those holding a suspected pair first, followed by ``extra`` rounds that
repeat the rotations whose pairs are most uncertain (weights > 1, handed out by the collector), so that
every ordered pair is measured at least once per cycle and uncertain pairs more often. Every daemon
derives the same plan from the same inputs (sorted node names, weights, slot index), so they agree on
who checks whom without talking to each other.

The slot length follows from the byte budget: a node sends ``slot_bytes`` per slot, so a slot lasts
``slot_bytes / (budget × nominal)`` and the checks use at most ``budget`` of the node's nominal rate.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

DEFAULT_BUDGET = 0.01  # share of the nominal rate the checks may use (1 %); common practice, no source
SMALL_BYTES = 1024  # a message this small takes about α: it pins the latency
LARGE_SECONDS = 0.002  # a large message takes this long at the nominal rate, ≫ α on any fabric; no source
MIN_LARGE_BYTES = 256 * 1024
MAX_LARGE_BYTES = 8 * 1024 * 1024
REPEATS = 2  # (small, large) pairs per slot, so each size bin has more than one sample per check
SUSPECT_WEIGHT = 4.0  # weight from which a pair counts as suspected (ordered first); no source


@dataclass(frozen=True)
class Sizes:
    """Message sizes of a check: one small (time ≈ α) and one large (time ≈ n/β), so both are identifiable."""

    small: int
    large: int
    repeats: int = REPEATS

    @property
    def slot_bytes(self) -> int:
        return self.repeats * (self.small + self.large)


def check_sizes(nominal_Bps: float, repeats: int = REPEATS) -> Sizes:
    """Sizes for a fabric of ``nominal_Bps``: the large message takes ``LARGE_SECONDS`` at the nominal rate
    (within [256 KiB, 8 MiB]), so its time is dominated by n/β even at tens of microseconds of latency."""
    if not nominal_Bps > 0:
        raise ValueError("the nominal rate must be positive")
    large = int(min(MAX_LARGE_BYTES, max(MIN_LARGE_BYTES, nominal_Bps * LARGE_SECONDS)))
    return Sizes(SMALL_BYTES, large, repeats)


def slot_seconds(sizes: Sizes, nominal_Bps: float, budget: float = DEFAULT_BUDGET) -> float:
    """Slot length that keeps one node's check bytes at ``budget`` of its nominal rate."""
    if not 0 < budget <= 1:
        raise ValueError("the budget is a share of the nominal rate, in (0, 1]")
    if not nominal_Bps > 0:
        raise ValueError("the nominal rate must be positive")
    return sizes.slot_bytes / (budget * nominal_Bps)


def extra_rounds(n: int) -> int:
    """Rounds per cycle beyond the n − 1 that cover every pair: half as many again, for uncertain pairs."""
    return 0 if n < 3 else math.ceil((n - 1) / 2)


def rounds_per_cycle(n: int) -> int:
    return 0 if n < 2 else (n - 1) + extra_rounds(n)


def rotation(n: int, r: int) -> list[tuple[int, int]]:
    """The directed pairs of rotation ``r``: every node i checks i → (i + r) mod n."""
    if not 0 < r < n:
        raise ValueError(f"rotation {r} of {n} nodes")
    return [(i, (i + r) % n) for i in range(n)]


def plan_cycle(nodes: Sequence[str], weights: Mapping[tuple[str, str], float] | None = None) -> list[int]:
    """The rotations of one cycle, in order (length ``rounds_per_cycle``).

    First every rotation once, those whose heaviest pair is heaviest first (suspected links are checked
    first; ties keep rotation order); then the extra rounds, each the rotation with the most uncertainty
    left, Σ(weight − 1) / (1 + times already run this cycle), so that uncertain pairs are checked more often
    and no rotation takes every extra round. With no weights the extra rounds repeat rotations in order.
    """
    n = len(nodes)
    if n < 2:
        return []
    index = {name: i for i, name in enumerate(nodes)}
    w = [[1.0] * n for _ in range(n)]
    for (src, dst), value in (weights or {}).items():
        if src in index and dst in index and src != dst:
            w[index[src]][index[dst]] = max(1.0, float(value))

    def heaviest(r: int) -> float:
        return max(w[i][j] for i, j in rotation(n, r))

    def excess(r: int) -> float:
        return sum(w[i][j] - 1.0 for i, j in rotation(n, r))

    order = sorted(range(1, n), key=lambda r: (-heaviest(r), r))
    runs = dict.fromkeys(range(1, n), 1)
    for k in range(extra_rounds(n)):
        if any(excess(r) > 0 for r in runs):
            r = max(range(1, n), key=lambda r: (excess(r) / (1 + runs[r]), -r))
        else:
            r = k % (n - 1) + 1
        runs[r] += 1
        order.append(r)
    return order


@dataclass(frozen=True)
class Assignment:
    """What one node does in one slot."""

    slot: int
    cycle: int
    rotation: int
    target: str  # the node this one checks
    source: str  # the node that checks this one


def assignment(nodes: Sequence[str], me: str, slot: int,
               weights: Mapping[tuple[str, str], float] | None = None) -> Assignment | None:
    """This node's check in ``slot``; None when there is nobody to check. ``nodes`` must be the same sorted
    list on every daemon (``sorted`` is applied here, so any order of the same names agrees)."""
    ordered = sorted(set(nodes))
    n = len(ordered)
    if n < 2 or me not in ordered:
        return None
    per_cycle = rounds_per_cycle(n)
    cycle, position = divmod(slot, per_cycle)
    r = plan_cycle(ordered, weights)[position]
    i = ordered.index(me)
    return Assignment(slot, cycle, r, ordered[(i + r) % n], ordered[(i - r) % n])


def period_seconds(n: int, slot_s: float) -> float:
    """Every ordered pair of ``n`` nodes is checked at least once within this long (one cycle)."""
    return rounds_per_cycle(n) * slot_s


class WeightBook:
    """The weights (and node list) every daemon plans a cycle with.

    The collector stamps each set with its clock; a cycle uses the newest set stamped at least ``margin_s``
    before the cycle began, so daemons that fetch at different moments still plan the cycle alike.
    """

    KEEP = 8

    def __init__(self, margin_s: float) -> None:
        self.margin_ns = int(margin_s * 1e9)
        self._sets: list[tuple[int, tuple[str, ...], dict[tuple[str, str], float]]] = []

    def add(self, stamp_ns: int, nodes: Sequence[str], weights: Mapping[tuple[str, str], float]) -> None:
        entry = (stamp_ns, tuple(sorted(set(nodes))), dict(weights))
        if self._sets and self._sets[-1][0] == stamp_ns:
            self._sets[-1] = entry
            return
        self._sets.append(entry)
        self._sets.sort(key=lambda e: e[0])
        del self._sets[:-self.KEEP]

    def for_cycle(self, cycle_start_ns: int) -> tuple[tuple[str, ...], dict[tuple[str, str], float]]:
        usable = [e for e in self._sets if e[0] <= cycle_start_ns - self.margin_ns]
        if not usable:
            return (), {}
        _, nodes, weights = usable[-1]
        return nodes, weights
