"""Plausibility checks at intake: each planted slip is flagged, ordinary data are not."""

from __future__ import annotations

import numpy as np

from curate.ingest.plausibility import Neighbour, check_against_others, check_series
from curate.records import UncertaintyType


def codes(warnings):
    return [w.code for w in warnings]


def smooth(n=12):
    t = np.linspace(0, 60, n)
    return 20 * (1 - np.exp(-t / 15)) + 1.0


def test_clean_series_has_no_warning():
    rng = np.random.default_rng(1)
    value = smooth() + rng.normal(0, 0.3, 12)
    sd = np.abs(rng.normal(0.5, 0.1, 12))
    assert check_series(value, sd, uncertainty=UncertaintyType.SD, nonnegative=True) == []


def test_block_off_by_a_thousand_is_a_unit_slip():
    value = smooth()
    value[7:10] *= 1000
    warnings = check_series(value, None, uncertainty=None, nonnegative=True)
    assert codes(warnings) == ["unit_slip"]
    assert "point(s) 8, 9, 10 are about 10^3 times" in warnings[0].message


def test_zero_and_round_uncertainty():
    value = smooth(6)
    warnings = check_series(
        value,
        np.array([0.5, 0.0, 0.5, 0.5, 0.5, 0.5]),
        uncertainty=UncertaintyType.SD,
        nonnegative=True,
    )
    assert codes(warnings) == ["zero_sd", "round_uncertainty"]
    assert "points 2" in warnings[0].message


def test_percent_entered_as_absolute():
    value = np.array([0.5, 1.0, 2.0, 3.0, 4.0, 4.5])
    warnings = check_series(
        value, np.full(6, 10.0), uncertainty=UncertaintyType.SD, nonnegative=True
    )
    assert "percent_as_absolute" in codes(warnings)


def test_negative_concentrations_suggest_log_transform():
    value = np.log10(smooth()) - 1.0  # mostly negative, small
    warnings = check_series(value, None, uncertainty=None, nonnegative=True)
    assert codes(warnings) == ["negative_values"]
    assert "log-transformed" in warnings[0].message


def test_baseline_noise_below_zero_is_not_flagged():
    value = smooth()
    value[0] = -0.2  # noise around a zero baseline
    assert check_series(value, None, uncertainty=None, nonnegative=True) == []


def neighbour(name, magnitude, content="h", conditions="{}"):
    return Neighbour(
        dataset_id=name,
        observable="velarin",
        unit="nanomolar",
        conditions=conditions,
        lab="L",
        content_hash=content,
        magnitude=magnitude,
    )


def test_whole_series_a_thousand_times_the_others():
    warnings = check_against_others(
        observable="velarin",
        unit="nanomolar",
        relative=False,
        conditions="{}",
        content_hash="new",
        magnitude=15000.0,
        others=[neighbour("a", 14.0), neighbour("b", 16.0)],
    )
    assert codes(warnings) == ["magnitude_vs_others"]


def test_series_that_looks_log_transformed_against_others():
    warnings = check_against_others(
        observable="velarin",
        unit="nanomolar",
        relative=False,
        conditions="{}",
        content_hash="new",
        magnitude=2.0,
        others=[neighbour("a", 100.0), neighbour("b", 100.0)],
    )
    assert codes(warnings) == ["looks_log_transformed"]


def test_identical_content_under_other_conditions():
    warnings = check_against_others(
        observable="velarin",
        unit="nanomolar",
        relative=False,
        conditions='{"dose":1}',
        content_hash="same",
        magnitude=15.0,
        others=[neighbour("a", 15.0, content="same", conditions='{"dose":2}')],
    )
    assert codes(warnings) == ["identical_to_other"]


def test_a_series_orders_of_magnitude_from_its_neighbours_is_named_whatever_the_factor():
    # 10^8 is no known slip factor (10^3, 10^6), yet no lab measures the same thing that far off
    warnings = check_against_others(
        observable="velarin", unit="nanomolar", relative=False, conditions="{}",
        content_hash="new", magnitude=1.6e9, others=[neighbour("a", 14.0), neighbour("b", 16.0)],
    )  # fmt: skip
    assert codes(warnings) == ["magnitude_vs_others"]
    assert "about 10^8 times larger" in warnings[0].message and "(15 nM)" in warnings[0].message
    near = check_against_others(
        observable="velarin", unit="nanomolar", relative=False, conditions="{}",
        content_hash="new", magnitude=150.0, others=[neighbour("a", 14.0), neighbour("b", 16.0)],
    )  # fmt: skip
    assert near == []  # ten times the others is biology, not a unit


def test_round_uncertainty_is_judged_as_the_lab_wrote_it():
    # 0.02 um/min as written is 3.33e-4 um/s once converted: round as written, not converted
    value = np.linspace(0.1, 1.0, 6) / 60
    sd = np.full(6, 0.02 / 60)
    found = check_series(value, sd, uncertainty=UncertaintyType.SD, nonnegative=True,
                         sd_as_given=np.full(6, 0.02), sd_unit="um/min")  # fmt: skip
    assert "round_uncertainty" in codes(found)
    assert "the round number 0.02 um/min" in next(
        w.message for w in found if w.code == "round_uncertainty"
    )
    assert "round_uncertainty" not in codes(
        check_series(
            value,
            sd,
            uncertainty=UncertaintyType.SD,
            nonnegative=True,
            sd_as_given=np.linspace(0.011, 0.023, 6),
        )
    )


def test_identical_content_under_another_lab_is_flagged():
    # same observable and conditions but another lab: two labs never agree to the last digit
    same = [neighbour("a", 15.0, content="same")]
    common = {"observable": "velarin", "unit": "nanomolar", "relative": False,
              "conditions": "{}", "content_hash": "same", "magnitude": 15.0}  # fmt: skip
    warnings = check_against_others(**common, others=same, lab="Other Lab")
    assert codes(warnings) == ["identical_to_other"]
    assert "dataset a of L: the same measurement logged under two labs?" in warnings[0].message
    assert check_against_others(**common, others=same, lab="L") == []


def test_relative_units_skip_magnitude_comparison():
    warnings = check_against_others(
        observable="velarin",
        unit="nanomolar",
        relative=True,
        conditions="{}",
        content_hash="new",
        magnitude=15000.0,
        others=[neighbour("a", 14.0)],
    )
    assert warnings == []


def test_extreme_magnitudes_give_no_numeric_warnings():
    # found by the round-trip property test: tiny against huge magnitudes must not overflow
    for mine, theirs in ((5e-324, 1e300), (1e300, 5e-324), (1e-300, 1e-300)):
        check_against_others(
            observable="velarin",
            unit="nanomolar",
            relative=False,
            conditions="{}",
            content_hash="new",
            magnitude=mine,
            others=[neighbour("a", theirs)],
        )


def test_near_zero_baseline_at_time_zero_is_not_a_unit_slip():
    # a reporter that starts at (almost) nothing: the first point is 10^3 below the rest on a
    # log scale, which says nothing; it was flagged as "point(s) 1 are about 10^3 times the rest"
    value = np.array([0.002, 1.9, 3.1, 3.9, 4.4, 4.8, 5.0, 5.1])
    assert check_series(value, None, uncertainty=None, nonnegative=True) == []
    sd = np.array([0.04, 0.06, 0.05, 0.07, 0.05, 0.06, 0.04, 0.05])
    assert check_series(value, sd, uncertainty=UncertaintyType.SD, nonnegative=True) == []


def test_baseline_noise_around_zero_is_not_a_unit_slip():
    value = np.array([0.004, -0.003, 0.001, 2.0, 3.1, 3.5, 3.9, 4.0])
    assert codes(check_series(value, None, uncertainty=None, nonnegative=True)) == []


def test_warnings_name_points_by_their_time():
    time = np.linspace(0, 55, 12)
    value = smooth()
    value[7:10] *= 1000
    warnings = check_series(value, None, uncertainty=None, nonnegative=True, time=time,
                            time_unit="min")  # fmt: skip
    assert warnings[0].message.startswith("point(s) at t = 35, 40, 45 min are about 10^3 times")
    sd = np.array([0.5, 0.0, 0.5, 0.5, 0.5, 0.5])
    zero = check_series(smooth(6), sd, uncertainty=UncertaintyType.SD, nonnegative=True,
                        time=np.array([0.0, 2.5, 5, 7.5, 10, 12.5]), time_unit="h")  # fmt: skip
    assert "uncertainty exactly 0 at 1 point(s) (t = 2.5 h)" in zero[0].message


def test_block_far_below_the_rest_is_a_slip_when_its_sd_shows_it_is_not_zero():
    # three points entered in uM among nM values: a reported sd says they are well above zero
    value = smooth() * 10
    value[3:6] /= 1000
    sd = np.abs(value) * 0.05
    warnings = check_series(value, sd, uncertainty=UncertaintyType.SD, nonnegative=True,
                            time=np.arange(12.0) * 5, time_unit="min")  # fmt: skip
    assert codes(warnings) == ["unit_slip"]
    assert "t = 15, 20, 25 min are about 10^3 times smaller than the rest" in warnings[0].message
