"""Checks of the pass-by simulator against physics outside the project.

The instantaneous frequency of a rendered tone is measured from the phase of
its analytic signal (scipy.signal.hilbert) and compared with the textbook
moving-source Doppler formula; amplitudes with spherical spreading; the
ground reflection with the two-path interference of an image source.
"""

import math

import numpy as np
import pytest
from scipy.signal import hilbert

from passby.errors import ConfigError
from passby.simulation import (
    Interferer,
    Scene,
    Tone,
    Vehicle,
    background_noise_rms,
    emission_time,
    frame_count,
    harmonic_tones,
    received_frequency_numeric,
    render,
    render_blocks,
    scale_to_peak,
    speed_of_sound_iso,
    vehicle_snr_db,
)

FS = 8000


def phase(x):
    """Unwrapped phase of the analytic signal (scipy reference)."""
    return np.unwrap(np.angle(hilbert(x)))


def inst_freq(x, fs):
    """Instantaneous frequency at samples 1..n-2, central difference of the phase."""
    ph = phase(x)
    return (ph[2:] - ph[:-2]) * fs / (4.0 * np.pi)


# ---------------------------------------------------------------- speed of sound

def test_speed_of_sound_iso_reference_value():
    # ISO 9613-1:1993: c = 343.2 m/s at T0 = 293.15 K (20 C)
    assert speed_of_sound_iso(20.0) == pytest.approx(343.2, abs=1e-12)


def test_speed_of_sound_iso_at_freezing():
    # Textbook value for dry air at 0 C: 331.3 m/s (from memory; e.g. Kinsler et al.,
    # Fundamentals of Acoustics, table of speeds of sound)
    assert speed_of_sound_iso(0.0) == pytest.approx(331.3, abs=0.05)
    # ideal gas: c proportional to sqrt(T) (ISO 9613-1 form)
    assert speed_of_sound_iso(np.array([-10.0, 35.0])) == pytest.approx(
        343.2 * np.sqrt(np.array([263.15, 308.15]) / 293.15), rel=1e-14)


# ---------------------------------------------------------------- retarded time

@pytest.mark.parametrize("t0", [0.0, 1800.0])
def test_newton_retarded_time_satisfies_the_propagation_equation(t0):
    v, d, c = 38.0, 7.5, 340.0
    t = t0 + np.linspace(-1800.0, 1800.0, 100001)
    tau = emission_time(t, v, d, t0, c)
    r = np.hypot(v * (tau - t0), d)
    # definition of retarded time: t = tau + r(tau)/c
    assert np.max(np.abs(tau + r / c - t)) < 1e-9
    # independent check (test only): the root of the quadratic
    # (c^2 - v^2) u^2 - 2 c^2 s u + c^2 s^2 - d^2 = 0 with u < s, u = tau - t0, s = t - t0
    s = t - t0
    a = c * c - v * v
    u = (c * c * s - np.sqrt(c * c * v * v * s * s + a * d * d)) / a
    assert np.max(np.abs(tau - t0 - u)) < 1e-9


def test_stationary_source_delay_is_distance_over_c():
    tau = emission_time([5.0], 0.0, 68.64, 0.0, 343.2)
    assert tau[0] == pytest.approx(5.0 - 0.2, abs=1e-12)  # 68.64 m / 343.2 m/s = 0.2 s


# ---------------------------------------------------------------- Doppler

@pytest.mark.parametrize("approaching", [True, False])
def test_far_field_frequency_is_the_moving_source_doppler_shift(approaching):
    # Halliday, Resnick & Walker, Fundamentals of Physics, moving-source Doppler
    # formula f' = f0 / (1 -+ v/c) (from memory: chapter on sound waves).
    v, d, f0 = 30.0, 10.0, 500.0
    c = speed_of_sound_iso(20.0)
    t0 = 300.0 if approaching else -300.0  # about 9 km away: radial speed = v to 6e-7
    veh = Vehicle(v, d, t0, (Tone(f0),), source_height_m=1.2)
    x = render(Scene((veh,), 4.0, FS, snr_db=None))
    t = np.arange(x.size) / FS
    mid = (t > 1.0) & (t < 3.0)
    f = np.polyfit(t[mid], phase(x)[mid], 1)[0] / (2.0 * np.pi)
    expected = f0 / (1.0 - v / c) if approaching else f0 / (1.0 + v / c)
    assert f == pytest.approx(expected, abs=1e-3)  # the two differ by 88 Hz


def test_heard_frequency_at_closest_approach_is_the_rest_frequency():
    # At emission time t0 the radial velocity is zero, so the sound emitted then,
    # heard at t0 + d/c, has the rest frequency (moving-source Doppler with
    # v cos(90 deg) = 0; Halliday, Resnick & Walker, from memory).
    v, d, f0 = 30.0, 10.0, 500.0
    c = speed_of_sound_iso(20.0)
    n_heard = 10 * FS
    t0 = n_heard / FS - d / c  # make t0 + d/c fall on a sample
    veh = Vehicle(v, d, t0, (Tone(f0),), source_height_m=1.2)
    sc = Scene((veh,), 20.0, FS, snr_db=None)
    f = inst_freq(render(sc), FS)
    # the sweep there is -f0 v^2/(c d) = -131 Hz/s, i.e. 0.016 Hz per sample
    assert f[n_heard - 1] == pytest.approx(f0, abs=2e-3)
    assert received_frequency_numeric(sc, 0, [n_heard / FS])[0] == pytest.approx(f0, abs=1e-4)
    # and it falls through f0 there: above before, below after
    assert f[n_heard - 1 - 400] > f0 + 5 and f[n_heard - 1 + 400] < f0 - 5


def test_measured_frequency_follows_the_numeric_truth_with_wander():
    # scipy's analytic-signal phase against the simulator's own phase derivative,
    # across a whole pass with 0.3 % pitch wander and two harmonics
    veh = Vehicle(25.0, 8.0, 10.0, harmonic_tones(150.0, [0.0, 1.0]), wander_rms=0.003,
                  source_height_m=1.2)
    sc = Scene((veh,), 20.0, FS, snr_db=None, seed=11)
    f = inst_freq(render(sc), FS)
    t = np.arange(1, frame_count(sc) - 1) / FS
    truth = received_frequency_numeric(sc, 0, t)
    mid = (t > 1.0) & (t < 19.0)
    assert np.max(np.abs(f[mid] - truth[mid])) < 0.01
    # the wander is really there: the truth departs from the no-wander curve
    plain = received_frequency_numeric(Scene((Vehicle(25.0, 8.0, 10.0, (Tone(300.0),),
                                                      source_height_m=1.2),),
                                             20.0, FS, snr_db=None), 0, t)
    assert np.max(np.abs(truth - plain)) > 0.3


def test_wander_has_the_requested_rms():
    veh = Vehicle(0.0, 10.0, 0.0, (Tone(400.0),), wander_rms=0.003, wander_bandwidth_hz=0.5)
    sc = Scene((veh,), 1.0, FS, snr_db=None, seed=4)
    t = np.arange(0.0, 4000.0, 0.2)
    w = received_frequency_numeric(sc, 0, t) / 400.0 - 1.0
    # 4000 s of a 0.5 Hz process: the RMS estimate is good to a few per cent
    assert np.sqrt(np.mean(w ** 2)) == pytest.approx(0.003, rel=0.15)
    assert abs(np.mean(w)) < 0.0005


# ---------------------------------------------------------------- amplitude

def test_amplitude_falls_as_one_over_distance():
    v, d, a = 30.0, 10.0, 2.0
    c = speed_of_sound_iso(20.0)
    veh = Vehicle(v, d, 10.0, (Tone(700.0, a),), source_height_m=1.2)
    x = render(Scene((veh,), 20.0, FS, snr_db=None))
    env = np.abs(hilbert(x))
    n = np.arange(2 * FS, 18 * FS, 997)
    tau = emission_time(n / FS, v, d, 10.0, c)
    r = np.hypot(v * (tau - 10.0), d)
    # spherical spreading p = a / r (r from 10 m to 245 m here)
    assert np.max(np.abs(env[n] * r / a - 1.0)) < 2e-3
    n_heard = int(round((10.0 + d / c) * FS))
    assert env[n_heard] == pytest.approx(a / d, rel=1e-3)


def test_horn_envelope_is_in_emission_time():
    v, d = 20.0, 30.0
    c = speed_of_sound_iso(20.0)
    on, off = 4.0, 8.0
    veh = Vehicle(v, d, 6.0, (Tone(400.0),), on_s=on, off_s=off, ramp_s=0.05,
                  source_height_m=1.2)
    x = render(Scene((veh,), 12.0, FS, snr_db=None))
    heard_on = on + math.hypot(v * (on - 6.0), d) / c
    heard_off = off + math.hypot(v * (off - 6.0), d) / c
    t = np.arange(x.size) / FS
    assert np.all(x[t < heard_on] == 0.0)
    assert np.all(x[t > heard_off] == 0.0)
    inside = (t > heard_on + 0.2) & (t < heard_off - 0.2)
    assert np.max(np.abs(x[inside])) > 0.8 / math.hypot(v * 2.0, d)


# ---------------------------------------------------------------- noise and SNR

@pytest.mark.parametrize("kind, tol", [("white", 0.01), ("pink", 0.05), ("road", 0.05)])
def test_snr_sets_the_stated_power_ratio(kind, tol):
    # SNR_dB = 10 log10(P_tone / P_noise), P_tone = sum(a_k^2/2)/d^2 at closest approach
    tones = (Tone(500.0, 1.0), Tone(640.0, 0.5))
    d = 10.0
    clean = Scene((Vehicle(0.0, d, 0.0, tones),), 20.0, FS, snr_db=None, seed=2)
    noisy = Scene((Vehicle(0.0, d, 0.0, tones),), 20.0, FS, snr_db=12.0, noise=kind, seed=2)
    s = render(clean)
    n = render(noisy) - s
    # mean power of two steady sines: sum a^2/2 (1.25/2) over d^2 (here over whole periods)
    assert np.mean(s ** 2) == pytest.approx(0.625 / d ** 2, rel=1e-3)
    assert background_noise_rms(noisy) ** 2 == pytest.approx(0.625 / d ** 2 / 10 ** 1.2, rel=1e-12)
    assert np.var(n) == pytest.approx(0.625 / d ** 2 / 10 ** 1.2, rel=tol)
    assert 10 * np.log10(np.mean(s ** 2) / np.var(n)) == pytest.approx(12.0, abs=10 * np.log10(1 + tol))


def test_road_noise_spectrum_falls_below_its_corner():
    sc = Scene((), 30.0, FS, snr_db=None, noise_level=0.1, noise="road", seed=1)
    x = render(sc)
    spec = np.abs(np.fft.rfft(x)) ** 2
    f = np.fft.rfftfreq(x.size, 1.0 / FS)
    band = lambda lo, hi: np.mean(spec[(f >= lo) & (f < hi)])
    # pink above the corner: equal power per octave, so the density halves per octave
    assert band(400, 440) / band(800, 880) == pytest.approx(2.0, rel=0.15)
    # below 100 Hz the model falls as f^3 (25 Hz vs 50 Hz: about 1/8)
    assert band(24, 26) / band(48, 52) == pytest.approx(1 / 8, rel=0.4)


def test_vehicle_snr_for_a_second_vehicle():
    a = Vehicle(20.0, 10.0, 5.0, (Tone(500.0, 1.0),))
    b = Vehicle(20.0, 20.0, 9.0, (Tone(700.0, 2.0),))
    sc = Scene((a, b), 12.0, FS, snr_db=15.0)
    # same amplitude ratio as distance ratio: same SNR
    assert vehicle_snr_db(sc, 1) == pytest.approx(15.0, abs=1e-12)


# ---------------------------------------------------------------- ground reflection

def test_ground_reflection_two_path_interference():
    # image source mirrored in the ground: extra path r_i - d, amplitude R/r_i;
    # a steady tone then has amplitude |1/d + R e^{-i 2 pi f dt}/r_i| (two-path
    # interference, e.g. Kinsler et al., Fundamentals of Acoustics; from memory)
    d, hs, hm, r_coef = 5.0, 1.0, 1.2, 0.7
    c = speed_of_sound_iso(20.0)
    r_i = math.sqrt(d * d + 4 * hs * hm)
    dt = (r_i - d) / c
    for f in (1 / (2 * dt), 1 / dt, 300.0):  # first null, first peak, elsewhere
        veh = Vehicle(0.0, d, 0.0, (Tone(f),), source_height_m=hs)
        x = render(Scene((veh,), 2.0, FS, snr_db=None, ground_reflection=r_coef, mic_height_m=hm))
        measured = np.abs(hilbert(x))[FS // 2:3 * FS // 2].mean()
        expected = abs(1 / d + r_coef / r_i * np.exp(-2j * np.pi * f * dt))
        assert measured == pytest.approx(expected, rel=1e-4)


def test_ground_reflection_delay_in_the_autocorrelation():
    d, hs, hm = 5.0, 1.0, 1.2
    c = speed_of_sound_iso(20.0)
    lag = (math.sqrt(d * d + 4 * hs * hm) - d) / c * FS  # 10.7 samples
    veh = Vehicle(0.0, d, 0.0, (), source_height_m=hs, tyre_noise=1.0, tyre_cutoff_hz=3500.0)
    x = render(Scene((veh,), 5.0, FS, snr_db=None, ground_reflection=0.7, mic_height_m=hm))
    lags = np.arange(3, 60)
    ac = np.array([np.dot(x[:-k], x[k:]) for k in lags])
    assert abs(lags[np.argmax(ac)] - lag) <= 1.0


# ---------------------------------------------------------------- interferers

def test_fan_spins_up_and_down():
    fan = Interferer(200.0, 0.1, on_s=2.0, off_s=6.0, kind="fan", spin_s=2.0)
    x = render(Scene((), 10.0, FS, snr_db=None, interferers=(fan,)))
    t = np.arange(1, x.size - 1) / FS
    f = inst_freq(x, FS)
    assert np.all(x[: 2 * FS] == 0.0) and np.all(x[8 * FS + 1:] == 0.0)
    running = (t > 4.2) & (t < 5.8)
    assert np.median(f[running]) == pytest.approx(200.0, abs=0.01)
    # half-way through the spin-up: progress 0.5, frequency 0.3 + 0.7 * 0.5 of running
    assert f[int(3.0 * FS) - 1] == pytest.approx(200.0 * 0.65, rel=0.01)
    assert np.abs(hilbert(x))[int(5.0 * FS)] == pytest.approx(0.1, rel=1e-3)


def test_steady_interferer_with_clipping():
    hum = Interferer(100.0, 1.0)
    clipped = render(Scene((), 1.0, FS, snr_db=None, interferers=(hum,), gain=2.0, clip=True))
    plain = render(Scene((), 1.0, FS, snr_db=None, interferers=(hum,), gain=2.0))
    assert np.max(plain) == pytest.approx(2.0, rel=1e-3)
    assert np.max(clipped) == 1.0 and np.min(clipped) == -1.0
    assert np.mean(np.abs(clipped) == 1.0) > 0.5  # a sine at twice full scale is clipped 2/3 of the time


# ---------------------------------------------------------------- determinism

def busy_scene(seed=7):
    car = Vehicle(20.0, 8.0, 3.0, harmonic_tones(40.0, [0.3, 1.0, 0.5]), wander_rms=0.003,
                  tyre_noise=0.3, on_s=1.0, off_s=6.0)
    train = Vehicle(25.0, 12.0, 5.0, (Tone(311.0), Tone(370.0), Tone(470.0)),
                    source_height_m=3.5, tyre_noise=0.1)
    return Scene((car, train), 9.0, FS, ground_reflection=0.7, snr_db=10.0, seed=seed,
                 interferers=(Interferer(100.0, 0.01, wobble_rms=0.01),
                              Interferer(150.0, 0.005, kind="fan", on_s=2.0, off_s=5.0)))


@pytest.mark.parametrize("block", [1, 777, 4096, 100000])
def test_blocks_concatenate_to_the_whole_render(block):
    sc = busy_scene()
    whole = render(sc)
    blocks = list(render_blocks(sc, block))
    assert all(b.size == block for b in blocks[:-1])
    assert np.array_equal(np.concatenate(blocks), whole)


def test_seed_reproducibility():
    a, b, other = render(busy_scene(7)), render(busy_scene(7)), render(busy_scene(8))
    assert np.array_equal(a, b)
    assert np.max(np.abs(a - other)) > 0.01


def test_scale_to_peak():
    sc = scale_to_peak(busy_scene(), 0.5)
    assert np.max(np.abs(render(sc))) == pytest.approx(0.5, rel=1e-12)


# ---------------------------------------------------------------- bad input

@pytest.mark.parametrize("make", [
    lambda: Scene((Vehicle(350.0, 10.0, 1.0, (Tone(100.0),)),), 2.0, FS),     # v >= c
    lambda: Scene((Vehicle(20.0, 0.3, 1.0, (Tone(100.0),)),), 2.0, FS),       # d < |hs - hm|
    lambda: Scene((), 2.0, FS),                                                # SNR without a vehicle
    lambda: Scene((Vehicle(20.0, 10.0, 1.0, (Tone(3900.0),)),), 2.0, FS),     # above Nyquist
    lambda: Scene((), 2.0, 4000, snr_db=None),                                 # rate out of range
    lambda: Scene((), 2.0, FS, snr_db=None, noise="brown"),
    lambda: Vehicle(20.0, 10.0, 1.0, (Tone(100.0),), on_s=5.0, off_s=2.0),
    lambda: Tone(-5.0),
    lambda: Interferer(100.0, 1.0, kind="siren"),
])
def test_bad_parameters_raise_config_error(make):
    with pytest.raises(ConfigError):
        make()
