"""Is this input fit for pass-by measurement? A few seconds of background.

Before a station is left alone, a few seconds of the site's background
(no vehicle passing) tell whether the gain is right: not clipping, with
headroom for a loud vehicle, and well above the digital noise floor. The
background is also shown by octave band, which points at wind noise or a
hum. Pure analysis on a numpy array; ``passby sitecheck`` records the
seconds and prints the result.

Levels are in dB re full scale with the convention of :mod:`passby.level`:
``10 log10(mean square)``, so a full-scale sine reads -3.01 dB; peaks are
``20 log10(max |x|)`` (a full-scale sine peaks at 0 dB).

References
----------
.. [IEC61260] IEC 61260-1:2014, Electroacoustics -- Octave-band and
   fractional-octave-band filters -- Part 1: Specifications. 5.2 (octave
   frequency ratio, base-ten system: G = 10^(3/10)), 5.4 (exact mid-band
   frequencies f_m = f_r G^x with f_r = 1000 Hz), 5.5 (band-edge
   frequencies f_m G^(-1/2), f_m G^(1/2)) and Annex E (nominal mid-band
   frequencies 63, 125, ... 8000 Hz).
.. [Butterworth] S. Butterworth, "On the theory of filter amplifiers",
   Wireless Engineer 7 (1930), 536-541: maximally flat magnitude, -3.01 dB
   at the band edges; realised with :func:`scipy.signal.butter`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import signal

from passby.errors import InputError
from passby.level import CLIP_LEVEL

__all__ = ["OCTAVE_BANDS_HZ", "octave_band_edges", "octave_band_levels", "SiteCheck",
           "site_check"]

#: IEC 61260-1:2014, 5.2: octave frequency ratio of the base-ten system.
OCTAVE_RATIO = 10.0 ** 0.3

#: IEC 61260-1:2014, Annex E: nominal mid-band frequencies 63 Hz .. 8 kHz,
#: with x = -4 .. 3 in f_m = 1000 Hz * G^x (5.4).
OCTAVE_BANDS_HZ = ((63, -4), (125, -3), (250, -2), (500, -1), (1000, 0), (2000, 1),
                   (4000, 2), (8000, 3))

#: Order of the Butterworth low-pass prototype of each band filter (a
#: 6th-order band-pass; common practice for class-1-like octave filters,
#: no source).
FILTER_ORDER = 3

#: Thresholds of the verdict, dB re full scale (common practice, no source):
#: a background above ``LOUD_DB`` leaves too little headroom for a vehicle
#: some 30 dB louder close by; below ``QUIET_DB`` it sits near the noise
#: floor of 16-bit audio (about -101 dB: quantisation noise of a step of
#: 2**-15 has a mean square of step**2 / 12); a peak above ``PEAK_DB`` has
#: no headroom at all.
LOUD_DB, QUIET_DB, PEAK_DB = -30.0, -75.0, -1.0

#: Mean squares below this read as -200 dB (no -inf).
_MS_FLOOR = 1e-20


def _db(ms):
    return 10.0 * math.log10(max(float(ms), _MS_FLOOR))


def octave_band_edges(x_index: int) -> tuple:
    """Exact mid-band and edge frequencies of the octave band ``x``, Hz.

    IEC 61260-1:2014, 5.4 and 5.5 (base ten): ``f_m = 1000 G^x``, edges
    ``f_m G^(-1/2)`` and ``f_m G^(1/2)``, ``G = 10^(3/10)``.

    Returns
    -------
    (f_low, f_mid, f_high) : tuple of float

    Examples
    --------
    >>> [round(f, 2) for f in octave_band_edges(0)]
    [707.95, 1000.0, 1412.54]
    >>> round(octave_band_edges(-4)[1], 3), round(octave_band_edges(3)[1], 1)
    (63.096, 7943.3)
    """
    fm = 1000.0 * OCTAVE_RATIO ** x_index
    return fm / math.sqrt(OCTAVE_RATIO), fm, fm * math.sqrt(OCTAVE_RATIO)


def octave_band_levels(x, sample_rate: float, settle_s: float = 0.25) -> tuple:
    """Background level in each octave band 63 Hz .. 8 kHz, dB re full scale.

    Parameters
    ----------
    x : array_like
        Mono samples.
    sample_rate : float
        Hz. Bands whose upper edge is not below 0.45 times the rate are left
        out.
    settle_s : float
        Filter output discarded at the start (the filters' transient), s.

    Returns
    -------
    tuple of (nominal_hz, level_db)

    Examples
    --------
    >>> fs = 16000
    >>> t = np.arange(2 * fs) / fs
    >>> levels = dict(octave_band_levels(np.sin(2 * np.pi * 1000 * t), fs))
    >>> round(levels[1000], 1), levels[250] < -40, 8000 in levels
    (-3.0, True, False)
    """
    x = np.asarray(x, dtype=float)
    skip = min(int(settle_s * sample_rate), len(x) // 2)
    out = []
    for nominal, k in OCTAVE_BANDS_HZ:
        lo, _, hi = octave_band_edges(k)
        if hi >= 0.45 * sample_rate:
            continue
        sos = signal.butter(FILTER_ORDER, [lo, hi], btype="bandpass", fs=sample_rate,
                            output="sos")
        y = signal.sosfilt(sos, x)[skip:]
        out.append((nominal, _db(np.mean(y * y)) if len(y) else -200.0))
    return tuple(out)


@dataclass(frozen=True)
class SiteCheck:
    """The result of a site check.

    Attributes
    ----------
    sample_rate : int
    duration_s : float
    rms_db, peak_db : float
        dB re full scale (see the module notes).
    clipped : int
        Samples at or beyond ``passby.level.CLIP_LEVEL`` of full scale.
    dc_offset : float
        Mean of the samples (full-scale units).
    bands : tuple of (int, float)
        Nominal octave-band centre, Hz, and level, dB re full scale.
    ok : bool
        Fit for pass-by measurement.
    verdict : str
        One plain sentence.
    notes : tuple of str
        Further hints.
    """

    sample_rate: int
    duration_s: float
    rms_db: float
    peak_db: float
    clipped: int
    dc_offset: float
    bands: tuple
    ok: bool
    verdict: str
    notes: tuple = ()


def site_check(x, sample_rate: int) -> SiteCheck:
    """Judge a few seconds of background input.

    Parameters
    ----------
    x : array_like
        Mono samples in full-scale units.
    sample_rate : int
        Hz.

    Returns
    -------
    SiteCheck

    Raises
    ------
    InputError
        No samples, or samples that are not finite.

    Examples
    --------
    >>> rng = np.random.default_rng(1)
    >>> quiet = site_check(1e-3 * rng.standard_normal(16000), 16000)
    >>> quiet.ok, quiet.verdict, round(quiet.rms_db)
    (True, 'OK for pass-by measurement', -60)
    >>> site_check(np.zeros(16000), 16000).verdict
    'no signal: the input is all zeros (muted or not connected?)'
    """
    x = np.asarray(x, dtype=float).ravel()
    if x.size == 0:
        raise InputError("no samples to check")
    if not np.all(np.isfinite(x)):
        raise InputError("the samples contain NaN or infinite values")
    ms = float(np.mean(x * x))
    peak = float(np.max(np.abs(x)))
    rms_db = _db(ms)
    peak_db = 20.0 * math.log10(peak) if peak > 0 else -200.0
    clipped = int(np.count_nonzero(np.abs(x) >= CLIP_LEVEL))
    dc = float(np.mean(x))
    bands = octave_band_levels(x, sample_rate)
    notes = []
    if abs(dc) > 0.01:
        notes.append(f"DC offset of {dc:+.3f} of full scale (a faulty input or preamplifier?)")
    levels = dict(bands)
    if 63 in levels and 1000 in levels and levels[63] - levels[1000] >= 20.0:
        notes.append("strong low-frequency noise (wind on the microphone? use a windscreen)")
    if peak == 0.0:
        ok, verdict = False, "no signal: the input is all zeros (muted or not connected?)"
    elif clipped:
        ok, verdict = False, f"gain too high: {clipped} clipped samples"
    elif peak_db > PEAK_DB:
        ok, verdict = False, (f"gain too high: the peak reaches {peak_db:.1f} dB re full scale, "
                              "no headroom for a loud vehicle")
    elif rms_db > LOUD_DB:
        ok, verdict = False, (f"gain too high: the background alone is at {rms_db:.1f} dB re "
                              "full scale; a vehicle close by would clip")
    elif rms_db < QUIET_DB:
        ok, verdict = False, (f"level too low: input is near the digital noise floor "
                              f"({rms_db:.1f} dB re full scale); raise the gain")
    else:
        ok, verdict = True, "OK for pass-by measurement"
    return SiteCheck(int(sample_rate), x.size / float(sample_rate), rms_db, peak_db, clipped,
                     dc, bands, ok, verdict, tuple(notes))
