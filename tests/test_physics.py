"""Physics against published values and reference libraries."""

import numpy as np
import pytest
import scipy.optimize

from passby import physics


# --- speed of sound ---------------------------------------------------------

def test_iso9613_reference_value():
    # ISO 9613-1:1993: 343.2 m/s at 20 C (reference value of its formula)
    assert physics.speed_of_sound_iso9613(20.0) == pytest.approx(343.2, abs=1e-9)


@pytest.mark.parametrize("t_c, c", [(0.0, 331.29), (-20.0, 318.93), (40.0, 354.71)])
def test_iso9613_formula_values(t_c, c):
    # computed from ISO 9613-1's formula c = 343.2 sqrt(T / 293.15 K)
    assert physics.speed_of_sound_iso9613(t_c) == pytest.approx(c, abs=0.005)


def test_textbook_value_at_freezing():
    # dry air at 0 C: 331.3 m/s (common practice, textbooks, no single source)
    assert physics.speed_of_sound_iso9613(0.0) == pytest.approx(331.3, abs=0.05)


def test_iso9613_is_vectorised():
    c = physics.speed_of_sound_iso9613(np.array([0.0, 20.0]))
    assert c.shape == (2,) and c[1] == pytest.approx(343.2)


def test_below_absolute_zero_is_refused():
    with pytest.raises(ValueError):
        physics.speed_of_sound_iso9613(-300.0)


@pytest.mark.parametrize("t_c, rh, c", [
    (0.0, 0.0, 331.45),     # computed from Cramer (1993): dry air, 0 C, 101.325 kPa, 400 ppm CO2
    (20.0, 50.0, 343.99),   # computed from Cramer (1993): 20 C, 50 % RH
    (10.0, 80.0, 337.97),   # computed from Cramer (1993): 10 C, 80 % RH
    (30.0, 90.0, 351.24),   # computed from Cramer (1993): 30 C, 90 % RH
])
def test_cramer_values(t_c, rh, c):
    assert physics.speed_of_sound_cramer(t_c, rh) == pytest.approx(c, abs=0.01)


def test_water_vapour_mole_fraction():
    # Davis (1992) as used by Cramer (1993): x_w = 0.01159 at 20 C, 50 % RH, 101.325 kPa
    assert physics.water_vapour_mole_fraction(20.0, 50.0) == pytest.approx(0.01159, abs=5e-6)


def test_cramer_range_flag():
    # Cramer (1993) states validity 0-30 C and 75-102 kPa
    assert physics.cramer_in_range(20.0, 101325.0)
    assert not physics.cramer_in_range(-5.0, 101325.0)
    assert not physics.cramer_in_range(20.0, 60e3)


def test_speed_of_sound_dispatch():
    assert physics.speed_of_sound(20.0) == physics.speed_of_sound_iso9613(20.0)
    assert physics.speed_of_sound(20.0, 50.0) == physics.speed_of_sound_cramer(20.0, 50.0)


# --- Doppler relations -------------------------------------------------------

def test_train_horn_worked_example():
    # OpenStax College Physics, sec. 17.4, Example 17.3 (from memory): a 150 Hz horn
    # on a train at 35.0 m/s, c = 340 m/s: 167 Hz approaching, 136 Hz receding.
    fa = physics.doppler_moving_source(150.0, 35.0, 340.0)
    fr = physics.doppler_moving_source(150.0, -35.0, 340.0)
    assert round(fa) == 167 and round(fr) == 136


def test_plateau_solution_inverts_the_worked_example():
    # The two-plateau closed form (Ferguson & Quinn 1994) recovers 35 m/s and 150 Hz.
    fa = physics.doppler_moving_source(150.0, 35.0, 340.0)
    fr = physics.doppler_moving_source(150.0, -35.0, 340.0)
    v, f0 = physics.plateau_solution(fa, fr, 340.0)
    assert v == pytest.approx(35.0, rel=1e-12) and f0 == pytest.approx(150.0, rel=1e-12)


def test_moving_observer_and_inverses():
    # f = f0 (c + v) / c for an observer moving toward a still source (textbook relation,
    # common practice, no source); the inverses undo both relations.
    f = physics.doppler_moving_observer(500.0, 20.0, 340.0)
    assert f == pytest.approx(500.0 * 360.0 / 340.0)
    assert physics.observer_speed_from_heard(f, 500.0, 340.0) == pytest.approx(20.0)
    g = physics.doppler_moving_source(500.0, 20.0, 340.0)
    assert physics.source_speed_from_heard(g, 500.0, 340.0) == pytest.approx(20.0)


def test_plateau_solution_with_wind():
    # With a wind w along the track the plateaus are f0 (c+w)/(c+w-v) and f0 (c-w)/(c-w+v).
    c, w, v, f0 = 340.0, 5.0, 30.0, 400.0
    fa = f0 * (c + w) / (c + w - v)
    fr = f0 * (c - w) / (c - w + v)
    v_est, f0_est = physics.plateau_solution(fa, fr, c, wind_mps=w)
    assert v_est == pytest.approx(v, rel=1e-12) and f0_est == pytest.approx(f0, rel=1e-12)


# --- the exact model ----------------------------------------------------------

@pytest.mark.parametrize("v, d", [(10.0, 2.0), (30.0, 10.0), (55.0, 50.0)])
def test_emission_offset_solves_the_retarded_time_equation(v, d):
    c = 340.0
    T = np.linspace(-20.0, 20.0, 41)
    u = physics.emission_offset(T, v, d, c)
    # it satisfies T = u + r(u)/c ...
    assert np.allclose(u + np.sqrt(d * d + v * v * u * u) / c, T, atol=1e-12)
    # ... and agrees with scipy's bracketing root finder (reference library)
    for Ti, ui in zip(T, u):
        ref = scipy.optimize.brentq(lambda x: x + np.hypot(d, v * x) / c - Ti, -1e4, Ti)
        assert ui == pytest.approx(ref, abs=1e-9)


def test_received_frequency_limits_and_pass():
    c, f0, v, d, t0 = 343.2, 500.0, 25.0, 8.0, 3.0
    far = physics.received_frequency([t0 - 1e5, t0 + 1e5], f0, v, d, t0, c)
    assert far[0] == pytest.approx(f0 * c / (c - v), rel=1e-6)
    assert far[1] == pytest.approx(f0 * c / (c + v), rel=1e-6)
    # the sound emitted at closest approach (radial speed 0) arrives d/c later at f0
    at_pass = physics.received_frequency(t0 + d / c, f0, v, d, t0, c)
    assert float(at_pass) == pytest.approx(f0, rel=1e-12)


def test_sweep_rate_matches_numerical_derivative():
    c, f0, v, d = 343.2, 500.0, 30.0, 5.0
    t = np.linspace(-1e-3, 1e-3, 201) + d / c
    f = physics.received_frequency(t, f0, v, d, 0.0, c)
    slope = np.gradient(f, t)[100]
    # -f0 v^2 / (c d) holds to first order in v/c
    assert slope == pytest.approx(physics.sweep_rate_at_pass(f0, v, d, c), rel=0.05)


@pytest.mark.parametrize("v, d, t0, wind", [(12.0, 3.0, 0.0, 0.0), (40.0, 8.0, 1.5, 0.0),
                                             (55.0, 25.0, -2.0, 6.0), (25.0, 2.0, 0.3, -4.0)])
def test_doppler_factor_gradient_matches_finite_differences(v, d, t0, wind):
    # the analytic derivatives in v, d, t0 against scipy's finite-difference
    # gradient (reference library) of the factor itself, at times around the pass
    c = 343.2
    t = t0 + d / c + np.array([-3.0, -0.4, -0.05, 0.0, 0.02, 0.3, 2.5])
    F, dv, dd, dt0 = physics.doppler_factor_gradient(t, v, d, t0, c, wind)
    assert np.allclose(F, physics.doppler_factor(t, v, d, t0, c, wind), rtol=0, atol=1e-15)
    for i, ti in enumerate(t):
        num = scipy.optimize.approx_fprime(
            np.array([v, d, t0]), lambda x: float(physics.doppler_factor(ti, *x, c, wind)), 1e-7)
        assert [dv[i], dd[i], dt0[i]] == pytest.approx(num.tolist(), rel=1e-4, abs=1e-7)
