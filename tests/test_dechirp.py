"""Following a fitted tone in narrow-band spectra along its course (passby.dechirp).

References used here: the exact moving-source Doppler factor of
passby.physics (emission time from t = tau + r(tau)/c, Ferguson & Quinn
1994; itself checked against textbook values in test_physics); scipy's
cumulative trapezoid for the phase of the synthetic tone; an exhaustive
search over all paths for the dynamic programme.
"""

import itertools

import numpy as np
import pytest
import scipy.integrate

from passby.dechirp import CourseSpectrogram, best_path, course_spectrograms, follow_in_spectrogram
from passby.physics import doppler_factor
from passby.tracking import Track

C = 343.2  # ISO 9613-1: 343.2 m/s at 20 C


def _doppler_tone(fs, dur, f0, v, d, t0, amp=1.0):
    """A tone heard with the exact Doppler factor, its phase by scipy's trapezoid on a fine grid."""
    t = np.arange(int(dur * fs)) / fs
    factor = doppler_factor(t, v, d, t0, C)
    phase = 2.0 * np.pi * f0 * scipy.integrate.cumulative_trapezoid(factor, t, initial=0.0)
    return t, amp * np.cos(phase)


def test_a_doppler_tone_lies_on_its_course():
    fs, f0 = 8000.0, 700.0
    t, y = _doppler_tone(fs, 12.0, f0, 25.0, 10.0, 6.0, amp=0.5)
    ft = np.arange(100, 1100) * 0.01
    factor = doppler_factor(ft, 25.0, 10.0, 6.0, C)
    # the course drawn for a rest frequency 2 Hz low: the tone sits 2 Hz x factor above it
    sp = course_spectrograms(y, fs, 0.0, ft, factor, [f0 - 2.0], [15.0], 0.15, first_frame=100)[0]
    rows = np.arange(sp.frame.size)
    col = np.argmax(sp.p_db, axis=1)
    from passby.spectral import interpolate_peaks
    ok = (col > 0) & (col < sp.offset_hz.size - 1)
    d, h = interpolate_peaks(sp.p_db, rows[ok], col[ok])
    off = sp.offset_hz[col[ok]] + d * sp.bin_hz
    want = 2.0 * factor[sp.frame[ok] - 100]
    # away from the pass (a steady heard pitch within the window) the offset is exact
    flat = np.abs(ft[sp.frame[ok] - 100] - 6.0) > 1.5
    assert np.max(np.abs(off[flat] - want[flat])) < 0.01
    # near the pass the window averages a sweeping residual: still within a tenth of a hertz
    assert np.max(np.abs(off - want)) < 0.1
    # level of a tone A cos(...): 20 log10(A / 2) (unit-sum window, block response taken off)
    level = h + sp.level_db(off)
    assert np.median(level[flat]) == pytest.approx(20.0 * np.log10(0.25), abs=0.05)


def test_best_path_is_the_best_of_all_paths():
    rng = np.random.default_rng(7)
    for _ in range(20):
        s = rng.normal(size=(6, 5))
        path = best_path(s, 1)
        best = max((p for p in itertools.product(range(5), repeat=6)
                    if all(abs(a - b) <= 1 for a, b in zip(p, p[1:]))),
                   key=lambda p: sum(s[i, c] for i, c in enumerate(p)))
        assert sum(s[i, c] for i, c in enumerate(path)) == pytest.approx(sum(s[i, c] for i, c in enumerate(best)))
        assert np.all(np.abs(np.diff(path)) <= 1)


def _spectrogram(seed, heard, n=2000, nb=61, line_db=8.0):
    """Noise power (exponential, unit mean) with a line wandering slowly within ``heard``."""
    rng = np.random.default_rng(seed)
    p = rng.exponential(1.0, (n, nb))
    # a smooth line: a Gaussian main lobe of s.d. 1.4 bins around a slowly wandering column
    centre = 30 + 6.0 * np.sin(np.arange(n) / 300.0)
    cols = np.arange(nb)
    lo, hi = heard
    for r in range(lo, hi):
        p[r] += 10 ** (line_db / 10) * np.exp(-0.5 * ((cols - centre[r]) / 1.4) ** 2)
    offset = (cols - 30) * 0.5
    sp = CourseSpectrogram(np.arange(n), np.full(n, 1000.0), offset, (10 * np.log10(p)).astype(np.float32), 0.0025)
    return sp, 1000.0 + (centre - 30) * 0.5


def _core_track(sp, true_hz, frames):
    return Track(frames, true_hz[frames], np.full(frames.size, 20.0), np.zeros(frames.size))


def test_follows_a_weak_line_to_its_ends_and_on_its_course():
    sp, true_hz = _spectrogram(1, (300, 1700))
    track = _core_track(sp, true_hz, np.arange(900, 1100))
    out = follow_in_spectrogram(track, sp)
    assert abs(out.start - 300) <= 60 and abs(out.end - 1700) <= 60
    assert np.median(np.abs(out.freq_hz - true_hz[out.frame])) < 0.25   # half a column


def test_noise_alone_is_not_followed():
    sp, true_hz = _spectrogram(2, (900, 1100))
    track = _core_track(sp, true_hz, np.arange(900, 1100))
    out = follow_in_spectrogram(track, sp)
    assert out.start >= 850 and out.end <= 1150


def test_masked_cells_are_not_followed():
    # a line everywhere, but masked (a steady line of the background) outside the track
    sp, true_hz = _spectrogram(3, (0, 2000))
    track = _core_track(sp, true_hz, np.arange(900, 1100))
    mask = np.ones(sp.p_db.shape, dtype=bool)
    mask[900:1100] = False
    out = follow_in_spectrogram(track, sp, masked=mask)
    assert out.start >= 850 and out.end <= 1150
