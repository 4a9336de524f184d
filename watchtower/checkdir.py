"""The collector's directory of pair-check listeners: daemons say where theirs is (CHECK_HELLO) and get back
every listener known, with the pairs the schedule should favour (CHECK_PEERS).

The weights come from the checks already received (uncertain and suspected pairs,
``analysis.checks.check_weights``) and from the job's own recent throughput (a pair far below the others
is suspected, ``job_suspects``), recomputed at most every ``WEIGHTS_EVERY_S``; the stamp changes only
when the list or the weights do, so daemons that fetch at different moments plan their cycles alike.
"""

from __future__ import annotations

from agent import wire
from watchtower.analysis.checks import check_weights, job_suspects
from watchtower.store import Store

WEIGHTS_EVERY_S = 10.0
MAX_WEIGHTS = 256  # the heaviest pairs sent; the wire allows 4096


class CheckDirectory:
    def __init__(self, store: Store, sender: int) -> None:
        self.store = store
        self.sender = sender
        self.endpoints: dict[str, str] = {}
        self.weights: tuple[tuple[str, str, float], ...] = ()
        self.stamp_ns = 0
        self._weighed_ns = 0

    def answer(self, hello: wire.CheckHello, now_ns: int, seq: int) -> list[bytes]:
        """Record a daemon's listener; the CHECK_PEERS frames to send back to it."""
        changed = self.endpoints.get(hello.node) != hello.endpoint
        if len(self.endpoints) < wire.MAX_CHECK_PEERS or hello.node in self.endpoints:
            self.endpoints[hello.node] = hello.endpoint
        if now_ns - self._weighed_ns >= WEIGHTS_EVERY_S * 1e9:
            self._weighed_ns = now_ns
            weights = check_weights(self.store.checks(), tuple(n.name for n in self.store.nodes),
                                    job_suspects(self.store.recent_link_rates()))
            weights = tuple(sorted(weights, key=lambda w: -w[2])[:MAX_WEIGHTS])
            changed |= weights != self.weights
            self.weights = weights
        if changed:
            self.stamp_ns = now_ns
        return wire.encode_check_peers(self.sender, seq, now_ns, peers=sorted(self.endpoints.items()),
                                       weights=self.weights, stamp_ns=self.stamp_ns)
