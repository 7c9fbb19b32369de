"""Raw optical quadrature channels: thresholds, Gray decoding, lost counts."""

import cv2
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_array_equal

from vidodo.quadrature import (
    GRAY_SEQUENCE,
    decode_raw,
    decode_states,
    otsu_threshold,
    threshold_channel,
)

DARK, LIGHT = 0.18, 0.82  # reflectance of the two stripe colours (invented, any two levels)


def disc_readings(angle_rad, stripes=14, offset_frac=0.5, noise=0.0, rng=None):
    """Two reflectance sensors over a disc of ``stripes`` alternating stripes.

    Sensor B sits ``offset_frac`` of one stripe's width ahead of sensor A (half a stripe
    puts the two square waves in quadrature, common practice). Which sensor leads sets
    the sign of the counts; the profile's ``sign`` key fixes it per wheel.
    """
    width = 2 * np.pi / stripes

    def sensor(theta):
        return np.where(np.floor(theta / width).astype(np.int64) % 2 == 0, DARK, LIGHT)

    a = sensor(angle_rad)
    b = sensor(angle_rad + offset_frac * width)
    if noise:
        a = a + rng.normal(0, noise, a.shape)
        b = b + rng.normal(0, noise, b.shape)
    return a, b


def states_from_positions(pos):
    seq = np.array(GRAY_SEQUENCE, dtype=bool)
    s = seq[np.mod(pos, 4)]
    return s[:, 0], s[:, 1]


def test_gray_sequence_reverses_with_direction():
    """00 -> 01 -> 11 -> 10 counts up; the same states in reverse count down
    (four-state quadrature decoding, common practice)."""
    a, b = states_from_positions(np.arange(0, 13))
    counts, direction, bad = decode_states(a, b)
    assert_array_equal(counts, np.arange(13))
    assert set(direction[1:].tolist()) == {1}
    counts_r, direction_r, _ = decode_states(a[::-1], b[::-1])
    assert_array_equal(counts_r, -np.arange(13))
    assert set(direction_r[1:].tolist()) == {-1}
    assert bad.size == 0
    # swapping the two channels also reverses the direction (common practice)
    assert decode_states(b, a)[0][-1] == -12


@pytest.mark.parametrize("revs", [1.0, -1.0, 3.0])
def test_fourteen_stripe_disc_gives_28_counts_per_revolution(revs):
    """A disc with 14 alternating stripes read by two sensors half a stripe apart gives
    28 counts per revolution, each sensor seeing 14 edges (common practice)."""
    rng = np.random.default_rng(7)  # seed fixed: the noise below is reproducible
    t = np.linspace(0.0, 1.0, 4001)
    theta = 0.01 + 2 * np.pi * revs * (t - 0.3 * np.sin(2 * np.pi * t) / (2 * np.pi))
    a, b = disc_readings(theta, noise=0.04, rng=rng)
    res = decode_raw(a, b, t)
    assert res.counts[-1] - res.counts[0] == round(28 * revs)
    assert res.illegal == 0
    assert not res.warnings
    for ch in res.channels:
        assert DARK < ch.threshold < LIGHT


def test_otsu_matches_opencv():
    """Otsu threshold of a bimodal 8-bit sample against OpenCV's THRESH_OTSU
    (independent implementation of Otsu, IEEE T-SMC 1979)."""
    rng = np.random.default_rng(3)  # fixed seed
    v = np.concatenate([rng.normal(60, 12, 3000), rng.normal(170, 20, 1500), [0, 255]])
    v8 = np.clip(np.round(v), 0, 255).astype(np.uint8)
    ref, _ = cv2.threshold(v8.reshape(1, -1), 0, 255, cv2.THRESH_BINARY + cv2.THRESH_OTSU)
    ours, sep = otsu_threshold(v8.astype(float))
    # OpenCV puts values <= ref in class 0; ours puts values < ours there
    assert abs(ours - (ref + 1)) <= 1.0
    assert sep > 0.8


def test_hysteresis_ignores_noise_near_threshold():
    """A reading wandering just around the threshold inside the band does not chatter."""
    v = np.r_[np.full(100, DARK), 0.5 + 0.05 * np.sin(np.arange(20)), np.full(100, LIGHT),
              np.full(100, DARK)]
    states, info = threshold_channel(v)
    assert info.low < 0.45 and info.high > 0.55
    changes = np.count_nonzero(np.diff(states.astype(int)))
    assert changes == 2


def test_binary_states_pass_through():
    a, b = states_from_positions(np.r_[0:9, 8:-3:-1])
    res = decode_raw(a.astype(float), b.astype(float))
    assert res.channels[0].binary and res.channels[1].binary
    assert res.counts[8] == 8 and res.counts[-1] == -2


def test_channel_without_two_levels_is_not_moving():
    rng = np.random.default_rng(11)  # fixed seed
    a = 0.5 + rng.normal(0, 0.02, 500)
    b = 0.5 + rng.normal(0, 0.02, 500)
    res = decode_raw(a, b, np.arange(500) * 1e-3, name="left")
    assert res.counts[-1] == 0 and np.all(res.counts == 0)
    assert any("no two reflectance levels" in w for w in res.warnings)


def test_too_slow_sampling_counts_illegal_transitions_and_advises_rate():
    """5 rev/s on the 14-stripe disc is 140 counts/s; a state lasts 7.1 ms. Sampled every
    10 ms, some samples skip a state (both channels change): reported, with advice to
    sample at twice the count rate or more."""
    rev_s, fs = 5.0, 100.0
    t = np.arange(0, 1.0, 1 / fs)
    a, b = disc_readings(2 * np.pi * rev_s * t + 0.01)
    res = decode_raw(a, b, t, name="left")
    assert res.illegal > 0
    assert res.sample_rate_hz == pytest.approx(fs)
    assert res.min_sample_rate_hz > fs
    assert any("illegal transition" in w and "sample at" in w for w in res.warnings)
    # sampled every 5 ms no state is skipped, but the margin is under two samples per state
    t2 = np.arange(0, 1.0, 1 / 200.0)
    a2, b2 = disc_readings(2 * np.pi * rev_s * t2 + 0.01)
    res2 = decode_raw(a2, b2, t2, name="left")
    assert res2.illegal == 0
    assert res2.counts[-1] == pytest.approx(28 * rev_s * t2[-1], abs=1)
    assert any("less than two samples per state" in w for w in res2.warnings)
    # at 1 kHz all is well
    t3 = np.arange(0, 1.0, 1e-3)
    res3 = decode_raw(*disc_readings(2 * np.pi * rev_s * t3 + 0.01), t3)
    assert res3.illegal == 0 and not res3.warnings


@settings(max_examples=60, deadline=None)
@given(steps=st.lists(st.integers(-1, 1), min_size=2, max_size=300),
       start=st.integers(0, 3), dts=st.floats(1e-5, 1.0), invert=st.booleans())
def test_property_counts_conserved_when_no_state_is_skipped(steps, start, dts, invert):
    """Random walks of at most one state per sample decode to exactly their net count,
    at any sample rate, from any start state, with either polarity."""
    pos = start + np.concatenate([[0], np.cumsum(steps)])
    a, b = states_from_positions(pos)
    if invert:  # dark/light swapped on both channels keeps the cyclic order
        a, b = ~a, ~b
    lv = np.where(a, LIGHT, DARK), np.where(b, LIGHT, DARK)
    res = decode_raw(*lv, np.arange(pos.size) * dts)
    moving_a = len(set(a.tolist())) > 1
    moving_b = len(set(b.tolist())) > 1
    if moving_a and moving_b:
        assert_array_equal(res.counts, pos - pos[0])
        assert res.illegal == 0


@settings(max_examples=60, deadline=None)
@given(steps=st.lists(st.integers(-2, 2), min_size=2, max_size=300))
def test_property_skipped_states_are_counted_not_crashing(steps):
    """Steps of two states (both channels change) are each one illegal transition."""
    pos = np.concatenate([[0], np.cumsum(steps)])
    a, b = states_from_positions(pos)
    counts, _, bad = decode_states(a, b)
    assert bad.size == sum(abs(s) == 2 for s in steps)
    legal = np.array([abs(s) < 2 for s in steps])
    # legal steps are decoded exactly
    assert_array_equal(np.diff(counts)[legal], np.asarray(steps)[legal])
