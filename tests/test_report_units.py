"""The units module and the metric catalogue: one spelling per figure, right at every boundary.

Binary prefixes are IEC 60027-2 (KiB = 1024 B); SI prefixes are the BIPM's (k = 1000).
Three significant digits and "round, then choose the unit" are common practice, no
source. Every row is (input, expected text) worked out by hand.
"""

from __future__ import annotations

import math

import pytest

from gate import metrics, units

KIB, MIB, GIB = 1024, 1024 ** 2, 1024 ** 3

BYTES_CASES = [
    (0, "0 B"), (1, "1 B"), (512, "512 B"), (1023, "1023 B"), (1024, "1.00 KiB"),
    (1536, "1.50 KiB"), (1023.95 * KIB, "1.00 MiB"), (1023.94 * KIB, "1.00 MiB"),
    (1023.4 * KIB, "1023 KiB"), (MIB - 1, "1.00 MiB"), (5.06 * MIB, "5.06 MiB"),
    (1023.95 * MIB, "1.00 GiB"), (999.5, "1000 B"), (1023.7, "1.00 KiB"),
    (-1536, "-1.50 KiB"), (9.995 * KIB, "10.0 KiB"), (99.95 * KIB, "100 KiB"),
]
COUNT_CASES = [
    (0, "0"), (950, "950"), (999, "999"), (999.4, "999"), (999.95, "1.00 k"), (1000, "1.00 k"),
    (1234, "1.23 k"), (9995, "10.0 k"), (99_950, "100 k"), (999_950, "1.00 M"),
    (999_949_999, "1.00 G"), (33.2e6, "33.2 M"), (-999.95, "-1.00 k"), (0.5, "0.5"),
]
SECONDS_CASES = [
    (0, "0 s"), (1.2, "1.20 s"), (999.95e-3, "1.00 s"), (2.41e-3, "2.41 ms"),
    (999.96e-6, "1.00 ms"), (9.25e-6, "9.25 us"), (999.95e-9, "1.00 us"), (1e-9, "1.00 ns"),
    (-1.05e-3, "-1.05 ms"),
]
JOULES_CASES = [
    (0, "0 J"), (1.15e-3, "1.15 mJ"), (471e-6, "471 uJ"), (999.96e-9, "1.00 uJ"),
    (999.4e-9, "999 nJ"), (1e-12, "1.00 pJ"), (999.95e-3, "1.00 J"),
]
SHARE_CASES = [
    (0, "0.0%"), (0.875, "87.5%"), (1, "100.0%"), (-0.0, "0.0%"), (0.00001, "<0.1%"),
    (0.212, "21.2%"), (0.9999, "100.0%"),
]
POINTS_CASES = [
    (0, "0 pp"), (-0.08, "-8.0 pp"), (0.0004, "+0.04 pp"), (-0.0004, "-0.04 pp"),
    (-0.00000001, "-<0.01 pp"), (-0.0000001 * 0, "0 pp"), (0.00095, "+0.1 pp"),
]
RATIO_CASES = [
    (0, "0%"), (0.774, "+77.4%"), (-0.566, "-56.6%"), (31.0, "+3100%"), (0.005, "+0.5%"),
    (-0.00001, "-<0.01%"), (0.9995, "+100%"), (0.0004, "+0.04%"),
]


@pytest.mark.parametrize(("value", "text"), BYTES_CASES)
def test_bytes(value: float, text: str) -> None:
    assert units.fmt_bytes(value) == text


@pytest.mark.parametrize(("value", "text"), COUNT_CASES)
def test_counts(value: float, text: str) -> None:
    assert units.fmt_count(value) == text


@pytest.mark.parametrize(("value", "text"), SECONDS_CASES)
def test_seconds(value: float, text: str) -> None:
    assert units.fmt_seconds(value) == text


@pytest.mark.parametrize(("value", "text"), JOULES_CASES)
def test_joules(value: float, text: str) -> None:
    assert units.fmt_joules(value) == text


@pytest.mark.parametrize(("value", "text"), SHARE_CASES)
def test_shares(value: float, text: str) -> None:
    assert units.fmt_share(value) == text


@pytest.mark.parametrize(("value", "text"), POINTS_CASES)
def test_percentage_points(value: float, text: str) -> None:
    assert units.fmt_points(value) == text


@pytest.mark.parametrize(("value", "text"), RATIO_CASES)
def test_relative_changes(value: float, text: str) -> None:
    assert units.fmt_ratio_change(value) == text


def test_rates_carry_their_unit_after_the_prefix() -> None:
    assert units.fmt_count(2.048e12, "FLOP/s") == "2.05 TFLOP/s"
    assert units.fmt_count(999.95e9, "B/s") == "1.00 TB/s"
    assert units.fmt_count(768, "FLOP") == "768 FLOP"


@pytest.mark.parametrize("formatter", [units.fmt_bytes, units.fmt_count, units.fmt_seconds,
                                       units.fmt_joules, units.fmt_share, units.fmt_points,
                                       units.fmt_ratio_change, units.fmt_plain])
def test_unknown_is_a_question_mark_everywhere(formatter: object) -> None:
    assert formatter(None) == "?"  # type: ignore[operator]
    assert formatter(math.nan) == "?"  # type: ignore[operator]


@pytest.mark.parametrize("formatter", [units.fmt_bytes, units.fmt_count, units.fmt_seconds,
                                       units.fmt_joules, units.fmt_share, units.fmt_points,
                                       units.fmt_ratio_change, units.fmt_plain])
@pytest.mark.parametrize("tiny", [-1e-30, -0.0, -1e-7, -0.0004])
def test_no_negative_zero(formatter: object, tiny: float) -> None:
    text = formatter(tiny)  # type: ignore[operator]
    digits = [c for c in text if c.isdigit()]
    assert not (text.startswith("-") and set(digits) <= {"0"}), text


def test_no_thousand_of_a_unit_across_a_sweep() -> None:
    """No value anywhere on the ladders prints as 1000 of a decimal unit or 1024 of a binary
    one: the sweep crosses every boundary from both sides."""
    for exponent in range(-15, 16):
        for mantissa in (0.99949, 0.9995, 0.99951, 0.999999, 1.0, 1.00001):
            value = mantissa * 10.0 ** exponent
            for text in (units.fmt_count(value), units.fmt_seconds(value),
                         units.fmt_joules(value)):
                number, _, unit = text.partition(" ")
                assert not (unit and unit not in ("s", "J") and number.lstrip("-") == "1000"), \
                    (value, text)
    for power in range(5):
        for mantissa in (1023.4, 1023.5, 1023.95, 1023.99, 1024.0, 1024.5):
            text = units.fmt_bytes(mantissa * 1024.0 ** power)
            assert not text.startswith("1024 "), text


def test_metric_catalogue_formats_by_quantity() -> None:
    assert metrics.fmt("param_bytes", 1536) == "1.50 KiB"
    assert metrics.fmt("latency_s", 2.41e-3) == "2.41 ms"
    assert metrics.fmt("energy_j", 1.15e-3) == "1.15 mJ"
    assert metrics.fmt("utilization", 0.212) == "21.2%"
    assert metrics.fmt("achieved_flops_per_s", 2.05e12) == "2.05 TFLOP/s"
    assert metrics.fmt("arithmetic_intensity", 60.24) == "60.2 FLOP/B"
    assert metrics.fmt("latency_s", None) == "?"
    # an uncatalogued field another stage adds is formatted by its unit suffix
    assert metrics.fmt("fused_group_bytes", 2048) == "2.00 KiB"
    assert metrics.label("fused_group_bytes") == "fused group"


def test_one_label_per_metric() -> None:
    labels = [info.label for info in metrics.CATALOGUE.values()]
    assert len(labels) == len(set(labels))
    assert metrics.label("utilization") == "PE utilization"
    assert metrics.phrase("latency_s") == "latency [latency_s]"


def test_change_wording_and_direction() -> None:
    assert metrics.fmt_change("latency_s", 1.36e-3, 2.41e-3) == "worse by 1.05 ms (+77.2%)"
    assert metrics.fmt_change("latency_s", 29.6e-3, 12.9e-3) == "better by 16.7 ms (-56.4%)"
    assert metrics.fmt_change("utilization", 0.292, 0.212) == "worse by 8.0 pp"
    assert metrics.fmt_change("macs", 100, 200) == "up by 100 (+100%)"
    assert metrics.fmt_change("param_bytes", 0, 1536) == "worse by 1.50 KiB (from zero)"
    assert metrics.fmt_change("latency_s", 1.0, 1.0 + 1e-12) == "unchanged"
    assert metrics.fmt_change("latency_s", None, 1.0) == "?"
    assert metrics.fmt_signed("utilization", 0.292, 0.212) == "-8.0 pp"
    assert metrics.fmt_signed("param_bytes", 0, 1536) == "+1.50 KiB"


def test_one_change_tolerance_for_every_report() -> None:
    """+0.5% latency is a change everywhere (not 'unchanged' in one report and 'worse' in
    another); float noise of a stored baseline is not."""
    assert not metrics.unchanged("latency_s", 1.0, 1.005)
    assert metrics.direction("latency_s", 1.0, 1.005) == "worse"
    assert metrics.unchanged("latency_s", 1.0, 1.0 + 1e-12)
    assert metrics.unchanged("macs", 3, 3) and not metrics.unchanged("macs", 3, 4)


def test_impact_ranks_by_absolute_change() -> None:
    """A conv +1.67 ms outranks a Relu +0.045 ms even though the Relu grew +3100%."""
    conv = metrics.impact("latency_s", 0.56e-3, 2.23e-3)
    relu = metrics.impact("latency_s", 1.45e-6, 46.45e-6)
    assert conv > relu
