"""Pure pieces of the console: number formatting, the redraw throttle, topic and subject matching."""

from __future__ import annotations

import pytest

from watchtower.console import format as fmt
from watchtower.console.alerts import next_check, subject_link
from watchtower.console.howto import find_topic
from watchtower.console.matrix import shade
from watchtower.console.throttle import Throttle

from .conftest import FakeClock
from .scenario import make_snapshot


@pytest.mark.parametrize(
    ("value", "shown"),
    [(1.234e9, "1.23 GB/s"), (12.5e9, "12.5 GB/s"), (850e6, "850 MB/s"), (None, "—"), (0.0, "0.00 B/s")],
)
def test_rate(value: float | None, shown: str) -> None:
    assert fmt.rate(value) == shown


@pytest.mark.parametrize(
    ("value", "shown"),
    [(3.4e-3, "3.40 ms"), (1.2e-5, "12.0 µs"), (2.5, "2.50 s"), (0, "0.00 s"), (None, "—"), (150.0, "150 s")],
)
def test_seconds(value: float | None, shown: str) -> None:
    assert fmt.seconds(value) == shown


def test_durations_counts_and_signs() -> None:
    assert fmt.duration(11_520) == "3h 12m"
    assert fmt.duration(200_000) == "2d 7h"
    assert fmt.duration(65) == "1m 05s"
    assert fmt.count(48213) == "48,213"
    assert fmt.number(-6.3) == "−6.3"
    assert fmt.signed_seconds(-2e-5) == "−20.0 µs"
    assert fmt.percent(0.7084) == "71%"


def test_sparkline_and_ranges() -> None:
    assert fmt.sparkline([1.0, 2.0, 3.0], 10) == "▁▅█"
    assert fmt.sparkline([5.0, 5.0], 10) == "▅▅"
    assert fmt.sparkline([1.0, 2.0, 3.0, 4.0], 2) == "▁█"
    assert fmt.ranges([0, 1, 2, 3, 8, 10, 11]) == "0–3,8,10–11"
    assert fmt.ranges([]) == ""


def test_split_bar_scales_both_parts() -> None:
    assert fmt.split_bar(1.0, 1.0, 4.0, 8) == ("██", "░░")
    assert fmt.split_bar(4.0, 4.0, 4.0, 8) == ("█" * 8, "")
    assert fmt.split_bar(1.0, 1.0, 0.0, 8) == ("", "")


def test_shade_levels() -> None:
    assert [shade(b, 8.0) for b in (0.5, 2.5, 4.5, 7.9, 8.0, None)] == [0, 1, 2, 3, 3, None]


def test_throttle_releases_at_most_once_per_interval() -> None:
    clock = FakeClock()
    throttle: Throttle[int] = Throttle(0.25, clock)
    throttle.offer(1)
    assert throttle.take() == 1
    throttle.offer(2)
    throttle.offer(3)
    assert throttle.take() is None and throttle.pending
    assert throttle.wait_s() == pytest.approx(0.25)
    clock.advance(0.1)
    assert throttle.take() is None and throttle.wait_s() == pytest.approx(0.15)
    clock.advance(0.15)
    assert throttle.take() == 3 and not throttle.pending
    assert throttle.take() is None


def test_find_topic_prefers_exact_then_suffix() -> None:
    keys = ["efficiency.load_balance", "comm_fraction_worst", "comm_fraction", "links.score"]
    assert find_topic(keys, ["comm_fraction"]) == "comm_fraction"
    assert find_topic(keys, ["load_balance"]) == "efficiency.load_balance"
    assert find_topic(keys, ["nothing", "score"]) == "links.score"
    assert find_topic(keys, ["nothing"]) is None


def test_alert_subject_finds_its_link_and_check_defers_to_operators() -> None:
    snapshot = make_snapshot()
    link_alert, job_alert = snapshot["alerts"]
    link = subject_link(link_alert, snapshot["links"])
    assert link is not None and (link["src"], link["dst"]) == ("node-c", "node-d")
    assert subject_link({**link_alert, "subject": "node-c -> node-d"}, snapshot["links"]) is link
    assert subject_link(job_alert, snapshot["links"]) is None
    advice = next_check(link_alert, link).plain
    assert "node-c out" in advice and "operators" in advice and "vendor" in advice
    assert "operators" in next_check(job_alert, None).plain


def test_short_names_drop_the_shared_prefix_up_to_a_separator() -> None:
    assert fmt.short_names([f"qvx-{i:02d}" for i in (1, 2, 3)]) == {"qvx-01": "01", "qvx-02": "02",
                                                                         "qvx-03": "03"}
    assert fmt.short_names(["node0", "node1"]) == {"node0": "node0", "node1": "node1"}  # no separator: kept
    assert fmt.short_names(["rack1.gpu1", "rack2.gpu1"]) == {"rack1.gpu1": "rack1.gpu1", "rack2.gpu1": "rack2.gpu1"}
    assert fmt.short_names(["solo"]) == {"solo": "solo"}


@pytest.mark.parametrize(
    ("value", "shown"),
    [(11_702_108_160, "11.7 GB"), (999, "999 B"), (1_500_000, "1.50 MB"), (None, "—")],
)
def test_sizes_in_decimal_units_never_raw_byte_counts(value: int | None, shown: str) -> None:
    assert fmt.size(value) == shown


def test_counts_agree_with_their_noun_and_zero_keeps_its_unit() -> None:
    assert fmt.counted(1, "alert") == "1 alert" and fmt.counted(3, "alert") == "3 alerts"
    assert fmt.counted(4096, "rank") == "4,096 ranks"
    assert fmt.signed_seconds(0.0) == fmt.seconds(0.0) == "0.00 s"  # no "+0 s" beside "+1.20 ms"
    # ...and among milliseconds a zero is "0.00 ms", not "0.00 s": it takes its column's unit
    assert fmt.signed_seconds(0.0, like=1.2e-3) == fmt.seconds(0.0, like=0.162) == "0.00 ms"
    assert fmt.seconds(0.0, like=3.4e-5) == "0.00 µs" and fmt.seconds(0.0, like=2.5) == "0.00 s"
    assert fmt.signed_seconds(1.2e-3) == "+1.20 ms"


def test_declared_widths_hold_every_figure_so_a_unit_is_never_cut() -> None:
    # Across twenty-two decades, the widest text each formatter gives fits the width its columns are given.
    magnitudes = [m * 10.0**e for e in range(-9, 13) for m in (1.0, 9.994, 9.996, 99.94, 99.96, 999.4, 999.6)]
    assert max(len(fmt.rate(v)) for v in magnitudes if v < 1e15) <= fmt.RATE_WIDTH
    assert max(len(fmt.seconds(v)) for v in magnitudes if v < 1e3) <= fmt.SECONDS_WIDTH
    assert max(len(fmt.signed_seconds(-v)) for v in magnitudes if v < 1e3) <= fmt.SIGNED_SECONDS_WIDTH
    assert max(len(fmt.percent(v / 1e3)) for v in range(0, 1001)) <= fmt.PERCENT_WIDTH
    assert max(len(fmt.hours(v)) for v in (0.0, 9.94, 9.96, 99.6, 999.6, 9999.4)) <= fmt.HOURS_WIDTH
