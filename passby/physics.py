"""Acoustics of a passing source: speed of sound and the Doppler relations.

Pure functions on floats and numpy arrays, SI units (m, s, Hz, m/s,
degrees Celsius where named ``*_c``).

References
----------
.. [ISO9613] ISO 9613-1:1993, Acoustics -- Attenuation of sound during
   propagation outdoors -- Part 1: Calculation of the absorption of sound by
   the atmosphere (speed of sound c = 343.2 (T/293.15 K)^(1/2) m/s).
.. [Cramer] O. Cramer, "The variation of the specific heat ratio and the
   speed of sound in air with temperature, pressure, humidity, and CO2
   concentration", J. Acoust. Soc. Am. 93(5), 2510-2516 (1993), eq. 15 and
   Table III.
.. [Davis] R. S. Davis, "Equation for the determination of the density of
   moist air (1981/91)", Metrologia 29, 67-70 (1992) (saturation vapour
   pressure and enhancement factor).
.. [FQ] B. G. Ferguson and B. G. Quinn, "Application of the short-time
   Fourier transform and the Wigner-Ville distribution to the acoustic
   localization of aircraft", J. Acoust. Soc. Am. 96(2), 821-827 (1994).
.. [Quinn] B. G. Quinn, "Doppler speed and range estimation using
   frequency and amplitude estimates", J. Acoust. Soc. Am. 98(5),
   2560-2566 (1995).
"""

from __future__ import annotations

import math

import numpy as np

#: Kelvin at 0 degrees Celsius.
ZERO_CELSIUS_K = 273.15
#: Reference temperature and speed of sound of ISO 9613-1, K and m/s.
ISO9613_T_REF_K = 293.15
ISO9613_C_REF = 343.2
#: Standard atmosphere, Pa.
STANDARD_PRESSURE_PA = 101325.0

# Cramer (1993), Table III, coefficients a0..a15 (t in C, p in Pa,
# mole fractions x_w of water vapour and x_c of carbon dioxide).
_CRAMER_A = (331.5024, 0.603055, -0.000528, 51.471935, 0.1495874, -0.000782,
             -1.82e-7, 3.73e-8, -2.93e-10, -85.20931, -0.228525, 5.91e-5,
             -2.835149, -2.15e-13, 29.179762, 0.000486)


def speed_of_sound_iso9613(temperature_c):
    """Speed of sound in dry air by the ideal-gas form of ISO 9613-1.

    Parameters
    ----------
    temperature_c : float or array_like
        Air temperature, degrees Celsius.

    Returns
    -------
    c : float or ndarray
        Speed of sound, m/s: ``343.2 * sqrt(T / 293.15 K)``.

    References
    ----------
    ISO 9613-1:1993 [ISO9613]_.

    Examples
    --------
    >>> round(speed_of_sound_iso9613(20.0), 2)
    343.2
    >>> round(speed_of_sound_iso9613(0.0), 2)
    331.29
    """
    t_k = np.asarray(temperature_c, dtype=float) + ZERO_CELSIUS_K
    if np.any(t_k <= 0):
        raise ValueError(f"temperature below absolute zero: {temperature_c!r} C")
    c = ISO9613_C_REF * np.sqrt(t_k / ISO9613_T_REF_K)
    return float(c) if c.ndim == 0 else c


def water_vapour_mole_fraction(temperature_c, humidity_pct, pressure_pa=STANDARD_PRESSURE_PA):
    """Mole fraction of water vapour in moist air.

    ``x_w = (RH/100) * f * p_sv / p`` with the enhancement factor
    ``f = 1.00062 + 3.14e-8 p + 5.6e-7 t^2`` and the saturation vapour
    pressure ``p_sv = exp(1.2378847e-5 T^2 - 1.9121316e-2 T + 33.93711047
    - 6.3431645e3 / T)`` Pa, T in kelvin.

    References
    ----------
    Davis (1992) [Davis]_, as used by Cramer (1993) [Cramer]_.

    Examples
    --------
    >>> round(water_vapour_mole_fraction(20.0, 50.0), 5)
    0.01159
    """
    t = float(temperature_c)
    t_k = t + ZERO_CELSIUS_K
    p = float(pressure_pa)
    f = 1.00062 + 3.14e-8 * p + 5.6e-7 * t * t
    p_sv = math.exp(1.2378847e-5 * t_k ** 2 - 1.9121316e-2 * t_k + 33.93711047 - 6.3431645e3 / t_k)
    return float(humidity_pct) / 100.0 * f * p_sv / p


def speed_of_sound_cramer(temperature_c, humidity_pct=0.0, pressure_pa=STANDARD_PRESSURE_PA,
                          co2_ppm=400.0):
    """Speed of sound in moist air by Cramer's formula.

    Parameters
    ----------
    temperature_c : float
        Air temperature, degrees Celsius. The formula is valid from 0 to
        30 C and 75 to 102 kPa; outside that range it is extrapolated (the
        caller should say so).
    humidity_pct : float
        Relative humidity, percent.
    pressure_pa : float
        Static pressure, Pa.
    co2_ppm : float
        Carbon dioxide, parts per million by mole.

    Returns
    -------
    c : float
        Speed of sound (zero-frequency limit), m/s.

    References
    ----------
    Cramer (1993) [Cramer]_, eq. 15 with the coefficients of Table III;
    water vapour from Davis (1992) [Davis]_.

    Examples
    --------
    >>> round(speed_of_sound_cramer(20.0, 50.0), 2)
    343.99
    """
    t = float(temperature_c)
    p = float(pressure_pa)
    xw = water_vapour_mole_fraction(t, humidity_pct, p)
    xc = float(co2_ppm) * 1e-6
    a = _CRAMER_A
    return (a[0] + a[1] * t + a[2] * t * t
            + (a[3] + a[4] * t + a[5] * t * t) * xw
            + (a[6] + a[7] * t + a[8] * t * t) * p
            + (a[9] + a[10] * t + a[11] * t * t) * xc
            + a[12] * xw * xw + a[13] * p * p + a[14] * xc * xc
            + a[15] * xw * p * xc)


def cramer_in_range(temperature_c, pressure_pa=STANDARD_PRESSURE_PA) -> bool:
    """Whether Cramer's formula is used within its stated range (0-30 C, 75-102 kPa)."""
    return 0.0 <= temperature_c <= 30.0 and 75e3 <= pressure_pa <= 102e3


def speed_of_sound(temperature_c, humidity_pct=None, pressure_pa=STANDARD_PRESSURE_PA):
    """Speed of sound for an analysis: ISO 9613-1, or Cramer with humidity.

    Examples
    --------
    >>> round(speed_of_sound(20.0), 1)
    343.2
    >>> round(speed_of_sound(20.0, humidity_pct=50.0), 2)
    343.99
    """
    if humidity_pct is None:
        return speed_of_sound_iso9613(temperature_c)
    return speed_of_sound_cramer(temperature_c, humidity_pct, pressure_pa)


# --- Doppler relations -----------------------------------------------------

def doppler_moving_source(f0, radial_speed_mps, c):
    """Frequency heard from a source moving toward a still observer.

    ``f = f0 * c / (c - v)``, with ``v`` the component of the source velocity
    toward the observer at the time of emission (negative when receding).

    References
    ----------
    Textbook moving-source Doppler relation (e.g. Ferguson & Quinn 1994
    [FQ]_, eq. 1).

    Examples
    --------
    >>> round(doppler_moving_source(1000.0, 34.32, 343.2), 3)
    1111.111
    """
    return f0 * c / (c - radial_speed_mps)


def doppler_moving_observer(f0, radial_speed_mps, c):
    """Frequency heard by an observer moving toward a still source.

    ``f = f0 * (c + v) / c`` with ``v`` the observer's speed toward the source.

    Examples
    --------
    >>> round(doppler_moving_observer(1000.0, 34.32, 343.2), 3)
    1100.0
    """
    return f0 * (c + radial_speed_mps) / c


def source_speed_from_heard(f_heard, f0, c):
    """Inverse of :func:`doppler_moving_source`: the radial speed of the source.

    Examples
    --------
    >>> round(source_speed_from_heard(1111.111111, 1000.0, 343.2), 3)
    34.32
    """
    return c * (1.0 - f0 / f_heard)


def observer_speed_from_heard(f_heard, f0, c):
    """Inverse of :func:`doppler_moving_observer`: the observer's radial speed."""
    return c * (f_heard / f0 - 1.0)


def plateau_solution(f_approach, f_recede, c, wind_mps=0.0):
    """Speed and rest frequency from the approach and recession plateaus.

    Far before and after the pass the source moves straight toward and away
    from the microphone, so ``fa = f0 c1 / (c1 - v)`` and
    ``fr = f0 c2 / (c2 + v)``, where ``c1 = c + w`` and ``c2 = c - w`` are the
    speeds of sound with and against a wind component ``w`` along the
    direction of travel. Without wind:
    ``v = c (fa - fr) / (fa + fr)`` and ``f0 = 2 fa fr / (fa + fr)``.

    Parameters
    ----------
    f_approach, f_recede : float
        Plateau frequencies, Hz (``f_approach > f_recede``).
    c : float
        Speed of sound, m/s.
    wind_mps : float
        Wind component along the direction of travel, m/s.

    Returns
    -------
    speed_mps, f0_hz : float

    References
    ----------
    Ferguson & Quinn (1994) [FQ]_.

    Examples
    --------
    A source at 34.32 m/s emitting 1000 Hz, c = 343.2 m/s:

    >>> v, f0 = plateau_solution(1000 / 0.9, 1000 / 1.1, 343.2)
    >>> round(v, 6), round(f0, 6)
    (34.32, 1000.0)
    """
    fa, fr = float(f_approach), float(f_recede)
    c1, c2 = c + wind_mps, c - wind_mps
    # fa (c1 - v) / c1 = fr (c2 + v) / c2  =>  v (fa / c1 + fr / c2) = fa - fr
    v = (fa - fr) / (fa / c1 + fr / c2)
    f0 = fa * (c1 - v) / c1
    return v, f0


# --- the exact pass-by model -----------------------------------------------

def emission_offset(t_rel, speed_mps, closest_m, c):
    """Emission time of the sound heard at a time, relative to closest approach.

    With the source at ``x = v u`` on a straight line at closest distance
    ``d``, the sound heard at ``T = t - t0`` left at ``u = tau - t0`` with
    ``T = u + sqrt(d^2 + v^2 u^2) / c``. The root with ``u < T`` is

    ``u = (c^2 T - sqrt(v^2 c^2 T^2 + (c^2 - v^2) d^2)) / (c^2 - v^2)``.

    Parameters
    ----------
    t_rel : array_like
        ``T = t - t0``, s.
    speed_mps, closest_m, c : float
        ``v < c``, ``d >= 0``, speed of sound.

    Returns
    -------
    u : ndarray
        ``tau - t0``, s.

    References
    ----------
    Ferguson & Quinn (1994) [FQ]_; Quinn (1995) [Quinn]_.

    Examples
    --------
    The sound heard d/c after closest approach left at closest approach:

    >>> float(emission_offset(10.0 / 343.2, 30.0, 10.0, 343.2))
    0.0
    """
    T = np.asarray(t_rel, dtype=float)
    v2, c2 = speed_mps * speed_mps, c * c
    root = np.sqrt(v2 * c2 * T * T + (c2 - v2) * closest_m * closest_m)
    return (c2 * T - root) / (c2 - v2)


def doppler_factor(t, speed_mps, closest_m, pass_time_s, c, wind_mps=0.0):
    """Ratio of heard to emitted frequency of a passing source, ``f(t)/f0``.

    ``f(t) / f0 = 1 / (1 + v^2 u / (c r))`` with ``u`` from
    :func:`emission_offset` and ``r = sqrt(d^2 + v^2 u^2)``: the component of
    the source velocity toward the microphone at emission is ``-v^2 u / r``.

    With a wind ``w`` along the direction of travel, in the frame of the
    moving air the source moves at ``v - w`` and the microphone at ``-w``,
    which gives ``f / f0 = 1 / (1 - v cos(theta) / (c + w cos(theta)))`` with
    ``cos(theta) = -v u / r`` the direction of the sound relative to the
    travel; exact on both plateaus (see :func:`plateau_solution`), first
    order in ``w / c`` near the pass (the emission time ignores the wind).

    References
    ----------
    Ferguson & Quinn (1994) [FQ]_; Quinn (1995) [Quinn]_.

    Examples
    --------
    >>> t = [-1e3, 10.0 / 343.2, 1e3]
    >>> np.round(doppler_factor(t, 34.32, 10.0, 0.0, 343.2), 4)
    array([1.1111, 1.    , 0.9091])
    """
    u = emission_offset(np.asarray(t, dtype=float) - pass_time_s, speed_mps, closest_m, c)
    v2 = speed_mps * speed_mps
    r = np.sqrt(closest_m * closest_m + v2 * u * u)
    if wind_mps == 0.0:
        return 1.0 / (1.0 + v2 * u / (c * r))
    cos_theta = -speed_mps * u / np.maximum(r, 1e-12)
    return 1.0 / (1.0 - speed_mps * cos_theta / (c + wind_mps * cos_theta))


def doppler_factor_gradient(t, speed_mps, closest_m, pass_time_s, c, wind_mps=0.0):
    """:func:`doppler_factor` and its partial derivatives in ``v``, ``d`` and ``t0``.

    Differentiating ``T = u + r / c`` with ``r^2 = d^2 + v^2 u^2`` at fixed
    reception time gives the change of the emission offset,
    ``du (1 + g) = -(v u^2 dv + d dd) / (c r) - dt0`` with
    ``g = v^2 u / (c r)``; then ``s = v u / r`` (minus the cosine of the
    direction of the sound) and the factor ``F = 1 / (1 + h)``,
    ``h = v s / (c - w s)``, follow by the chain rule. It is the same
    factor as :func:`doppler_factor` (``h = g`` without wind).

    Returns
    -------
    (F, dF_dv, dF_dd, dF_dt0) : ndarrays shaped like ``t``

    References
    ----------
    Ferguson & Quinn (1994) [FQ]_ (the model).

    Examples
    --------
    Against a central difference in the speed:

    >>> t, args = np.array([0.3]), (10.0, 0.0, 343.2)
    >>> F, dv, dd, dt0 = doppler_factor_gradient(t, 30.0, *args)
    >>> num = (doppler_factor(t, 30.0 + 1e-5, *args) - doppler_factor(t, 30.0 - 1e-5, *args)) / 2e-5
    >>> bool(abs(dv[0] - num[0]) < 1e-8)
    True
    """
    v, d, w = float(speed_mps), float(closest_m), float(wind_mps)
    u = emission_offset(np.asarray(t, dtype=float) - pass_time_s, v, d, c)
    r = np.sqrt(d * d + v * v * u * u)
    cr = c * r
    one_g = 1.0 + v * v * u / cr
    # The emission offset and the distance at emission, per parameter.
    du = (-v * u * u / cr / one_g, -d / cr / one_g, -1.0 / one_g)
    dr = ((v * u * u + v * v * u * du[0]) / r, (d + v * v * u * du[1]) / r, v * v * u * du[2] / r)
    s = v * u / r
    ds = [(v * du[k]) / r - s * dr[k] / r for k in range(3)]
    ds[0] = ds[0] + u / r
    den = c - w * s
    h = v * s / den
    F = 1.0 / (1.0 + h)
    dh = [v * ds[k] * (1.0 / den + w * s / (den * den)) for k in range(3)]
    dh[0] = dh[0] + s / den
    F2 = F * F
    return F, -dh[0] * F2, -dh[1] * F2, -dh[2] * F2


def received_frequency(t, f0_hz, speed_mps, closest_m, pass_time_s, c_mps):
    """Frequency heard at times ``t`` from a source passing on a straight line.

    Parameters
    ----------
    t : array_like
        Reception times, s.
    f0_hz : float
        Emitted (rest) frequency.
    speed_mps, closest_m, pass_time_s : float
        Speed, closest distance and time of closest approach.
    c_mps : float
        Speed of sound.

    Returns
    -------
    f : ndarray
        Heard frequency, Hz.

    Examples
    --------
    >>> np.round(received_frequency([-100.0, 100.0], 500.0, 20.0, 5.0, 0.0, 343.2), 2)
    array([530.94, 472.47])
    """
    return f0_hz * doppler_factor(t, speed_mps, closest_m, pass_time_s, c_mps)


def sweep_rate_at_pass(f0_hz, speed_mps, closest_m, c):
    """Slope of the heard frequency at closest approach, Hz/s (negative).

    Differentiating the model at ``u = 0`` gives
    ``df/dt = -f0 v^2 / (c d)`` (to first order in v/c).

    Examples
    --------
    >>> round(sweep_rate_at_pass(500.0, 30.0, 5.0, 343.2), 1)
    -262.2
    """
    return -f0_hz * speed_mps * speed_mps / (c * closest_m)
