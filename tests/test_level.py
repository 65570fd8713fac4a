"""Levels against IEC 61672-1 (weighting, tolerances, time weighting) and scipy."""

import math

import numpy as np
import pytest
from scipy import signal

from passby.errors import InputError
from passby.level import (
    LevelMeter,
    P_REF_PA,
    a_weighting_db,
    a_weighting_sos,
    calibration_offset,
    fast_weighted_level,
    laf_max,
    leq,
    level_at_distance,
)

# IEC 61672-1:2013 Table 3, A-weighting, dB, at the nominal frequencies
# (exact base-ten frequencies 1000 * 10^(n/10) Hz). The values at 31.62,
# 63.10, 100, 125.9, 251.2, 501.2, 1000, 1995, 3981, 7943 and 15850 Hz as
# stated in the standard; the others from memory.
A_TABLE = {
    -20: -70.4, -19: -63.4, -18: -56.7, -17: -50.5, -16: -44.7, -15: -39.4,
    -14: -34.6, -13: -30.2, -12: -26.2, -11: -22.5, -10: -19.1, -9: -16.1,
    -8: -13.4, -7: -10.9, -6: -8.6, -5: -6.6, -4: -4.8, -3: -3.2, -2: -1.9,
    -1: -0.8, 0: 0.0, 1: 0.6, 2: 1.0, 3: 1.2, 4: 1.3, 5: 1.2, 6: 1.0, 7: 0.5,
    8: -0.1, 9: -1.1, 10: -2.5, 11: -4.3, 12: -6.6, 13: -9.3,
}

# IEC 61672-1:2013 Table 3, class 1 acceptance limits (+, -), dB, at the
# same nominal frequencies -- from memory (the 2002 edition's limits less
# the allowance for measurement uncertainty).
CLASS1 = {
    -20: (3.0, math.inf), -19: (2.5, math.inf), -18: (2.0, 4.0), -17: (2.0, 2.0),
    -16: (2.0, 1.5), -15: (1.5, 1.5), -14: (1.0, 1.0), -13: (1.0, 1.0),
    -12: (1.0, 1.0), -11: (1.0, 1.0), -10: (1.0, 1.0), -9: (1.0, 1.0),
    -8: (1.0, 1.0), -7: (1.0, 1.0), -6: (1.0, 1.0), -5: (1.0, 1.0),
    -4: (1.0, 1.0), -3: (1.0, 1.0), -2: (1.0, 1.0), -1: (1.0, 1.0),
    0: (0.7, 0.7), 1: (1.0, 1.0), 2: (1.0, 1.0), 3: (1.0, 1.0), 4: (1.0, 1.0),
    5: (1.0, 1.0), 6: (1.0, 1.0), 7: (1.5, 1.5), 8: (1.5, 2.0), 9: (1.5, 2.5),
    10: (2.0, 3.0), 11: (2.0, 5.0), 12: (2.5, 16.0), 13: (3.0, math.inf),
}


def nominal_hz(n):
    # IEC 61260-1 / IEC 61672-1: base-ten exact mid-band frequencies.
    return 1000.0 * 10.0 ** (n / 10.0)


def filter_deviation_db(fs, n_list, method="matched"):
    f = np.array([nominal_hz(n) for n in n_list])
    _, h = signal.sosfreqz(a_weighting_sos(fs, method), worN=f, fs=fs)
    return 20 * np.log10(np.abs(h)) - a_weighting_db(f)


def tone(freq, amp, seconds, fs, phase=0.0):
    t = np.arange(int(round(seconds * fs))) / fs
    return amp * np.sin(2 * np.pi * freq * t + phase)


def test_analytic_a_weighting_matches_the_iec_table():
    n = np.array(sorted(A_TABLE))
    got = a_weighting_db(nominal_hz(n))
    want = np.array([A_TABLE[k] for k in n])
    # The table is rounded to 0.1 dB.
    assert np.max(np.abs(got - want)) <= 0.1
    # IEC 61672-1 Annex E: A1000 normalisation gives 0 dB at 1 kHz.
    assert abs(a_weighting_db(1000.0)) < 1e-3


def test_brief_table_points():
    # IEC 61672-1:2013 Table 3, A-weighting.
    for f, want in [(31.62, -39.4), (63.10, -26.2), (100, -19.1), (125.9, -16.1),
                    (251.2, -8.6), (501.2, -3.2), (1000, 0.0), (1995, 1.2),
                    (3981, 1.0), (7943, -1.1), (15850, -6.6)]:
        assert a_weighting_db(f) == pytest.approx(want, abs=0.1)


@pytest.mark.parametrize("method", ["matched", "bilinear"])
def test_digital_filter_at_48k_meets_class1_20hz_to_10khz(method):
    n_list = [n for n in CLASS1 if -17 <= n <= 10]  # 19.95 Hz .. 10 kHz
    dev = filter_deviation_db(48000, n_list, method)
    for n, d in zip(n_list, dev):
        plus, minus = CLASS1[n]
        assert -minus <= d <= plus, (nominal_hz(n), d)


def test_matched_filter_follows_the_analytic_weighting_closely():
    # Against the analytic weighting of IEC 61672-1 Annex E itself.
    for fs in (44100, 48000):
        dev = filter_deviation_db(fs, range(-20, 11))
        assert np.max(np.abs(dev)) < 0.1
    dev = filter_deviation_db(48000, range(-20, 14))
    assert np.max(np.abs(dev)) < 1.0  # up to 20 kHz


@pytest.mark.parametrize("fs, top", [(8000, 6), (16000, 9), (22050, 10), (32000, 12)])
def test_matched_filter_meets_class1_up_to_nyquist_at_low_rates(fs, top):
    n_list = [n for n in CLASS1 if n <= top]
    dev = filter_deviation_db(fs, n_list)
    for n, d in zip(n_list, dev):
        plus, minus = CLASS1[n]
        assert -minus <= d <= plus, (fs, nominal_hz(n), d)


def test_plain_bilinear_fails_class1_at_16k():
    # Why the matched design exists: the bilinear transform's frequency
    # warping pulls the response down near Nyquist (6.31 kHz at 16 kHz).
    (d,) = filter_deviation_db(16000, [8], "bilinear")
    assert d < -CLASS1[8][1]


def test_filter_is_stable_and_rejects_bad_rates():
    for fs in (8000, 16000, 44100, 48000, 96000, 192000):
        sos = a_weighting_sos(fs)
        poles = np.concatenate([np.roots(s[3:]) for s in sos])
        assert np.all(np.abs(poles) < 1.0)
    with pytest.raises(InputError):
        a_weighting_sos(4000)
    with pytest.raises(InputError):
        a_weighting_sos(48000, method="nonsense")


def test_steady_sine_reads_its_rms_level_re_full_scale():
    fs = 48000
    for amp in (1.0, 0.3, 0.01):
        x = tone(1000.0, amp, 2.0, fs)
        # Mean square of a sine is A^2/2; A-weighting is 0 dB at 1 kHz.
        want = 20 * math.log10(amp / math.sqrt(2))
        assert fast_weighted_level(x, fs)[-1] == pytest.approx(want, abs=0.02)
        assert leq(x[fs:], fs) == pytest.approx(want, abs=0.02)
        assert laf_max(x, fs) == pytest.approx(want, abs=0.02)


def test_fast_rise_reaches_one_minus_one_over_e_after_125_ms():
    # IEC 61672-1:2013, 5.8: exponential time weighting, tau = 125 ms, so
    # a step of mean square rises to 1 - 1/e of its final value after tau.
    fs = 48000
    x = tone(1000.0, 0.5, 1.5, fs)
    laf = fast_weighted_level(x, fs)
    final = laf[-1]
    at_tau = laf[int(round(0.125 * fs)) - 1]
    assert at_tau - final == pytest.approx(10 * math.log10(1 - math.exp(-1)), abs=0.05)


def test_fast_decay_rate_is_34_7_db_per_second():
    # IEC 61672-1:2013, 5.8.2: decay rate of time weighting F, 34.7 dB/s
    # (10 log10(e) / 0.125 s).
    fs = 48000
    x = np.concatenate([tone(1000.0, 0.5, 1.0, fs), np.zeros(fs)])
    laf = fast_weighted_level(x, fs)
    a, b = laf[fs + fs // 10], laf[fs + fs // 2]
    assert (a - b) / 0.4 == pytest.approx(34.7, abs=0.3)


@pytest.mark.parametrize("burst_s, want, plus, minus", [
    # IEC 61672-1:2013 Table 4, 4 kHz tone bursts, LAFmax minus the steady
    # level: reference response 10 log10(1 - exp(-Tb/tau)); class 1 limits
    # from memory.
    (0.200, -1.0, 0.5, 0.5),
    (0.002, -18.0, 1.0, 1.5),
    (0.00025, -27.0, 1.0, 3.0),
])
def test_tone_burst_response(burst_s, want, plus, minus):
    fs = 48000
    steady = fast_weighted_level(tone(4000.0, 0.5, 1.0, fs), fs)[-1]
    n = int(round(burst_s * fs))
    x = np.zeros(fs)
    x[1000:1000 + n] = tone(4000.0, 0.5, n / fs, fs)
    delta = laf_max(x, fs) - steady
    assert want - minus <= delta <= want + plus
    assert delta == pytest.approx(10 * math.log10(-math.expm1(-burst_s / 0.125)), abs=0.3)


def test_level_meter_is_block_size_invariant():
    fs = 16000
    rng = np.random.default_rng(7)
    x = 0.1 * rng.standard_normal(3 * fs) + tone(440.0, 0.2, 3.0, fs)
    want = fast_weighted_level(x, fs, offset_db=80.0, step_s=0.01)
    for trial in range(3):
        meter = LevelMeter(fs, offset_db=80.0, step_s=0.01)
        cuts = np.sort(rng.integers(0, x.size, size=25 + 20 * trial))
        parts = [meter.push(b) for b in np.split(x, cuts)]
        got = np.concatenate(parts)
        assert got.shape == want.shape == (300,)
        np.testing.assert_allclose(got, want, rtol=0, atol=1e-9)
        assert meter.calibrated
    np.testing.assert_allclose(meter.times(0, 3), [0.01, 0.02, 0.03])
    # Same numbers as the per-sample time history, sampled at step ends.
    per_sample = fast_weighted_level(x, fs, offset_db=80.0)
    np.testing.assert_allclose(want, per_sample[159::160], atol=1e-12)


def test_level_meter_single_samples_and_empty_blocks():
    fs = 8000
    x = tone(1000.0, 0.5, 0.05, fs)
    meter = LevelMeter(fs, step_s=0.01)
    got = np.concatenate([meter.push(x[i:i + 1]) for i in range(x.size)] + [meter.push([])])
    np.testing.assert_allclose(got, fast_weighted_level(x, fs, step_s=0.01), atol=1e-9)
    assert not meter.calibrated


def test_leq_is_the_energy_mean():
    # IEC 61672-1:2013, 3.10: time-average level = 10 log10 of the mean square.
    fs = 48000
    x = np.concatenate([tone(1000.0, math.sqrt(2) * 0.1, 1.0, fs),
                        tone(1000.0, math.sqrt(2) * 0.01, 1.0, fs)])
    assert leq(x, fs) == pytest.approx(10 * math.log10((0.01 + 0.0001) / 2), abs=0.02)


def calibrator_recording(fs, gain_per_pa, seconds=4.0, spl_db=94.0, freq=1000.0,
                         noise=1e-4, seed=1):
    # Pressure amplitude of the calibrator: sqrt(2) * p_rms,
    # p_rms = 20 uPa * 10^(L/20) (ISO 1683 reference pressure).
    p_rms = P_REF_PA * 10 ** (spl_db / 20)
    rng = np.random.default_rng(seed)
    x = tone(freq, math.sqrt(2) * p_rms * gain_per_pa, seconds, fs, phase=0.3)
    return x + noise * rng.standard_normal(x.size)


@pytest.mark.parametrize("fs", [16000, 48000])
def test_calibrated_tone_comes_out_at_its_sound_pressure_level(fs):
    gain = 0.05  # full-scale units per pascal of the simulated chain
    cal = calibrator_recording(fs, gain)
    offset = calibration_offset(cal, fs, reference_db=94.0)
    assert offset == pytest.approx(-20 * math.log10(gain * P_REF_PA), abs=0.05)
    for freq, spl in [(1000.0, 74.0), (2000.0, 80.0), (250.0, 85.0)]:
        p_rms = P_REF_PA * 10 ** (spl / 20)
        x = tone(freq, math.sqrt(2) * p_rms * gain, 3.0, fs)
        want = spl + a_weighting_db(freq)
        assert leq(x[fs // 2:], fs, offset) == pytest.approx(want, abs=0.2)
        assert laf_max(x, fs, offset) == pytest.approx(want, abs=0.2)


def test_calibration_ignores_the_seconds_of_fitting_the_calibrator():
    fs = 48000
    cal = calibrator_recording(fs, 0.05, seconds=4.0)
    cal[:fs // 2] *= 0.2   # calibrator not seated yet
    cal[-fs // 4:] = 0.0   # switched off
    assert calibration_offset(cal, fs) == pytest.approx(
        -20 * math.log10(0.05 * P_REF_PA), abs=0.05)


def test_calibration_rejects_bad_recordings():
    fs = 48000
    rng = np.random.default_rng(3)
    with pytest.raises(InputError, match="clips"):
        calibration_offset(np.clip(calibrator_recording(fs, 2.0), -1, 1), fs)
    with pytest.raises(InputError, match="too short"):
        calibration_offset(calibrator_recording(fs, 0.05, seconds=0.5), fs)
    with pytest.raises(InputError, match="no calibrator tone"):
        calibration_offset(calibrator_recording(fs, 0.05, freq=250.0), fs)
    with pytest.raises(InputError, match="20 dB"):
        noisy = calibrator_recording(fs, 0.01) + 0.05 * rng.standard_normal(4 * fs)
        calibration_offset(noisy, fs)
    wobbly = calibrator_recording(fs, 0.05)
    wobbly *= 1 + 0.5 * np.sin(2 * np.pi * 0.5 * np.arange(wobbly.size) / fs)
    with pytest.raises(InputError, match="steady"):
        calibration_offset(wobbly, fs)
    with pytest.raises(InputError, match="NaN"):
        calibration_offset(np.full(fs * 3, np.nan), fs)


def test_level_at_distance_is_spherical_spreading():
    # ISO 9613-2:1996, 7.1: geometric divergence 20 log10(d) -- 6.02 dB per
    # doubling of distance.
    assert level_at_distance(90.0, 10.0, 20.0) == pytest.approx(90.0 - 6.0206, abs=1e-4)
    assert level_at_distance(70.0, 25.0, 7.5) == pytest.approx(70.0 + 20 * math.log10(25 / 7.5))
    with pytest.raises(InputError):
        level_at_distance(70.0, 0.0, 7.5)
    with pytest.raises(InputError):
        level_at_distance(70.0, 10.0, float("nan"))
