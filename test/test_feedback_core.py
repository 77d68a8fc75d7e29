# SPDX-License-Identifier: Apache-2.0
"""Core of the task feedback (ROS-free): filters, the feature table and the feedback parser."""
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import signal

from adaptive_streamer.core.feedback import (FeatureTable, FeedbackError, FeedbackParser,
                                             FilterBank, FilterSpec, InputSpec, Verdict,
                                             design_filter, parse_feedback)


def _input(name="edge", features=("y",), scale=None, offset=None, max_age=0.2,
           filt=FilterSpec()):
    n = len(features)
    return InputSpec(name, tuple(features), tuple(scale or [1.0] * n),
                     tuple(offset or [0.0] * n), max_age, filt)


# ---------------------------------------------------------------------------- filters
@pytest.mark.parametrize("order", [1, 2, 4])
def test_butter_design_is_minus_3db_at_cutoff_and_unity_at_dc(order):
    b, a = design_filter(FilterSpec("butter", order, 8.0, 100.0))
    _, h = signal.freqz(b, a, worN=[0.0, 8.0], fs=100.0)
    # Butterworth response: |H| = 1 at DC and 1/sqrt(2) at the cutoff for every order
    # (S. Butterworth, "On the Theory of Filter Amplifiers", Wireless Engineer 7, 1930;
    # property from memory). The bilinear design keeps it at the (prewarped) cutoff.
    assert abs(h[0]) == pytest.approx(1.0, abs=1e-9)
    assert abs(h[1]) == pytest.approx(1.0 / math.sqrt(2.0), abs=1e-9)


@pytest.mark.parametrize("order", [1, 2, 3, 4])
def test_filter_bank_sample_by_sample_matches_scipy_lfilter(order):
    rng = np.random.default_rng(order)
    x = np.stack([1.0 + 0.1 * rng.standard_normal(60),
                  np.r_[np.zeros(20), np.ones(40)] - 3.0])
    spec = FilterSpec("butter", order, 5.0, 50.0)
    bank = FilterBank(spec, 2)
    out = np.stack([bank.start(x[:, 0])] + [bank.step(x[:, i]) for i in range(1, x.shape[1])],
                   axis=1)
    # Reference: scipy.signal.lfilter over the whole record, started at steady state for the
    # first sample (scipy.signal.lfilter_zi), one feature at a time.
    b, a = signal.butter(order, 5.0, fs=50.0)
    zi = signal.lfilter_zi(b, a)
    for f in range(2):
        ref, _ = signal.lfilter(b, a, x[f], zi=zi * x[f, 0])
        np.testing.assert_allclose(out[f], ref, rtol=0, atol=1e-12)


def test_filter_bank_none_passes_through():
    bank = FilterBank(FilterSpec("none"), 3)
    assert bank.passthrough
    np.testing.assert_array_equal(bank.start(np.array([1.0, 2.0, 3.0])), [1.0, 2.0, 3.0])
    np.testing.assert_array_equal(bank.step(np.array([4.0, 5.0, 6.0])), [4.0, 5.0, 6.0])


@pytest.mark.parametrize("spec, message", [
    (FilterSpec("bessel2"), "edge: unknown filter 'bessel2'; expected one of none, butter"),
    (FilterSpec("butter", 0, 5.0, 50.0), "edge: filter order must be an integer in 1..8, got 0"),
    (FilterSpec("butter", 9, 5.0, 50.0), "edge: filter order must be an integer in 1..8, got 9"),
    (FilterSpec("butter", 2.5, 5.0, 50.0),
     "edge: filter order must be an integer in 1..8, got 2.5"),
    (FilterSpec("butter", 2, 5.0, 0.0),
     "edge: sample_rate_hz must be positive (the rate the sensor publishes at), got 0.0"),
    (FilterSpec("butter", 2, 25.0, 50.0),
     "edge: cutoff_hz must be above 0 and below half of sample_rate_hz (25 Hz), got 25.0"),
    (FilterSpec("butter", 2, 0.0, 50.0),
     "edge: cutoff_hz must be above 0 and below half of sample_rate_hz (25 Hz), got 0.0"),
    (FilterSpec("butter", 8, 1.0, 1000.0),
     "edge: a Butterworth filter of order 8 at 1 Hz / 1000 Hz is numerically unstable; "
     "lower the order or raise the cutoff"),
])
def test_bad_filter_settings_are_refused_with_a_clear_message(spec, message):
    with pytest.raises(FeedbackError) as err:
        design_filter(spec, "edge")
    assert str(err.value) == message


# ---------------------------------------------------------------------------- inputs / table
@pytest.mark.parametrize("kwargs, message", [
    (dict(features=()), "input 'edge': no features given"),
    (dict(features=("y", "y")), "input 'edge': feature 'y' is listed twice"),
    (dict(features=("y", "z"), scale=[1.0]),
     "input 'edge': scale has 1 values but there are 2 features (give one per feature)"),
    (dict(offset=[math.nan]), "input 'edge': offset values must be finite, got [nan]"),
    (dict(max_age=0.0), "input 'edge': max_age must be a positive number of seconds, got 0.0"),
    (dict(filt=FilterSpec("butter", 2, 30.0, 50.0)),
     "input 'edge': cutoff_hz must be above 0 and below half of sample_rate_hz (25 Hz), "
     "got 30.0"),
])
def test_bad_input_specs_name_the_input(kwargs, message):
    with pytest.raises(FeedbackError) as err:
        _input(**kwargs)
    assert str(err.value) == message


def test_feature_names_must_be_unique_across_inputs():
    with pytest.raises(FeedbackError, match="feature 'y' is produced by inputs 'edge' and "
                                            "'angle'; feature names must be unique"):
        FeatureTable([_input("edge", ("y",)), _input("angle", ("a", "y"))])
    with pytest.raises(FeedbackError, match="input 'edge' is listed twice"):
        FeatureTable([_input("edge", ("y",)), _input("edge", ("z",))])


def test_scale_and_offset_convert_units():
    table = FeatureTable([_input("edge", ("y_m", "angle_rad"), scale=[0.001, math.pi / 180.0],
                                 offset=[0.0, 0.0], max_age=1.0)])
    assert table.update(0, [12.5, 90.0], 10.0, 10.0) is Verdict.ACCEPTED
    # 12.5 mm = 0.0125 m; 90 deg = pi/2 rad (SI unit definitions, common practice).
    np.testing.assert_allclose(table.snapshot(10.0).values, [0.0125, math.pi / 2], rtol=1e-15)


def test_staleness_and_oldest_valid_stamp():
    table = FeatureTable([_input("edge", ("y",), max_age=0.2),
                          _input("angle", ("a", "b"), max_age=1.0)])
    assert table.names == ("y", "a", "b")
    s = table.snapshot(9.0)
    assert np.isnan(s.values).all() and s.stamp is None and not s.fresh.any()
    assert table.update(0, [1.0], 10.0, 10.0) is Verdict.ACCEPTED
    assert table.update(1, [2.0, 3.0], 9.95, 10.0) is Verdict.ACCEPTED
    s = table.snapshot(10.1)
    np.testing.assert_array_equal(s.values, [1.0, 2.0, 3.0])
    assert s.stamp == 9.95 and s.fresh.tolist() == [True, True]
    s = table.snapshot(10.25)          # edge is 0.25 s old > 0.2 s
    assert np.isnan(s.values[0]) and s.values[1:].tolist() == [2.0, 3.0]
    assert s.stamp == 9.95
    assert table.update(1, [4.0, 5.0], 10.3, 10.3) is Verdict.ACCEPTED
    assert table.snapshot(10.3).stamp == 10.3     # oldest *valid* stamp: edge no longer counts
    s = table.snapshot(11.5)
    assert np.isnan(s.values).all() and s.stamp is None
    assert table.counters(0).stale_events == 1 and table.counters(1).stale_events == 1
    assert table.age(0, 11.5) == pytest.approx(1.5)


def test_dropped_samples_are_counted_and_never_stored():
    table = FeatureTable([_input("edge", ("y", "z"), max_age=0.2)])
    assert table.update(0, [1.0, 2.0], 10.0, 10.0) is Verdict.ACCEPTED
    assert table.update(0, [math.nan, 2.0], 10.01, 10.01) is Verdict.NOT_FINITE
    assert table.update(0, [1.0, math.inf], 10.01, 10.01) is Verdict.NOT_FINITE
    assert table.update(0, [7.0, 7.0], 0.0, 10.01) is Verdict.BAD_STAMP          # unset stamp
    assert table.update(0, [7.0, 7.0], 10.5, 10.01) is Verdict.BAD_STAMP         # future
    assert table.update(0, [7.0, 7.0], 9.99, 10.01) is Verdict.BAD_STAMP         # out of order
    assert table.update(0, [7.0, 7.0], 9.5, 10.01) is Verdict.LATE
    assert table.update(0, [7.0], 10.01, 10.01) is Verdict.MALFORMED
    table.reject_malformed(0)
    np.testing.assert_array_equal(table.snapshot(10.02).values, [1.0, 2.0])
    c = table.counters(0)
    assert (c.received, c.accepted, c.dropped_nan, c.dropped_stamp, c.dropped_late,
            c.dropped_malformed) == (9, 1, 2, 3, 1, 2)


def test_filter_restarts_after_the_input_went_stale():
    spec = FilterSpec("butter", 2, 2.0, 50.0)
    table = FeatureTable([_input("edge", ("y",), max_age=0.1, filt=spec)])
    table.update(0, [0.0], 1.0, 1.0)
    first = table.update(0, [1.0], 1.02, 1.02), table.snapshot(1.02).values[0]
    assert first[0] is Verdict.ACCEPTED and 0.0 < first[1] < 0.5   # low-passed step
    assert table.update(0, [1.0], 2.0, 2.0) is Verdict.ACCEPTED    # after a 1 s gap
    assert table.snapshot(2.0).values[0] == pytest.approx(1.0, abs=1e-12)  # restarted


def test_clock_jumping_back_restarts_the_input():
    table = FeatureTable([_input("edge", ("y",), max_age=0.2)])
    table.update(0, [1.0], 100.0, 100.0)
    assert table.update(0, [2.0], 5.0, 5.0) is Verdict.ACCEPTED   # e.g. a bag replay restarted
    assert table.snapshot(5.0).values[0] == 2.0


# ---------------------------------------------------------------------------- parser
def test_parser_orders_features_and_flags_missing_or_invalid():
    parser = FeedbackParser(["angle", "edge", "gap"])
    fv = parser.parse(["edge", "angle", "height"], [0.5, math.nan, 2.0], 12.25)
    assert fv.names == ("angle", "edge", "gap")
    assert fv.valid.tolist() == [False, True, False]
    assert np.isnan(fv.values[[0, 2]]).all() and fv.values[1] == 0.5
    assert fv.stamp == 12.25 and not fv.all_valid
    fv = parser.parse(["gap", "edge", "angle"], [3.0, 1.0, 2.0], 13.0)   # name order changed
    np.testing.assert_array_equal(fv.values, [2.0, 1.0, 3.0])
    assert fv.all_valid
    fv = parser.parse([], [], 0.0)
    assert fv.stamp is None and not fv.valid.any()


def test_parser_errors():
    with pytest.raises(FeedbackError, match=r"requested feedback features repeat: \['a'\]"):
        FeedbackParser(["a", "b", "a"])
    parser = FeedbackParser(["a"])
    with pytest.raises(FeedbackError, match="feedback message has 2 names but 1 values"):
        parser.parse(["a", "b"], [1.0], 1.0)
    with pytest.raises(FeedbackError, match="feedback message names feature 'a' twice"):
        parser.parse(["a", "a"], [1.0, 2.0], 1.0)


@settings(max_examples=40, deadline=None)
@given(st.permutations(["f0", "f1", "f2", "f3", "f4"]), st.lists(
    st.floats(allow_nan=True, allow_infinity=False, width=64), min_size=5, max_size=5))
def test_parser_reads_by_name_whatever_the_message_order(order, values):
    sent = dict(zip(order, values))
    fv = parse_feedback(order, values, 1.0, ["f4", "f0", "f2"])
    for i, name in enumerate(["f4", "f0", "f2"]):
        expected = sent[name]
        assert fv.valid[i] == (not math.isnan(expected))
        if fv.valid[i]:
            assert fv.values[i] == expected


def test_table_snapshot_round_trips_through_the_parser():
    table = FeatureTable([_input("edge", ("y",), max_age=0.2),
                          _input("angle", ("a",), max_age=1.0)])
    table.update(0, [1.5], 10.0, 10.0)
    table.update(1, [-0.5], 10.1, 10.1)
    s = table.snapshot(10.15)
    fv = parse_feedback(s.names, s.values.tolist(), s.stamp, ["a", "y"])
    assert fv.values.tolist() == [-0.5, 1.5] and fv.stamp == 10.0
