"""Loss accounting: gaps, late arrivals and duplicates per sender."""

from __future__ import annotations

from hypothesis import given
from hypothesis import strategies as st

from watchtower.ledger import Ledger


def test_gaps_late_frames_and_duplicates() -> None:
    ledger = Ledger()
    for seq in [0, 1, 4, 5, 2, 5, 9]:
        ledger.accept(7, seq)
    sender = ledger.senders[7]
    # sent 0..9; received 0,1,2,4,5,9 once (5 twice): missing 3,6,7,8
    assert (sender.received, sender.missing, sender.duplicates) == (6, 4, 1)


def test_a_sender_first_heard_late_is_missing_its_first_frames() -> None:
    ledger = Ledger()
    ledger.accept(1, 10)
    assert ledger.missing == 10 and ledger.frames == 1


@given(st.lists(st.booleans(), min_size=1, max_size=300), st.randoms(use_true_random=False))
def test_missing_equals_frames_never_delivered(delivered: list[bool], rng: object) -> None:
    """Whatever subset arrives, in whatever order within a bounded shuffle, the count is exact."""
    arrivals = [seq for seq, ok in enumerate(delivered) if ok]
    rng.shuffle(arrivals)  # type: ignore[attr-defined]
    ledger = Ledger()
    for seq in arrivals:
        ledger.accept(3, seq)
    highest = max(arrivals, default=-1)
    assert ledger.missing == sum(not ok for ok in delivered[: highest + 1])
    assert ledger.frames == len(arrivals)
