"""The fit on synthetic frequency tracks (the exact model, physics.received_frequency)."""

import math

import numpy as np
import pytest

from passby import fitting
from passby.fitting import (TrackData, error_inflation, fit_pass, plateau_fit, robust_least_squares,
                             sweep_search)
from passby.physics import plateau_solution, received_frequency


def track(t, f, tone=0, snr=20.0, sigma_p=0.0):
    n = t.size
    return TrackData(t, f, np.full(n, snr), np.full(n, tone), 1, np.full(n, sigma_p))


def test_fit_recovers_the_model_parameters():
    # frequencies from the exact model (Ferguson & Quinn 1994) with white noise
    c, v, d, t0, f0 = 340.0, 25.0, 6.0, 10.0, 600.0
    t = np.arange(4.0, 16.0, 0.01)
    rng = np.random.default_rng(7)
    f = received_frequency(t, f0, v, d, t0, c) + rng.normal(0.0, 0.3, t.size)
    r = fit_pass(track(t, f), c)
    assert r.quality == "good" and r.method == "curve"
    assert r.speed_mps == pytest.approx(v, abs=3 * r.speed_std_mps + 0.01)
    assert r.closest_m == pytest.approx(d, rel=0.02)
    assert r.pass_time_s == pytest.approx(t0, abs=0.01)
    assert r.tones_hz[0] == pytest.approx(f0, rel=1e-4)


def test_robust_least_squares_matches_a_linear_fit():
    # on a straight line without outliers the soft-L1 solution is the least-squares one (numpy.polyfit)
    rng = np.random.default_rng(2)
    x = np.linspace(0.0, 1.0, 200)
    y = 3.0 * x - 1.0 + rng.normal(0.0, 0.01, x.size)
    sol = robust_least_squares(lambda p: p[0] * x + p[1] - y, np.array([0.0, 0.0]),
                               np.array([-10.0, -10.0]), np.array([10.0, 10.0]), 1.0, 50)
    ref = np.polyfit(x, y, 1)
    assert np.allclose(sol.x, ref, atol=1e-5)


def test_plateau_fit_uses_the_closed_form():
    # v = c (fa - fr) / (fa + fr), f0 = 2 fa fr / (fa + fr) (Ferguson & Quinn 1994)
    c = 340.0
    fa, fr = 500.0 * c / (c - 30.0), 500.0 * c / (c + 30.0)
    t = np.r_[np.arange(0.0, 3.0, 0.01), np.arange(5.0, 8.0, 0.01)]
    rng = np.random.default_rng(1)
    f = np.where(t < 4.0, fa, fr) + rng.normal(0.0, 0.2, t.size)
    r = plateau_fit(track(t, f), c)
    v_ref, f0_ref = plateau_solution(fa, fr, c)
    assert r.method == "plateaus" and r.quality == "fair" and math.isnan(r.closest_m)
    assert r.speed_mps == pytest.approx(v_ref, abs=3 * r.speed_std_mps)
    assert r.tones_hz[0] == pytest.approx(f0_ref, rel=1e-3)


def test_plateau_fit_refuses_a_sweep():
    # a track that is still sweeping at its ends would bias the plateau formula low
    c = 340.0
    t = np.arange(0.0, 8.0, 0.01)
    f = received_frequency(t, 500.0, 30.0, 20.0, 4.0, c)
    assert plateau_fit(track(t, f), c) is None


def test_error_inflation_of_a_moving_average():
    # a 5-point moving average of white noise: variance of the sum inflated by 5 (Bayley & Hammersley 1946)
    rng = np.random.default_rng(4)
    e = np.convolve(rng.standard_normal(40000), np.ones(5) / 5, mode="valid")
    assert error_inflation(e, np.arange(e.size, dtype=float)) == pytest.approx(5.0, rel=0.15)


def test_error_inflation_sees_a_slow_error_under_fast_noise():
    # White noise (s.d. 1) plus an error constant over each second (s.d. 0.2), 100 frames
    # a second: the variance of the sum is N (1 + 100 * 0.04), against N (1 + 0.04) for
    # independent errors, a ratio of 5 / 1.04 (variance of a sum of correlated terms,
    # common practice, no source; the batch means of Flegal & Jones 2010 estimate it)
    rng = np.random.default_rng(5)
    n_blocks, per = 60, 100
    slow = np.repeat(0.2 * rng.standard_normal(n_blocks), per)
    e = rng.standard_normal(n_blocks * per) + slow
    t = np.arange(e.size) * 0.01
    assert error_inflation(e, t) == pytest.approx(5.0 / 1.04, rel=0.35)


def heard_points(emit_s, f0, v, d, t0, c):
    """(heard time, heard frequency) of a source on a straight line, computed from the geometry.

    The textbook moving-source relation f = f0 c / (c - v cos(theta)), theta between the
    travel and the line to the microphone at emission, heard r / c later (Morse & Ingard,
    Theoretical Acoustics (1968) sec. 11.2; from memory): independent of passby.physics.
    """
    x = v * (emit_s - t0)                   # source position along the line at emission
    r = np.hypot(d, x)
    cos_theta = -x / r                      # approaching: the microphone lies ahead
    return emit_s + r / c, f0 * c / (c - v * cos_theta)


@pytest.mark.parametrize("block", [1 << 14, 200, 1])
def test_sweep_search_finds_the_course_of_scattered_points(block, monkeypatch):
    # A close, fast pass (150 km/h at 3 m, d/v = 0.07 s) of a 300 Hz source heard only
    # in scraps: harmonics 2 and 3 at a few emission moments either side of the pass,
    # among random clutter and a steady line. The vote must land on the true course,
    # however many courses are scored at once (down to one: ``block`` = 1).
    monkeypatch.setattr(fitting, "SWEEP_BLOCK_ELEMENTS", block)
    c, v, d, t0 = 343.2, 150 / 3.6, 3.0, 10.0
    rng = np.random.default_rng(3)
    t, f = [], []
    for k in (2, 3):
        emit = t0 + np.sort(rng.uniform(-0.3, 0.3, 9))
        tk, fk = heard_points(emit, 300.0 * k, v, d, t0, c)
        t.append(tk); f.append(fk * (1 + rng.normal(0, 0.001, tk.size)))
    t.append(rng.uniform(9.6, 10.4, 10)); f.append(rng.uniform(200.0, 1500.0, 10))   # clutter
    t.append(np.r_[9.7, 9.75, 9.8, 10.2, 10.25, 10.3]); f.append(np.full(6, 700.0))   # steady line
    h = sweep_search(np.concatenate(t), np.concatenate(f), c, 10.0)
    assert h.score >= 4          # passby.pipeline.SWEEP_MIN_SCORE
    assert h.speed_mps == pytest.approx(v, rel=0.06)
    assert h.closest_m == pytest.approx(d, rel=0.3)
    assert h.pass_time_s == pytest.approx(t0, abs=0.02)   # closest approach of the source
    assert sorted(np.round(h.rest_hz[:2], -1)) == [600.0, 900.0]


def test_sweep_search_gives_steady_lines_and_clutter_no_votes():
    # Pieces of steady lines either side of the search centre and random peaks: no tone
    # falls across a pass, so no course gathers votes (common practice, no source:
    # a passing source's pitch falls, a stationary one's does not).
    rng = np.random.default_rng(4)
    t = np.r_[np.linspace(9.65, 9.9, 8), np.linspace(10.1, 10.35, 8), np.linspace(9.7, 10.3, 10),
              rng.uniform(9.6, 10.4, 12)]
    f = np.r_[np.full(8, 820.0), np.full(8, 820.0), np.full(10, 1310.0), rng.uniform(200.0, 2000.0, 12)]
    h = sweep_search(t, f, 343.2, 10.0)
    assert h.score <= 1


def test_residual_jacobian_matches_finite_differences():
    # the analytic Jacobian of the fit's residuals (windowed model, two tones)
    # against scipy's finite-difference gradient (reference library)
    import scipy.optimize
    rng = np.random.default_rng(11)
    t = np.sort(rng.uniform(-2.0, 2.0, 60))
    tone = np.arange(60) % 2
    data = TrackData(t, 500.0 + rng.normal(0.0, 1.0, 60), np.zeros(60), tone, 2, np.full(60, 0.012))
    theta = np.array([30.0, 4.0, 0.1, 480.0, 960.0])
    sw = np.ones(60)
    for wind in (0.0, 3.0):
        J = fitting._residuals_jacobian(theta, data, sw, 343.2, wind)
        for i in (0, 17, 30, 31, 59):
            num = scipy.optimize.approx_fprime(
                theta, lambda x: float(fitting._residuals(x, data, sw, 343.2, wind)[i]), 1e-6)
            assert J[i] == pytest.approx(num, rel=1e-4, abs=1e-5)
