"""Following a fitted tone through faint peaks (passby.tracking.follow_course).

The true course is the exact moving-source Doppler factor of passby.physics
(emission time solved from t = tau + r(tau)/c, Ferguson & Quinn 1994),
itself checked against textbook values in test_physics.
"""

import numpy as np

from passby.physics import doppler_factor
from passby.spectral import Peaks
from passby.tracking import Track, follow_course


def _scene(seed, tone_frames, n=2000, hop=0.01, f0=800.0, noise_per_frame=20, jitter_hz=0.8):
    """Faint peaks: the tone on ``tone_frames`` plus uniform noise peaks."""
    rng = np.random.default_rng(seed)
    t = np.arange(n) * hop
    factor = doppler_factor(t, 25.0, 10.0, 10.0, 343.2)
    frames, freqs = [], []
    for p in tone_frames:
        frames.append(p)
        freqs.append(f0 * factor[p] + rng.normal(0.0, jitter_hz))
    for p in range(n):
        k = rng.poisson(noise_per_frame)
        frames += [p] * k
        freqs += list(rng.uniform(100.0, 2000.0, k))
    frames, freqs = np.asarray(frames), np.asarray(freqs)
    order = np.argsort(frames, kind="stable")
    m = frames.size
    faint = Peaks(frames[order], freqs[order], np.full(m, 6.0), 0, n, np.zeros(m))
    return factor, faint


def test_follows_the_tone_out_to_where_it_ends_and_no_further():
    # the tone is heard (faintly) from frame 300 to 1700; tracked only 900-1100
    heard = range(300, 1700)
    factor, faint = _scene(1, heard)
    core = np.arange(900, 1100)
    sel = np.isin(faint.frame, core) & (np.abs(faint.freq_hz - 800.0 * factor[faint.frame]) < 5.0)
    track = Track(faint.frame[sel], faint.freq_hz[sel], np.full(sel.sum(), 20.0), np.zeros(sel.sum()))
    out = follow_course(track, faint, factor, 0, tol_hz=3.0, window=100, min_rate=0.3)
    assert abs(out.start - 300) <= 100 and abs(out.end - 1700) <= 100
    # the peaks taken lie on the course (2.5 jitter s.d. plus the smoothing lag)
    assert np.median(np.abs(out.freq_hz - 800.0 * factor[out.frame])) < 1.0


def test_noise_alone_is_not_followed_far():
    # the tone stops where its track stops: the noise peaks near the course
    # (about 1 - exp(-20 * 6 / 1900) = 6 % of frames) must not carry it on
    factor, faint = _scene(2, range(900, 1100))
    sel = np.isin(faint.frame, np.arange(900, 1100)) & (np.abs(faint.freq_hz - 800.0 * factor[faint.frame]) < 5.0)
    track = Track(faint.frame[sel], faint.freq_hz[sel], np.full(sel.sum(), 20.0), np.zeros(sel.sum()))
    out = follow_course(track, faint, factor, 0, tol_hz=3.0, window=100, min_rate=0.3)
    assert out.start >= 850 and out.end <= 1150
