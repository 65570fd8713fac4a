"""Sound levels: A-weighting, Fast time weighting, LAFmax, LAeq, calibration.

Pure functions on numpy arrays (and one small streaming class whose state is
only filter memory). Samples are in full-scale units (a sample value of 1.0
is full scale).

Level convention
----------------
``L = 10 log10(mean square of the A-weighted signal / 1.0) + offset_db``.
With no offset (``offset_db`` None or 0) a level is in *dB re full scale*:
a full-scale sine (amplitude 1.0) reads -3.01 dB, a full-scale square wave
0 dB. With the offset measured by :func:`calibration_offset` a level is in
dB re 20 uPa, the reference sound pressure of ISO 1683. Levels from a
microphone chain that is not certified to IEC 61672-1 are indicative only.

References
----------
.. [IEC61672] IEC 61672-1:2013, Electroacoustics -- Sound level meters --
   Part 1: Specifications. Annex E (analytic frequency weightings, pole
   frequencies f1..f4, A1000 = -2.000 dB), Table 3 (weightings and
   acceptance limits), 5.8 (time weighting F, time constant 0.125 s).
.. [ISO1683] ISO 1683:2015, Acoustics -- Preferred reference values for
   acoustical and vibratory levels (sound pressure 20 uPa).
.. [IEC60942] IEC 60942:2017, Electroacoustics -- Sound calibrators.
.. [ISO9613-2] ISO 9613-2:1996, Acoustics -- Attenuation of sound during
   propagation outdoors -- Part 2: General method of calculation
   (geometric divergence of a point source, 7.1).
.. [Vicanek] M. Vicanek, "Matched Second Order Digital Filters" (2016):
   poles by the matched z-transform, numerator by matching the magnitude
   at DC, Nyquist and one frequency between.
"""

from __future__ import annotations

import functools
import math

import numpy as np
from scipy import signal

from passby.errors import InputError

# IEC 61672-1:2013, Annex E, E.2 and E.3: pole frequencies of the analytic
# A-weighting, Hz, and its normalisation constant at 1 kHz, dB.
F1_HZ = 20.598997
F2_HZ = 107.65265
F3_HZ = 737.86223
F4_HZ = 12194.217
A1000_DB = -2.000

#: Time constant of time weighting F (Fast), s (IEC 61672-1:2013, 5.8.1).
FAST_TAU_S = 0.125

#: Reference sound pressure in air, Pa (ISO 1683).
P_REF_PA = 20e-6

#: Mean squares below this floor read as -200 dB (no -inf in the output;
#: far below the noise of 24-bit audio, about -146 dB re full scale).
_MS_FLOOR = 1e-20

#: A recording whose peak reaches this fraction of full scale is taken as
#: clipped (common practice, no source).
CLIP_LEVEL = 0.999


def _db(ms):
    return 10.0 * np.log10(np.maximum(ms, _MS_FLOOR))


def _offset(offset_db):
    if offset_db is None:
        return 0.0
    value = float(offset_db)
    if not math.isfinite(value):
        raise InputError(f"level offset must be a finite number of dB, not {offset_db!r}")
    return value


def _signal(x, fs):
    x = np.asarray(x, dtype=float)
    if x.ndim != 1:
        raise InputError(f"expected a 1-D array of samples, got shape {x.shape}")
    if not np.all(np.isfinite(x)):
        raise InputError("the samples contain NaN or infinite values")
    fs = float(fs)
    if not (math.isfinite(fs) and fs > 0):
        raise InputError(f"sample rate must be positive, not {fs!r}")
    return x, fs


def a_weighting_db(f):
    """Analytic A-weighting of IEC 61672-1, dB.

    ``A(f) = 20 log10[f4^2 f^4 / ((f^2 + f1^2) (f^2 + f2^2)^(1/2)
    (f^2 + f3^2)^(1/2) (f^2 + f4^2))] - A1000``

    Parameters
    ----------
    f : float or array_like
        Frequency, Hz (0 gives -inf).

    Returns
    -------
    float or ndarray
        The weighting, dB (0.00 at 1 kHz).

    References
    ----------
    IEC 61672-1:2013 [IEC61672]_, Annex E, eq. E.6, with f1 = 20.598997 Hz,
    f2 = 107.65265 Hz, f3 = 737.86223 Hz, f4 = 12194.217 Hz and
    A1000 = -2.000 dB.

    Examples
    --------
    >>> round(float(a_weighting_db(1000.0)), 2)
    0.0
    >>> round(float(a_weighting_db(100.0)), 1)
    -19.1
    """
    f = np.asarray(f, dtype=float)
    f2 = f * f
    num = F4_HZ ** 2 * f2 * f2
    den = ((f2 + F1_HZ ** 2) * np.sqrt((f2 + F2_HZ ** 2) * (f2 + F3_HZ ** 2))
           * (f2 + F4_HZ ** 2))
    with np.errstate(divide="ignore"):
        out = 20.0 * np.log10(num / den) - A1000_DB
    return out[()] if out.ndim == 0 else out


def _matched_double_pole(fs):
    """Biquad for the analog double pole ``1 / (1 + s/w4)^2`` (w4 = 2 pi f4).

    Poles by the matched z-transform, ``z = exp(-w4 / fs)`` (double); the
    numerator is chosen so that ``|H|^2`` equals the analog one at DC, at
    Nyquist and at fs/4 ([Vicanek]_'s approach). Writing ``phi =
    sin^2(w/2)``, ``|B(e^jw)|^2 = B0 (1 - phi) + B1 phi + B2 4 phi (1 - phi)``
    with ``B0 = (b0 + b1 + b2)^2``, ``B1 = (b0 - b1 + b2)^2`` and
    ``B2 = -4 b0 b2``; three matched values give B0, B1, B2 and so b.
    """
    r = math.exp(-2.0 * math.pi * F4_HZ / fs)
    a = np.array([1.0, -2.0 * r, r * r])

    def target_sq(f):  # |1 / (1 + j f/f4)^2|^2
        return 1.0 / (1.0 + (f / F4_HZ) ** 2) ** 2

    def den_sq(f):  # |A(e^jw)|^2
        w = 2.0 * math.pi * f / fs
        e = np.exp(-1j * w * np.arange(3))
        return abs(np.dot(a, e)) ** 2

    fm = fs / 4.0
    phi = math.sin(math.pi * fm / fs) ** 2
    b0_sq = target_sq(0.0) * den_sq(0.0)
    b1_sq = target_sq(fs / 2.0) * den_sq(fs / 2.0)
    bm_sq = target_sq(fm) * den_sq(fm)
    b2_term = (bm_sq - b0_sq * (1.0 - phi) - b1_sq * phi) / (4.0 * phi * (1.0 - phi))
    s0, s1 = math.sqrt(b0_sq), math.sqrt(b1_sq)
    b1 = 0.5 * (s0 - s1)
    w = 0.5 * (s0 + s1)
    disc = max(w * w + b2_term, 0.0)
    b0 = 0.5 * (w + math.sqrt(disc))
    b2 = w - b0
    return np.array([[b0, b1, b2, 1.0, -2.0 * r, r * r]])


@functools.lru_cache(maxsize=16)
def _a_weighting_sos_cached(fs, method):
    two_pi = 2.0 * math.pi
    if method == "bilinear":
        poles = -two_pi * np.array([F1_HZ, F1_HZ, F2_HZ, F3_HZ, F4_HZ, F4_HZ])
        z, p, k = signal.bilinear_zpk(np.zeros(4), poles, 1.0, fs)
        sos = signal.zpk2sos(z, p, k)
    else:
        poles = -two_pi * np.array([F1_HZ, F1_HZ, F2_HZ, F3_HZ])
        z, p, k = signal.bilinear_zpk(np.zeros(4), poles, 1.0, fs)
        sos = np.vstack([signal.zpk2sos(z, p, k), _matched_double_pole(fs)])
    _, h = signal.sosfreqz(sos, worN=[1000.0], fs=fs)
    sos[0, :3] /= abs(h[0])
    return sos


def a_weighting_sos(fs, method="matched"):
    """Digital A-weighting filter, second-order sections, 0 dB at 1 kHz.

    Parameters
    ----------
    fs : float
        Sampling rate, Hz (at least 8 kHz).
    method : {"matched", "bilinear"}
        ``"bilinear"``: the whole analog zpk of Annex E through
        :func:`scipy.signal.bilinear_zpk`. The bilinear transform squeezes
        the response near Nyquist (at 48 kHz the error is -0.53 dB at
        7.94 kHz and -1.22 dB at 10 kHz, inside the class 1 limits; at
        16 kHz -5.8 dB at 6.31 kHz, outside them).
        ``"matched"`` (default): the four low poles and the zeros through the
        bilinear transform (accurate far below Nyquist), the double pole at
        f4 as a magnitude-matched biquad ([Vicanek]_). Measured deviation
        from the analytic weighting at the nominal base-ten frequencies:
        at most 0.09 dB from 10 Hz to 10 kHz at 44.1 and 48 kHz (0.83 dB
        at 20 kHz); 0.49 dB up to 10 kHz at 22.05 kHz; 0.40 dB up to
        7.94 kHz at 16 kHz; 0.19 dB up to 3.98 kHz at 8 kHz. So the class 1
        acceptance limits of IEC 61672-1 Table 3 are met by the filter
        itself up to the last nominal frequency below Nyquist; nothing
        above Nyquist is recorded, so a low rate limits the upper frequency
        range of the measurement (16 kHz: 8 kHz).

    Returns
    -------
    sos : ndarray, shape (n_sections, 6)
        For :func:`scipy.signal.sosfilt` (a copy of the design cached per rate).

    Raises
    ------
    InputError
        For a rate below 8 kHz or an unknown method.

    References
    ----------
    IEC 61672-1:2013 [IEC61672]_, Annex E; [Vicanek]_.

    Examples
    --------
    >>> from scipy.signal import sosfreqz
    >>> sos = a_weighting_sos(48000)
    >>> _, h = sosfreqz(sos, worN=[1000.0, 100.0], fs=48000)
    >>> [round(float(v), 1) + 0.0 for v in 20 * np.log10(abs(h))]
    [0.0, -19.1]
    """
    fs = float(fs)
    if not (math.isfinite(fs) and fs >= 8000.0):
        raise InputError(f"A-weighting needs a sample rate of at least 8 kHz, not {fs:g} Hz")
    if method not in ("matched", "bilinear"):
        raise InputError(f"unknown A-weighting design method {method!r}")
    return _a_weighting_sos_cached(fs, method).copy()


def _fast_coefficient(fs):
    """Per-sample factor of the exponential averager, ``1 - exp(-1/(tau fs))``.

    The discrete form of ``tau dy/dt = x^2 - y`` that is exact at the sample
    instants for a step input (IEC 61672-1:2013, 5.8: time weighting F,
    tau = 0.125 s).
    """
    return -math.expm1(-1.0 / (FAST_TAU_S * fs))


def _step_samples(step_s, fs):
    n = int(round(float(step_s) * fs))
    if n < 1:
        raise InputError(f"level step of {step_s!r} s is shorter than one sample")
    return n


class LevelMeter:
    """Streaming A-weighted, Fast-weighted level, LAF, one value per step.

    Parameters
    ----------
    sample_rate : float
        Hz (at least 8 kHz).
    offset_db : float or None
        Calibration offset (None: dB re full scale, uncalibrated).
    step_s : float
        Interval between output values, s (rounded to whole samples).

    Notes
    -----
    :meth:`push` returns the LAF at the last sample of each step completed
    by the block; the k-th value of the stream (from 0) is the level at
    ``t = (k + 1) * step_samples / sample_rate`` seconds from the first
    sample (see :meth:`times`). The filter memory (A-weighting
    ``sosfilt`` state and the averager) carries across blocks, so the
    values do not depend on how the stream is cut into blocks; they equal
    :func:`fast_weighted_level` of the whole stream with the same step.

    Examples
    --------
    >>> fs = 48000
    >>> x = np.sin(2 * np.pi * 1000 * np.arange(fs) / fs)
    >>> meter = LevelMeter(fs, step_s=0.1)
    >>> out = np.concatenate([meter.push(x[:7000]), meter.push(x[7000:])])
    >>> len(out), round(float(out[-1]), 1)
    (10, -3.0)
    """

    def __init__(self, sample_rate, offset_db=None, step_s=0.01):
        self.sample_rate = float(sample_rate)
        self._sos = a_weighting_sos(self.sample_rate)
        self.offset_db = None if offset_db is None else _offset(offset_db)
        self.step_samples = _step_samples(step_s, self.sample_rate)
        self._alpha = _fast_coefficient(self.sample_rate)
        self._zi = np.zeros((self._sos.shape[0], 2))
        self._y = 0.0  # averager state (mean square)
        self._phase = 0  # samples into the current step
        self.samples = 0  # samples pushed so far
        self.levels_out = 0  # values returned so far

    @property
    def calibrated(self) -> bool:
        """Whether the levels are in dB re 20 uPa (an offset was given)."""
        return self.offset_db is not None

    def push(self, block) -> np.ndarray:
        """Feed the next samples; return the LAF values of the steps completed, dB."""
        x, _ = _signal(block, self.sample_rate)
        if x.size == 0:
            return np.empty(0)
        weighted, self._zi = signal.sosfilt(self._sos, x, zi=self._zi)
        ms, _ = signal.lfilter([self._alpha], [1.0, self._alpha - 1.0],
                               weighted * weighted, zi=[(1.0 - self._alpha) * self._y])
        self._y = float(ms[-1])
        first = self.step_samples - 1 - self._phase  # index of the first step end
        ends = np.arange(first, x.size, self.step_samples)
        self._phase = (self._phase + x.size) % self.step_samples
        self.samples += x.size
        self.levels_out += ends.size
        return _db(ms[ends]) + _offset(self.offset_db)

    def times(self, n_first, n) -> np.ndarray:
        """Times (s from the first sample) of output values ``n_first .. n_first + n - 1``."""
        k = np.arange(n_first, n_first + n)
        return (k + 1) * self.step_samples / self.sample_rate


def _fast_mean_square(x, fs):
    weighted = signal.sosfilt(a_weighting_sos(fs), x)
    alpha = _fast_coefficient(fs)
    return signal.lfilter([alpha], [1.0, alpha - 1.0], weighted * weighted)


def fast_weighted_level(x, fs, offset_db=0.0, step_s=None):
    """A-weighted, Fast-weighted sound level LAF(t), dB.

    Parameters
    ----------
    x : array_like
        Samples, full-scale units, starting from rest (zero filter state).
    fs : float
        Sampling rate, Hz.
    offset_db : float or None
        Calibration offset (0 or None: dB re full scale).
    step_s : float, optional
        None: one value per sample. Otherwise the value at the last sample
        of each whole step, as :class:`LevelMeter` gives.

    Returns
    -------
    ndarray
        LAF, dB.

    References
    ----------
    IEC 61672-1:2013 [IEC61672]_, 3.9 and 5.8: exponential time weighting
    of the squared A-weighted signal, time constant 125 ms.

    Examples
    --------
    >>> fs = 48000
    >>> x = 0.5 * np.sin(2 * np.pi * 1000 * np.arange(fs) / fs)
    >>> round(float(fast_weighted_level(x, fs)[-1]), 2)  # 20 log10(0.5/sqrt 2)
    -9.03
    """
    x, fs = _signal(x, fs)
    ms = _fast_mean_square(x, fs)
    if step_s is not None:
        n = _step_samples(step_s, fs)
        ms = ms[n - 1::n]
    return _db(ms) + _offset(offset_db)


def laf_max(x, fs, offset_db=0.0):
    """Maximum A-weighted, Fast-weighted level over the samples, LAFmax, dB.

    Examples
    --------
    >>> fs = 48000
    >>> x = np.zeros(fs); x[:fs // 2] = np.sin(2 * np.pi * 1000 * np.arange(fs // 2) / fs)
    >>> round(laf_max(x, fs, offset_db=100.0), 1)  # 0.5 s: 1 - exp(-4) of the mean square
    96.9
    """
    x, fs = _signal(x, fs)
    if x.size == 0:
        raise InputError("no samples to measure")
    return float(_db(np.max(_fast_mean_square(x, fs)))) + _offset(offset_db)


def leq(x, fs, offset_db=0.0):
    """Equivalent continuous A-weighted level, LAeq, over the samples, dB.

    ``LAeq = 10 log10(mean(x_A^2)) + offset`` (IEC 61672-1:2013, 3.10).

    Examples
    --------
    >>> fs = 48000
    >>> x = np.sin(2 * np.pi * 1000 * np.arange(fs) / fs)
    >>> round(leq(x, fs), 2)
    -3.01
    """
    x, fs = _signal(x, fs)
    if x.size == 0:
        raise InputError("no samples to measure")
    weighted = signal.sosfilt(a_weighting_sos(fs), x)
    return float(_db(np.mean(weighted * weighted))) + _offset(offset_db)


def calibration_offset(x, fs, reference_db=94.0, tone_hz=1000.0, *,
                       segment_s=0.25, min_steady_s=2.0, where=None):
    """Calibration offset from a recording of an acoustic calibrator.

    ``offset = reference_db - 10 log10(mean square of the tone)``: the
    level the calibrator produces minus the level the chain records.

    Parameters
    ----------
    x : array_like
        Samples of the calibrator's tone, full-scale units.
    fs : float
        Hz.
    reference_db : float
        Sound pressure level of the calibrator, dB re 20 uPa (94 dB, 1 Pa,
        is common practice; see its certificate).
    tone_hz : float
        Nominal frequency of the calibrator (1 kHz is common practice); the
        strongest tone must lie within 5 % of it.
    segment_s, min_steady_s : float
        The tone's level is measured in segments; segments within 0.5 dB of
        the median make the estimate, and there must be ``min_steady_s`` of
        them (the seconds of fitting and removing the calibrator drop out).
    where : str, optional
        File name for error messages.

    Returns
    -------
    float
        The offset, dB: calibrated level = level re full scale + offset.

    Raises
    ------
    InputError
        The recording clips, is too short, has no dominant tone near
        ``tone_hz`` (tone less than 20 dB above the rest), or is not
        steady.

    Notes
    -----
    The tone is measured through a Butterworth band-pass (2nd-order
    prototype) one third octave wide around the found tone, run forward
    and backward (unit gain at its centre), so hum and wind noise outside the band do not
    count. The tone is unweighted: A-weighting is 0 dB at 1 kHz
    ([IEC61672]_). The thresholds (5 %, 20 dB, 0.5 dB) are common
    practice, no source. The calibrator itself is specified by
    IEC 60942 [IEC60942]_.

    Examples
    --------
    >>> fs = 48000
    >>> t = np.arange(3 * fs) / fs
    >>> x = 0.1 * np.sqrt(2) * np.sin(2 * np.pi * 1000 * t)  # -20 dB re FS
    >>> round(calibration_offset(x, fs), 2)
    114.0
    """
    x, fs = _signal(x, fs)
    where = where or "calibration"
    tone_hz = float(tone_hz)
    if not (20.0 <= tone_hz < 0.45 * fs):
        raise InputError(f"calibrator frequency {tone_hz:g} Hz is out of range for {fs:g} Hz",
                         where=where)
    seg = _step_samples(segment_s, fs)
    need = int(math.ceil(min_steady_s / segment_s))
    if x.size < need * seg:
        raise InputError(f"recording of {x.size / fs:.2f} s is too short: "
                         f"record at least {min_steady_s:g} s of the calibrator tone",
                         where=where)
    peak = float(np.max(np.abs(x)))
    if peak >= CLIP_LEVEL:
        raise InputError("the recording clips (peak at full scale): lower the input gain",
                         where=where)
    x = x - np.mean(x)
    # The strongest spectral line (Welch, segments of up to 8192 samples).
    nper = min(x.size, 8192)
    f, pxx = signal.welch(x, fs, nperseg=nper)
    k = int(np.argmax(pxx[1:])) + 1
    found = float(f[k])
    if abs(found - tone_hz) > 0.05 * tone_hz:
        raise InputError(f"no calibrator tone near {tone_hz:g} Hz: "
                         f"the strongest tone is at {found:.0f} Hz", where=where)
    lo, hi = found * 2.0 ** (-1.0 / 6.0), found * 2.0 ** (1.0 / 6.0)
    sos = signal.butter(2, [lo, hi], btype="bandpass", fs=fs, output="sos")
    band = signal.sosfiltfilt(sos, x)
    band_ms = np.mean(band * band)
    rest_ms = max(np.mean(x * x) - band_ms, 0.0)
    if band_ms <= 0.0 or rest_ms > band_ms / 100.0:
        raise InputError(f"the tone at {found:.0f} Hz is not 20 dB above the rest "
                         "of the recording: noise, or no calibrator", where=where)
    n_seg = x.size // seg
    seg_ms = np.mean((band[:n_seg * seg] ** 2).reshape(n_seg, seg), axis=1)
    seg_db = _db(seg_ms)
    median = float(np.median(seg_db))
    steady = np.abs(seg_db - median) <= 0.5
    if int(np.count_nonzero(steady)) < need:
        raise InputError(f"the tone is not steady: fewer than {min_steady_s:g} s "
                         "within 0.5 dB of its median level", where=where)
    level = float(_db(np.mean(seg_ms[steady])))
    return float(reference_db) - level


def level_at_distance(level_db, from_m, to_m):
    """Level of a point source moved from one distance to another, dB.

    ``L(to) = L(from) + 20 log10(from / to)``: spherical spreading, the
    inverse-square law (no air absorption, ground or screening).

    References
    ----------
    ISO 9613-2:1996 [ISO9613-2]_, 7.1, geometric divergence.

    Examples
    --------
    >>> round(level_at_distance(90.0, 10.0, 20.0), 2)
    83.98
    """
    from_m, to_m = float(from_m), float(to_m)
    if not (math.isfinite(from_m) and from_m > 0 and math.isfinite(to_m) and to_m > 0):
        raise InputError(f"distances must be positive, got {from_m!r} m and {to_m!r} m")
    return float(level_db) + 20.0 * math.log10(from_m / to_m)
