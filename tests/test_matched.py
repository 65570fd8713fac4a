"""Matched search for the course of a close, fast pass in the samples (passby.matched).

References used here: the exact moving-source Doppler factor of
passby.physics (emission time from t = tau + r(tau)/c, Ferguson & Quinn
1994; itself checked against textbook values in test_physics); scipy's
cumulative trapezoid for the phase of the synthetic tones; the null
distribution of the generalised likelihood ratio of a tone of unknown
amplitude and phase in white Gaussian noise (Kay, Detection Theory, 1998,
sec. 7.6: |block sum|^2 / its noise power is exponential with mean 1).
"""

import numpy as np
import pytest
import scipy.integrate
import scipy.signal

from passby.matched import matched_course, without_steady_lines
from passby.physics import doppler_factor
from passby.pipeline import MATCHED_MAX_STEADY_Z, MATCHED_MIN_Z

C = 343.2  # ISO 9613-1: 343.2 m/s at 20 C


def _close_pass(fs, v, d, t0, tones, sigma, seed, dur=3.0):
    """Tones heard with the exact Doppler factor and spherical spreading (1 / r), in white noise."""
    t = np.arange(int(dur * fs)) / fs
    factor = doppler_factor(t, v, d, t0, C)
    integ = scipy.integrate.cumulative_trapezoid(factor, t, initial=0.0)
    # r at the emission time: t = tau + r / c, and the Doppler factor is c / (c + dr/dtau);
    # the spreading is written at the heard time here (a slow, smooth gain: it does not move the phase)
    r = np.hypot(d, v * (t - t0))
    x = sum(a * np.cos(2.0 * np.pi * f * integ) for f, a in tones) * d / r
    return x + np.random.default_rng(seed).normal(0.0, sigma, t.size)


@pytest.mark.parametrize("seed", [1, 2])
def test_close_fast_pass_course_is_recovered(seed):
    # 150 km/h at 3 m (transit d / v = 0.07 s): the tones fall by 25 % within 0.2 s
    fs, v, d, t0 = 8000, 150 / 3.6, 3.0, 1.5
    tones = [(480.0, 1.0), (960.0, 0.6)]
    x = _close_pass(fs, v, d, t0, tones, sigma=1.0, seed=seed)   # about -3 dB per sample at the pass
    start = [0.9 * v, 1.3 * d, t0 + 0.02, 484.0, 950.0]
    m = matched_course(x, fs, 0.0, start, C)
    # OIML R 91: +-1 % above 100 km/h; distance within 10 %, rest frequency within 0.1 % (the targets)
    assert abs(m.speed_mps - v) <= 0.01 * v
    assert abs(m.closest_m - d) <= 0.1 * d
    assert m.tones_hz[0] == pytest.approx(480.0, rel=1e-3)
    assert m.tones_hz[1] == pytest.approx(960.0, rel=1e-3)
    assert min(m.excess_before, m.excess_after) >= MATCHED_MIN_Z
    assert np.isnan(m.rival_speed_mps)
    assert m.steady_z < MATCHED_MAX_STEADY_Z
    assert 0.0 < m.speed_std_mps < 0.01 * v
    # spherical spreading (amplitude 1 / r) lifts the evidence at the pass as along the course
    assert m.expected_rise_db > 10.0 and m.rise_db >= 0.5 * m.expected_rise_db


def test_steady_chord_joined_by_a_fast_course_does_not_rise_at_the_pass():
    # two steady tones (a slow train's horn) 4:3 apart: a course at v with (c - v) / (c + v) = 3 / 4
    # (moving-source Doppler plateaus, any acoustics textbook) holds the upper one before its
    # "pass" and the lower one after, but the evidence does not rise there as 1 / r would make it
    fs, d, t0 = 8000, 2.5, 1.5
    v = C / 7.0                      # (c - v) / (c + v) = 6 / 8
    t = np.arange(int(3.0 * fs)) / fs
    x = np.cos(2 * np.pi * 800.0 * t) + np.cos(2 * np.pi * 600.0 * t + 1.0)
    x += np.random.default_rng(8).normal(0.0, 1.0, t.size)
    rest = 800.0 * (1.0 - v / C)     # heard at 800 Hz before the pass, 600 Hz after
    m = matched_course(x, fs, 0.0, [v, d, t0, rest], C)
    assert m.expected_rise_db > 10.0
    assert m.rise_db < 3.0


def test_steady_line_near_a_plateau_is_taken_off_and_the_pass_is_left():
    # a steady line 0.5 % below the approach pitch f0 / (1 - v / c) (moving-source Doppler, any
    # acoustics textbook), as loud as the tone heard at 6 m: it is taken off, to within 1 % of its
    # amplitude, and the pass (its approach plateau beside the line) is left whole
    fs, v, d, t0 = 8000, 150 / 3.6, 3.0, 4.0
    x = _close_pass(fs, v, d, t0, [(480.0, 1.0)], sigma=0.3, seed=3, dur=8.0)
    t = np.arange(x.size) / fs
    f_line = 0.995 * 480.0 / (1.0 - v / C)
    line = 0.5 * np.cos(2.0 * np.pi * f_line * t + 0.7)
    heard = t0 + d / C
    cleaned, lines = without_steady_lines(x + line, fs, 0.0, heard, 0.6)
    assert len(lines) == 1 and abs(lines[0] - f_line) < 0.01
    assert np.std(cleaned - x) < 0.01 * 0.5
    # the pass alone holds no line: its approach plateau is heard before the pass only
    assert without_steady_lines(x, fs, 0.0, heard, 0.6)[1] == ()
    # along the cleaned samples the course is found (OIML R 91: +-1 % above 100 km/h)
    m = matched_course(cleaned, fs, 0.0, [0.9 * v, 1.3 * d, t0 + 0.02, 484.0], C)
    assert abs(m.speed_mps - v) <= 0.01 * v
    assert m.steady_z < MATCHED_MAX_STEADY_Z


def test_line_whose_pitch_wobbles_is_left():
    # a fan's line whose pitch wanders at random by 0.3 % RMS (white noise through a
    # 0.5 Hz Butterworth low-pass, scipy.signal; seeded) keeps no one phase across the gap of the pass
    fs = 4000.0
    t = np.arange(int(8 * fs)) / fs
    sos = scipy.signal.butter(2, 0.5, fs=fs, output="sos")
    w = scipy.signal.sosfiltfilt(sos, np.random.default_rng(4).normal(0.0, 1.0, t.size))
    w *= 0.003 / np.std(w)
    phase = 2.0 * np.pi * 600.0 * scipy.integrate.cumulative_trapezoid(1.0 + w, t, initial=0.0)
    x = np.cos(phase) + np.random.default_rng(5).normal(0.0, 0.1, t.size)
    assert without_steady_lines(x, fs, 0.0, 4.0, 0.6)[1] == ()
    # the same line held steady is taken off
    steady = np.cos(2.0 * np.pi * 600.0 * t) + np.random.default_rng(5).normal(0.0, 0.1, t.size)
    assert without_steady_lines(steady, fs, 0.0, 4.0, 0.6)[1] == pytest.approx((600.0,), abs=0.01)


def test_steady_line_at_a_plateau_pitch_is_seen_on_the_other_side():
    # a fan's line at the approach pitch f0 / (1 - v / c) (moving-source Doppler, any
    # acoustics textbook): it stays after the pass, where the vehicle is heard lower
    fs, v, d, t0 = 8000, 150 / 3.6, 3.0, 1.5
    x = _close_pass(fs, v, d, t0, [(480.0, 1.0)], sigma=1.0, seed=7)
    t = np.arange(x.size) / fs
    x += 0.3 * np.cos(2.0 * np.pi * 480.0 / (1.0 - v / C) * t)
    m = matched_course(x, fs, 0.0, [v, d, t0, 480.0], C)
    assert m.steady_z >= MATCHED_MAX_STEADY_Z


def test_course_of_a_pass_is_found_from_a_far_start():
    # the vote may be 20 % off in speed and a factor 1.7 in distance
    fs, v, d, t0 = 16000, 180 / 3.6, 4.0, 1.4
    x = _close_pass(fs, v, d, t0, [(1150.0, 1.0)], sigma=0.5, seed=3)
    m = matched_course(x, fs, 0.0, [1.2 * v, 0.6 * d, t0 - 0.03, 1170.0], C)
    assert abs(m.speed_mps - v) <= 0.01 * v      # OIML R 91: +-1 % above 100 km/h
    assert m.tones_hz[0] == pytest.approx(1150.0, rel=1e-3)


def test_course_beyond_the_search_box_is_at_its_bound():
    # A pass at 6 m searched from a start at 0.8 m: the box reaches 5 times the start's
    # distance (4 m), and the course found stops at that edge, no maximum inside it. From a
    # start near the truth the same pass is found inside the box.
    fs, v, d, t0 = 8000, 150 / 3.6, 6.0, 1.5
    x = _close_pass(fs, v, d, t0, [(480.0, 1.0), (960.0, 0.6)], sigma=0.5, seed=8)
    far = matched_course(x, fs, 0.0, [v, 0.8, t0, 480.0, 960.0], C)
    assert far.at_bound and far.closest_m == pytest.approx(4.0, rel=0.03)
    near = matched_course(x, fs, 0.0, [v, d, t0, 480.0, 960.0], C)
    assert not near.at_bound
    assert abs(near.speed_mps - v) <= 0.01 * v      # OIML R 91: +-1 % above 100 km/h


@pytest.mark.parametrize("seed", [4, 5, 6])
def test_noise_alone_does_not_reach_the_evidence_threshold(seed):
    # Kay sec. 7.6: under noise alone each block's ratio has mean 1, so its z-score is
    # of order one; the search maximises it over courses, which the threshold of 8 allows for
    fs = 8000
    x = np.random.default_rng(seed).normal(0.0, 1.0, 3 * fs)
    m = matched_course(x, fs, 0.0, [40.0, 3.0, 1.5, 700.0, 1400.0], C)
    assert min(m.excess_before, m.excess_after) < MATCHED_MIN_Z


def test_samples_that_do_not_cover_the_pass_give_none():
    fs = 8000
    x = np.zeros(fs)
    assert matched_course(x, fs, 0.0, [40.0, 3.0, 0.9, 700.0], C) is None     # pass + 0.6 s beyond the end
    assert matched_course(x, fs, 0.0, [40.0, 3.0, 0.5], C) is None            # no tone


def test_grid_of_courses_scores_as_each_course_alone():
    # the batched grid (powers of one complex exponential per offset step) against
    # numpy's exp evaluated course by course: the same log-likelihood ratios
    from passby.matched import _basebands, _Evidence, _rotations
    fs, v, d, t0 = 8000, 150 / 3.6, 3.0, 0.7
    x = _close_pass(fs, v, d, t0, [(600.0, 1.0), (900.0, 0.5)], sigma=0.5, seed=8, dur=1.4)
    rests = np.array([603.0, 905.0])
    t, z, _ = _basebands(x, fs, 0.0, rests, 0.8 * rests.max())
    ev = _Evidence(t, z, rests, 0.0, C, 0.0)
    ev.measure_noise((v, d, t0, 1.0), 0.05)
    grid = np.arange(-1.5, 1.5001, 0.25)
    courses = [(v * a, d * b, t0 + s, 1.0) for a in (0.8, 1.0, 1.2) for b in (0.6, 1.0) for s in (-0.02, 0.0)]
    many = ev.llr_many(courses, 0.05, grid)
    one = np.array([ev.llr(th, 0.05, grid=grid) for th in courses])
    np.testing.assert_allclose(many, one, rtol=1e-10)
    F = np.linspace(0.0, 1.4, 50)[None, :]
    off = np.array([-3.0, -1.0, 1.0, 3.0])
    np.testing.assert_allclose(_rotations(off, F), np.exp(-2j * np.pi * off[None, :, None] * F[:, None, :]),
                               rtol=0, atol=1e-12)


def test_baseband_of_a_tone_is_its_complex_amplitude():
    # A cos(2 pi f t + phi) shifted by f_r is (A / 2) exp(i (2 pi (f - f_r) t + phi)) once its
    # mirror at -(f + f_r) is filtered out (Euler's formula); the DFT basebands against that
    # value and against scipy.signal.resample_poly (a polyphase FIR low-pass and decimation)
    import scipy.signal
    from passby.matched import _basebands
    fs, n = 12000, 12001                      # not a multiple of q: the last samples are dropped
    t = np.arange(n) / fs
    # (the output rate is 800 Hz: each tone lies 700 Hz or more from the other's band)
    x = 0.8 * np.cos(2 * np.pi * 1003.7 * t + 0.4) + 0.3 * np.cos(2 * np.pi * 300.0 * t)
    rests = np.array([1000.0, 300.0])
    tb, z, q = _basebands(x, fs, 0.25, rests, 0.8 * rests.max())
    assert q == 15 and z.shape == (2, n // q)
    np.testing.assert_allclose(tb, 0.25 + np.arange(n // q) * q / fs)
    mid = slice(40, -40)                      # away from the ends (the DFT's filter is circular)
    want = 0.4 * np.exp(1j * (2 * np.pi * 3.7 * (tb - 0.25) + 0.4))
    np.testing.assert_allclose(z[0, mid], want[mid], atol=2e-3)
    np.testing.assert_allclose(z[1, mid], 0.15, atol=2e-3)
    ref = scipy.signal.resample_poly(x * np.exp(-2j * np.pi * 1000.0 * t), 1, q)
    np.testing.assert_allclose(z[0, mid], ref[: n // q][mid], atol=5e-3)


def test_vote_drawn_between_two_steady_lines_is_seen_before_any_search():
    # two steady lines at the approach and recession pitches of a vote's course,
    # f0 / (1 -+ v / c) (moving-source Doppler, any acoustics textbook): the vote's own
    # course holds each on both sides of its pass; a real pass's course does not
    from passby.matched import start_steady_z
    fs, v, d, t0, f0 = 8000, 180 / 3.6, 1.8, 1.5, 580.0
    t = np.arange(3 * fs) / fs
    rng = np.random.default_rng(9)
    lines = sum(0.3 * np.cos(2 * np.pi * f0 / (1.0 + s * v / C) * t) for s in (-1.0, 1.0))
    x = lines + rng.normal(0.0, 1.0, t.size)
    assert start_steady_z(x, fs, 0.0, [v, d, t0, f0], C) >= MATCHED_MAX_STEADY_Z
    y = _close_pass(fs, v, 3.0, t0, [(f0, 1.0)], sigma=1.0, seed=9)
    assert start_steady_z(y, fs, 0.0, [v, 3.0, t0, f0], C) < MATCHED_MAX_STEADY_Z
    assert np.isnan(start_steady_z(y[: fs], fs, 0.0, [v, 3.0, t0, f0], C))   # the pass is not covered
