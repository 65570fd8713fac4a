"""The front end's building blocks against scipy (reference library)."""

import numpy as np
import pytest
import scipy.signal

from passby.spectral import (Decimator, FrameGeometry, gaussian_window, interpolate_peaks,
                             kaiser_lowpass, kaiser_order, make_geometry, power_spectra_db)


@pytest.mark.parametrize("atten, width", [(80.0, 0.05), (80.0, 0.0625), (60.0, 0.1)])
def test_kaiser_design_matches_scipy(atten, width):
    # scipy.signal.kaiserord and firwin implement the same Kaiser formulas
    n, beta = kaiser_order(atten, width)
    n_ref, beta_ref = scipy.signal.kaiserord(atten, width)
    assert n == n_ref and beta == pytest.approx(beta_ref, abs=1e-6)
    h = kaiser_lowpass(n, 0.3, beta)
    assert np.allclose(h, scipy.signal.firwin(n, 0.3, window=("kaiser", beta)), atol=1e-14)


def test_gaussian_window_matches_scipy():
    g = make_geometry(12000.0, 60.0, 4500.0)
    ref = scipy.signal.windows.gaussian(g.n_window, g.sigma_s * g.fs, sym=True)
    assert np.allclose(gaussian_window(g), ref, atol=1e-7)


def test_decimator_passes_a_tone_and_rejects_an_alias():
    fs, q = 48000, 4
    t = np.arange(fs * 2) / fs
    dec = Decimator(fs, q, 4500.0)
    y = np.concatenate([dec.push(np.sin(2 * np.pi * 1000.0 * t)), dec.flush()])
    ty = np.arange(y.size) * q / fs - dec.delay_s
    mid = slice(500, -500)
    # a 1 kHz tone passes with its phase (the delay is accounted for)
    assert np.max(np.abs(y[mid] - np.sin(2 * np.pi * 1000.0 * ty[mid]))) < 1e-3
    dec = Decimator(fs, q, 4500.0)
    z = np.concatenate([dec.push(np.sin(2 * np.pi * 8000.0 * t)), dec.flush()])
    # 8 kHz would alias to 4 kHz at 12 kHz: at least 80 dB down (the design's attenuation)
    assert 20 * np.log10(np.max(np.abs(z[mid]))) < -80.0


def test_peak_frequency_of_a_tone_is_exact():
    # a Gaussian-windowed tone: parabolic interpolation of the log spectrum is exact
    g = make_geometry(16000.0, 60.0, 4500.0)
    w = gaussian_window(g)
    t = np.arange(g.n_window) / g.fs
    for f in (301.3, 1234.5, 3999.9):
        p = power_spectra_db(np.sin(2 * np.pi * f * t)[None, :].astype(np.float32), w, g)
        k = int(np.argmax(p[0]))
        delta, _ = interpolate_peaks(p, np.array([0]), np.array([k]))
        est = (g.k_lo - 1 + k + float(delta[0])) * g.bin_hz
        assert est == pytest.approx(f, abs=0.01)


def test_power_spectrum_matches_numpy_fft():
    g = make_geometry(8000.0, 60.0, 3500.0)
    rng = np.random.default_rng(3)
    x = rng.standard_normal((2, g.n_window)).astype(np.float32)
    w = gaussian_window(g)
    p = power_spectra_db(x, w, g)
    ref = np.abs(np.fft.rfft(x * w, g.n_fft, axis=1)) ** 2
    ref = 10 * np.log10(ref[:, g.k_lo - 1: g.k_hi + 2] + 1e-30)
    assert np.allclose(p, ref, atol=1e-3)
    assert isinstance(g, FrameGeometry)


def _noisy_spectra(seed, n_frames=50):
    # Periodogram of white noise: exponential power per bin (common practice, no source),
    # on a sloping background, with two steady tones.
    from passby.spectral import make_geometry
    g = make_geometry(12000.0, 60.0, 4500.0)
    rng = np.random.default_rng(seed)
    nb = g.k_hi - g.k_lo + 3
    bg = np.linspace(0.0, -20.0, nb)
    p = bg + 10.0 * np.log10(rng.exponential(size=(n_frames, nb)))
    p[:, 100:103] += 20.0
    p[:, 300] += 30.0
    return g, p, bg


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_no_peak_is_reported_twice(seed):
    from passby.spectral import pick_peaks
    # two whitened maxima that climb to one raw maximum are one peak
    g, p, bg = _noisy_spectra(seed, 200)
    peaks = pick_peaks(p, bg, 0, g, 3.0, max_per_frame=40)
    key = peaks.frame.astype(np.int64) * 100000 + np.round(peaks.freq_hz * 10).astype(np.int64)
    assert peaks.frame.size > 1000
    assert np.unique(key).size == key.size


def test_line_excess_marks_a_steady_line_in_the_background():
    # A steady 1000 Hz sine in white noise, 20 dB above the noise per bin
    # (numpy's sine and normal generator are the reference): the background
    # (a low percentile of chunk means of dB values) stands 20 dB above its
    # local floor at the line's bin, plus the 2.51 dB by which the mean of
    # the dB values of noise power lies below its mean power (E[ln X] = -0.5772
    # for exponential X, Euler's constant), plus up to 1.5 dB for the low
    # percentile; near 0 elsewhere; a tone passing by for 2 s does not enter it.
    from passby.spectral import FrameAnalyser, make_geometry
    fs = 12000.0
    g = make_geometry(fs, 60.0, 4500.0)
    rng = np.random.default_rng(7)
    n = int(40 * fs)
    t = np.arange(n) / fs
    # noise per bin: sigma^2 x (window energy); line: (A/2)^2 x (window sum)^2
    w = np.exp(-0.5 * ((np.arange(g.n_window) - (g.n_window - 1) / 2) / (g.sigma_s * fs)) ** 2)
    a = 2.0 * np.sqrt(10 ** 2.0 * np.sum(w ** 2)) / np.sum(w)
    x = rng.standard_normal(n) + a * np.sin(2 * np.pi * 1000.0 * t)
    passing = (t > 20.0) & (t < 22.0)
    x[passing] += a * np.sin(2 * np.pi * 2000.0 * t[passing])
    fa = FrameAnalyser(g, 12.0, keep_frames=4000)
    for i in range(0, n, 12000):
        fa.push(x[i:i + 12000].astype(np.float32))
    fa.finish()
    frames = np.arange(fa.kept_from, fa.kept_from + 3000, 100)
    ex = fa.line_excess(frames, np.tile([1000.0, 1500.0, 2000.0], (frames.size, 1)))
    assert np.all((ex[:, 0] > 20.0 + 2.51) & (ex[:, 0] < 20.0 + 2.51 + 1.5))
    assert np.all(np.abs(ex[:, 1:]) < 3.0)



@pytest.mark.parametrize("length, hop", [(10, 3), (1009, 120), (5, 5), (1, 1)])
def test_strided_frames_match_numpy_sliding_windows(length, hop):
    # numpy.lib.stride_tricks.sliding_window_view (reference library)
    from passby.spectral import strided_frames
    x = np.arange(3000.0)
    ref = np.lib.stride_tricks.sliding_window_view(x, length)[::hop]
    got = strided_frames(x, length, hop)
    assert got.shape == ref.shape and np.array_equal(got, ref)
    assert strided_frames(x, length, hop, 4).shape == (min(4, ref.shape[0]), length)


@pytest.mark.parametrize("min_fft", [4096, 16384])
def test_decimator_output_matches_scipy_filtering(min_fft):
    # the same FIR applied by scipy.signal.upfirdn (reference library), then
    # decimated: overlap-save of any transform length gives it, block sizes aside
    fs, q = 48000, 4
    rng = np.random.default_rng(5)
    x = rng.standard_normal(3 * fs).astype(np.float32)
    dec = Decimator(fs, q, 4500.0, min_fft=min_fft)
    y = np.concatenate([dec.push(x[i:i + 7001]) for i in range(0, x.size, 7001)] + [dec.flush()])
    numtaps, beta = kaiser_order(80.0, max(6000.0 - 4500.0, 300.0) / 24000.0)
    assert dec.m >= numtaps
    h = kaiser_lowpass(dec.m, min(4500.0 + 750.0, 6000.0) / 24000.0, beta)
    # output j is sum_k h[k] x[q j - k] (the delay of (m - 1) / 2 input samples kept);
    # the transform drops the filter's stop band where decimation in time folds it
    # back, so the two differ by about that much: below the design's 80 dB
    ref = scipy.signal.upfirdn(h, x.astype(float), up=1, down=q)[:y.size]
    assert y.size == -(-x.size // q)
    err_db = 20 * np.log10(np.sqrt(np.mean((y - ref) ** 2) / np.mean(ref ** 2)))
    assert err_db < -80.0
