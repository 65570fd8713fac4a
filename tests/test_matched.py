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

from passby.matched import matched_course
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
