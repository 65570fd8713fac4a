"""From samples to spectral peaks: decimation, the STFT, the background.

The front end of the pipeline, block by block:

1. :class:`Decimator` low-passes and decimates the input by an integer
   factor with an FFT overlap-save filter, so the tones of interest are
   analysed at a rate of 10-16 kHz whatever the recording's rate.
2. :class:`FrameAnalyser` cuts the decimated stream into Gaussian-windowed
   frames, takes their power spectra, models the background of every
   frequency bin by a low percentile of half-second medians over about
   a minute, and picks the peaks that stand above it with a sub-bin
   frequency estimate.

Conventions (fixed; the tests rely on them): frame ``p`` is centred at
``t = (p * hop + (n_window - 1) / 2) / fs_a - delay`` seconds from the
first input sample, where ``fs_a`` is the analysis rate and ``delay`` the
group delay of the decimation filter. Only whole frames are analysed.

References
----------
.. [Gasior] M. Gasior and J. L. Gonzalez, "Improving FFT frequency
   measurement resolution by parabolic and Gaussian spectrum
   interpolation", AIP Conf. Proc. 732, 276-285 (2004): with a Gaussian
   window the log-magnitude spectrum of a tone is a parabola, so quadratic
   interpolation of three log-magnitude bins is exact.
.. [Harris] F. J. Harris, "On the use of windows for harmonic analysis
   with the discrete Fourier transform", Proc. IEEE 66(1), 51-83 (1978).
.. [Crochiere] R. E. Crochiere and L. R. Rabiner, Multirate Digital Signal
   Processing, Prentice-Hall (1983) (decimation; overlap-save filtering).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import scipy.fft
import scipy.ndimage


def decimation_factor(sample_rate: int, f_max_hz: float) -> int:
    """Largest integer factor that keeps ``f_max_hz`` well inside the band.

    The analysis rate ``fs / q`` is kept at least ``2.4 f_max`` (a guard of
    20 % above the Nyquist rate for the filter's transition band).

    Examples
    --------
    >>> decimation_factor(48000, 4500.0), decimation_factor(8000, 3000.0)
    (4, 1)
    """
    return max(1, int(sample_rate // (2.4 * f_max_hz)))


def kaiser_order(attenuation_db: float, width: float):
    """Length and shape of a Kaiser-window FIR for an attenuation and a transition.

    Parameters
    ----------
    attenuation_db : float
        Stop-band attenuation A, dB (above 50 dB).
    width : float
        Transition width as a fraction of the Nyquist frequency.

    Returns
    -------
    numtaps, beta

    Notes
    -----
    ``beta = 0.1102 (A - 8.7)`` for A > 50 dB and
    ``numtaps = ceil((A - 7.95) / (2.285 pi width) + 1)`` (Kaiser's
    formulas, Oppenheim & Schafer, Discrete-Time Signal Processing, 3rd ed.,
    eqs. 7.62-7.63, with the width in units of pi rad/sample).

    Examples
    --------
    >>> kaiser_order(80.0, 0.05)
    (202, 7.85726)
    """
    if attenuation_db <= 50.0:
        raise ValueError("attenuation_db must be above 50 dB")
    beta = 0.1102 * (attenuation_db - 8.7)
    numtaps = int(math.ceil((attenuation_db - 7.95) / (2.285 * math.pi * width) + 1))
    return numtaps, round(beta, 6)


def strided_frames(x: np.ndarray, length: int, hop: int, count: int | None = None) -> np.ndarray:
    """Read-only view of frames of ``length`` samples, ``hop`` apart, of a 1-D array.

    The frames :func:`numpy.lib.stride_tricks.sliding_window_view` gives
    with ``[::hop]``, made directly (a quarter of its overhead, which
    counts at tens of calls per second of audio). ``count`` limits the
    number of frames.

    Examples
    --------
    >>> strided_frames(np.arange(7), 3, 2).tolist()
    [[0, 1, 2], [2, 3, 4], [4, 5, 6]]
    """
    x = np.asarray(x)
    n = max(0, (x.size - length) // hop + 1)
    if count is not None:
        n = min(n, int(count))
    return np.lib.stride_tricks.as_strided(x, shape=(n, length), strides=(hop * x.strides[0], x.strides[0]),
                                           writeable=False)


def kaiser_lowpass(numtaps: int, cutoff: float, beta: float) -> np.ndarray:
    """Linear-phase low-pass FIR by the window method, unit gain at DC.

    ``h[n] = c sinc(c (n - (N-1)/2)) w[n]`` with ``c`` the cutoff as a
    fraction of the Nyquist frequency and ``w`` the Kaiser window
    (:func:`numpy.kaiser`), scaled so that ``sum(h) = 1``.

    Examples
    --------
    >>> h = kaiser_lowpass(101, 0.25, 7.857)
    >>> round(float(h.sum()), 12), bool(np.allclose(h, h[::-1]))
    (1.0, True)
    """
    n = np.arange(numtaps) - (numtaps - 1) / 2.0
    h = cutoff * np.sinc(cutoff * n) * np.kaiser(numtaps, beta)
    return h / h.sum()


class Decimator:
    """Streaming low-pass and integer decimation by FFT overlap-save.

    Each block of ``n_fft`` input samples (``n_fft - (m - 1)`` of them new)
    is transformed, multiplied by the filter's response and inverse
    transformed at ``n_fft / q`` points, which low-passes and decimates in
    one step. The filter is a Kaiser-window FIR of ``m = 2 k q + 1`` taps,
    so its group delay is a whole number of output samples.

    Parameters
    ----------
    sample_rate : int
    q : int
        Decimation factor (1: the input passes through unchanged).
    passband_hz : float
        Highest frequency that must pass (within 0.01 dB).
    k_multiple : int
        See Notes.
    min_fft : int
        Smallest transform: ``n_fft`` is the least ``q 2^j`` of at least
        ``16 m`` and ``min_fft``. A shorter transform costs fewer operations
        per sample, and several blocks of one push are transformed in one
        call (pocketfft then works on several rows at once); a longer one
        has fewer calls where a push brings few samples (measured with
        one-second pushes of 48 kHz audio: 4096 for the first decimation,
        16384 for the second, which gets a quarter of the samples).

    Notes
    -----
    Output sample ``j`` stands for input time ``j q / fs - delay_s``;
    ``delay_s`` is ``delay_out`` whole output samples (a multiple of
    ``k_multiple``, so that a second decimator by that factor can follow
    and keep the delay whole in its own samples).
    The result does not depend on how the input is split into blocks.

    References
    ----------
    Crochiere & Rabiner (1983) [Crochiere]_; Kaiser window design,
    :func:`kaiser_order` and :func:`kaiser_lowpass`.
    """

    def __init__(self, sample_rate: int, q: int, passband_hz: float, k_multiple: int = 1,
                 min_fft: int = 4096):
        self.fs = int(sample_rate)
        self.q = int(q)
        self._pending = []
        self._pending_len = 0
        self.delay_s = 0.0
        self.delay_out = 0
        if self.q == 1:
            return
        fs_out = self.fs / self.q
        stop = fs_out / 2.0
        width = max(stop - passband_hz, 0.05 * stop)
        numtaps, beta = kaiser_order(80.0, width / (0.5 * self.fs))
        k = max(1, math.ceil((numtaps - 1) / (2 * self.q)))
        k = -(-k // k_multiple) * k_multiple
        m = 2 * k * self.q + 1
        cutoff = min(passband_hz + width / 2.0, stop)
        h = kaiser_lowpass(m, cutoff / (0.5 * self.fs), beta)
        n_fft = self.q
        while n_fft < 16 * m or n_fft < min_fft:
            n_fft *= 2
        self.m = m
        self.n_fft = n_fft
        self.n_new = n_fft - (m - 1)
        # In single precision: its rounding (about -140 dB) lies far below the
        # filter's stop band (-80 dB) and any recording's noise; half the work of double.
        # (the 1/q of the shorter inverse transform folded in)
        self._H = (scipy.fft.rfft(h, n_fft)[: n_fft // (2 * self.q) + 1] / self.q).astype(np.complex64)
        self._history = np.zeros(m - 1, dtype=np.float32)
        self.delay_s = (m - 1) / 2.0 / self.fs
        self.delay_out = k

    def push(self, x: np.ndarray) -> np.ndarray:
        """Filter and decimate the next block; returns the new output samples (float32)."""
        x = np.asarray(x, dtype=np.float32)
        if self.q == 1:
            return x
        self._pending.append(x)
        self._pending_len += x.size
        if self._pending_len < self.n_new:
            return np.empty(0, dtype=np.float32)
        buf = np.concatenate(self._pending)
        n_blocks = buf.size // self.n_new
        used = n_blocks * self.n_new
        rest = buf[used:]
        self._pending = [rest] if rest.size else []
        self._pending_len = rest.size
        return self._filter(buf[:used], n_blocks)

    def flush(self) -> np.ndarray:
        """The output still held back, the input padded with zeros."""
        if self.q == 1 or self._pending_len == 0:
            return np.empty(0, dtype=np.float32)
        buf = np.concatenate(self._pending)
        n_in = buf.size
        self._pending, self._pending_len = [], 0
        padded = np.zeros(self.n_new, dtype=np.float32)
        padded[:n_in] = buf
        y = self._filter(padded, 1)
        return y[: -(-n_in // self.q)]

    def _filter(self, new: np.ndarray, n_blocks: int) -> np.ndarray:
        m1, q, n_fft, n_new = self.m - 1, self.q, self.n_fft, self.n_new
        ext = np.concatenate([self._history, new])
        self._history = ext[-m1:].copy()
        # Overlapping input blocks of n_fft samples, n_new apart.
        idx = strided_frames(ext, n_fft, n_new, n_blocks)
        spec = scipy.fft.rfft(idx, axis=1)[:, : n_fft // (2 * q) + 1] * self._H
        y = scipy.fft.irfft(spec, n_fft // q, axis=1)
        return y[:, m1 // q:].reshape(-1)


@dataclass(frozen=True)
class FrameGeometry:
    """The analysis grid of one band: rate, window, hop and bins analysed.

    Attributes
    ----------
    fs : float
        Analysis (decimated) sampling rate, Hz.
    sigma_s : float
        Standard deviation of the Gaussian window, s.
    n_window, n_fft, hop : int
        Window length, transform length and hop, samples.
    k_lo, k_hi : int
        First and last bin searched for peaks.
    start : int
        Decimated samples skipped before frame 0 starts.
    t_first : float
        Centre time of frame 0, seconds from the first input sample.
    """

    fs: float
    sigma_s: float
    n_window: int
    n_fft: int
    hop: int
    k_lo: int
    k_hi: int
    start: int = 0
    t_first: float = 0.0

    @property
    def bin_hz(self) -> float:
        return self.fs / self.n_fft

    @property
    def hop_s(self) -> float:
        return self.hop / self.fs

    def frame_time(self, p):
        """Centre time of frame ``p``, seconds from the first input sample."""
        return self.t_first + np.asarray(p) * self.hop_s


def make_geometry(fs: float, f_min_hz: float, f_max_hz: float, sigma_s: float = 0.012,
                  hop: int | None = None) -> FrameGeometry:
    """Choose the analysis grid for a rate and a band (frame 0 at sample 0).

    The window is a Gaussian of s.d. ``sigma_s`` truncated at +-3.5 sigma
    (its sidelobes stay below -80 dB), zero-padded to a power of two at
    least as long as it. The hop defaults to about 10 ms.

    Examples
    --------
    >>> g = make_geometry(12000.0, 60.0, 4500.0)
    >>> g.n_window, g.n_fft, g.hop, round(g.bin_hz, 3)
    (1009, 1024, 120, 11.719)
    """
    half = int(round(3.5 * sigma_s * fs))
    n_window = 2 * half + 1
    n_fft = 1 << int(math.ceil(math.log2(n_window)))
    if hop is None:
        hop = max(1, int(round(0.01 * fs)))
    bin_hz = fs / n_fft
    k_lo = max(2, int(math.floor(f_min_hz / bin_hz)))
    k_hi = min(n_fft // 2 - 2, int(math.ceil(f_max_hz / bin_hz)))
    return FrameGeometry(float(fs), float(sigma_s), n_window, n_fft, int(hop), k_lo, k_hi,
                         0, half / fs)


def gaussian_window(geometry: FrameGeometry) -> np.ndarray:
    """The analysis window (unit peak), float32."""
    n = geometry.n_window
    s = geometry.sigma_s * geometry.fs
    k = np.arange(n) - (n - 1) / 2.0
    return np.exp(-0.5 * (k / s) ** 2).astype(np.float32)


#: 10 log10(2): decibels of power per doubling.
_DB_PER_OCTAVE = 10.0 * math.log10(2.0)


def power_spectra_db(frames: np.ndarray, window: np.ndarray, geometry: FrameGeometry,
                     work: np.ndarray | None = None) -> np.ndarray:
    """Power spectra in dB of windowed frames, for bins ``k_lo-1 .. k_hi+1``.

    Parameters
    ----------
    frames : ndarray, shape (n_frames, n_window)
    work : ndarray, shape (m, n_fft), optional
        Scratch space for the zero-padded frames, of the frames' and the
        window's dtype, zero beyond the first ``n_window`` columns and with
        ``m >= n_frames`` rows: reused from call to call, it saves a fresh
        allocation (and its page faults, which cost as much as the
        transform) per call.

    Returns
    -------
    ndarray, shape (n_frames, k_hi - k_lo + 3), float32
    """
    # The windowed frames written straight into the zero-padded transform input.
    n = frames.shape[0]
    dtype = np.result_type(frames, window)
    if work is not None and work.shape[0] >= n and work.shape[1] == geometry.n_fft and work.dtype == dtype:
        padded = work[:n]
    else:
        padded = np.zeros((n, geometry.n_fft), dtype=dtype)
    np.multiply(frames, window, out=padded[:, : frames.shape[1]])
    spec = scipy.fft.rfft(padded, axis=1)
    spec = spec[:, geometry.k_lo - 1: geometry.k_hi + 2]
    power = spec.real ** 2 + spec.imag ** 2
    # 10 log10(p) as (10 log10 2) log2(p), in place: numpy's single-precision
    # log2 is vectorised and twice as fast as its log10.
    power += np.float32(1e-30)
    np.log2(power, out=power)
    power *= np.float32(_DB_PER_OCTAVE)
    return power.astype(np.float32, copy=False)


def interpolate_peaks(p_db: np.ndarray, rows: np.ndarray, cols: np.ndarray):
    """Sub-bin position and height of spectral peaks by a parabola in dB.

    For a peak at column ``k`` with neighbours ``a, b, c`` (dB),
    ``delta = (a - c) / (2 (a - 2 b + c))`` and the height is
    ``b - (a - c) delta / 4``. With a Gaussian window the log-magnitude
    spectrum of a steady tone is a parabola, so this is exact for it.

    References
    ----------
    Gasior & Gonzalez (2004) [Gasior]_.

    Examples
    --------
    A sampled parabola peaking at 10.3:

    >>> k = np.arange(20.0)
    >>> p = (-(k - 10.3) ** 2)[None, :]
    >>> d, h = interpolate_peaks(p, np.array([0]), np.array([10]))
    >>> round(float(d[0]), 6), round(float(h[0]), 6)
    (0.3, 0.0)
    """
    a = p_db[rows, cols - 1].astype(float)
    b = p_db[rows, cols].astype(float)
    c = p_db[rows, cols + 1].astype(float)
    den = a - 2.0 * b + c
    safe = np.where(den < -1e-9, den, -1e-9)
    delta = np.clip(0.5 * (a - c) / safe, -0.5, 0.5)
    height = b - 0.25 * (a - c) * delta
    return delta, height


@dataclass(frozen=True)
class Peaks:
    """Spectral peaks of a run of frames (one row per peak).

    Attributes
    ----------
    frame : ndarray of int
        Frame index.
    freq_hz : ndarray
        Sub-bin frequency estimate.
    snr_db : ndarray
        Height above the background and the frame's broadband level, dB.
    first_frame, n_frames : int
        The run of frames these peaks were picked from (frames without a
        peak included).
    level_db : ndarray
        Interpolated height of the peak in the raw power spectrum, dB
        (relative; it follows the tone's received level).
    """

    frame: np.ndarray
    freq_hz: np.ndarray
    snr_db: np.ndarray
    first_frame: int = 0
    n_frames: int = 0
    level_db: np.ndarray = None

    def take(self, keep) -> "Peaks":
        """The peaks selected by a boolean mask or index array."""
        return Peaks(self.frame[keep], self.freq_hz[keep], self.snr_db[keep], self.first_frame,
                     self.n_frames, self.level_db[keep])


def frame_levels(p_db: np.ndarray, background_db: np.ndarray) -> np.ndarray:
    """Each frame's broadband level above the background: the median of every third bin, dB."""
    sub = p_db[:, ::3] - np.asarray(background_db)[..., ::3]
    half = sub.shape[1] // 2
    return np.partition(sub, half, axis=1)[:, half]


def pick_peaks(p_db: np.ndarray, background_db: np.ndarray, first_frame: int,
               geometry: FrameGeometry, threshold_db: float, max_per_frame: int = 8,
               levels: np.ndarray | None = None) -> Peaks:
    """Local maxima of the whitened spectrum that stand above a threshold.

    The whitened spectrum is ``p_db - background_db`` minus its median over
    the frame's bins, so a steady line (in the background) vanishes and a
    broadband swell (the tyres of the passing vehicle) does not raise every
    bin above the threshold.

    Parameters
    ----------
    p_db : ndarray, shape (n_frames, n_bins)
        From :func:`power_spectra_db` (columns ``k_lo - 1 .. k_hi + 1``).
    background_db : ndarray, shape (n_bins,) or (n_frames, n_bins)
    first_frame : int
        Index of the first row.
    threshold_db : float
    max_per_frame : int
        Keep at most this many peaks per frame, the highest.
    levels : ndarray, optional
        :func:`frame_levels` of these spectra, when already known.
    """
    z = p_db - background_db
    z -= (frame_levels(p_db, background_db) if levels is None else levels)[:, None]
    inner = z[:, 1:-1]
    is_peak = (inner > z[:, :-2]) & (inner >= z[:, 2:]) & (inner >= threshold_db)
    # (flat indices and one divmod: several times faster than a 2-D nonzero)
    rows, cols = np.divmod(np.flatnonzero(is_peak), is_peak.shape[1])
    n = p_db.shape[0]
    if rows.size == 0:
        return Peaks(np.empty(0, int), np.empty(0), np.empty(0), first_frame, n, np.empty(0))
    cols = cols + 1
    heights = z[rows, cols]
    # At most max_per_frame per frame, the highest first.
    # (one sort on a combined key: row first, then the higher first)
    order = np.argsort(rows * 1.0e4 - np.clip(heights, -1.0e3, 1.0e3), kind="stable")
    rows, cols, heights = rows[order], cols[order], heights[order]
    starts = np.concatenate(([0], np.flatnonzero(np.diff(rows)) + 1))
    rank = np.arange(rows.size) - np.repeat(starts, np.diff(np.concatenate((starts, [rows.size]))))
    keep = rank < max_per_frame
    rows, cols, heights = rows[keep], cols[keep], heights[keep]
    # The whitened maximum can sit a bin off the raw one (the background is
    # not flat): climb to the raw spectrum's own maximum before interpolating
    # (flat indices into the spectra; only the peaks still climbing are
    # looked at again).
    width = p_db.shape[1]
    flat_p = np.ascontiguousarray(p_db).reshape(-1)
    base = rows.astype(np.int64) * width
    cols = cols.astype(np.int64)
    moving = np.arange(rows.size)
    moved = False
    for _ in range(4):
        at = base[moving] + cols[moving]
        here = flat_p[at]
        left = flat_p[at - 1] > here
        right = flat_p[at + 1] > here
        go = left | right
        if not go.any():
            moving = moving[:0]
            break
        moving, left, right = moving[go], left[go], right[go]
        cols[moving] = np.clip(cols[moving] - left + (right & ~left), 1, width - 2)
        moved = True
    # A whitened maximum on the flank of a raw peak is no peak of its own.
    if moving.size:
        at = base[moving] + cols[moving]
        here = flat_p[at]
        flank = moving[(flat_p[at - 1] > here) | (flat_p[at + 1] > here)]
        if flank.size:
            top = np.ones(rows.size, dtype=bool)
            top[flank] = False
            rows, cols, heights, base = rows[top], cols[top], heights[top], base[top]
    # Two whitened maxima may climb to the same raw one: keep it once (the
    # first, which is the higher).
    if moved:
        key = base + cols
        _, first = np.unique(key, return_index=True)
        if first.size < key.size:
            first.sort()
            rows, cols, heights = rows[first], cols[first], heights[first]
    delta, level = interpolate_peaks(p_db, rows, cols)
    freq = (geometry.k_lo - 1 + cols + delta) * geometry.bin_hz
    return Peaks(rows + first_frame, freq, heights.astype(float), first_frame, n, level)


class FrameAnalyser:
    """Streaming STFT, background model and peak picking.

    Parameters
    ----------
    geometry : FrameGeometry
    threshold_db : float
        Peak threshold above the whitened background.
    chunk_frames : int
        Frames per background summary (about half a second).
    past_chunks, future_chunks, min_chunks : int
        The background of a chunk is the ``percentile`` of the per-bin
        medians of up to ``past_chunks`` chunks before it and
        ``future_chunks`` after it (at least ``min_chunks`` in all, looking
        further ahead near the start of the stream).
    percentile : float
        Low percentile of the chunk medians: a line present less than
        ``100 - percentile`` percent of the window stands out.
    keep_frames : int
        For how many of the last frames the background is kept, for
        :meth:`line_excess`.

    Notes
    -----
    :meth:`push` takes decimated samples and returns :class:`Peaks` for
    the frames whose background is known; output lags the input by up to
    ``BG_EVERY - 1 + future_chunks`` chunks. The numbers do not depend on
    block sizes.
    """

    #: Chunks that share one background computation (2 s). Every 4 s saved
    #: 0.19 s on the 10-min cost file of tools/bench.py and left the grades of
    #: its short recordings alone, but in the station benchmark's hour it moved
    #: speeds by up to 1.4 km/h and a fan stopping gave an event of no vehicle:
    #: the look-ahead then reaches 7.5 s, time enough for a slow vehicle's
    #: plateau to lift the low percentile.
    BG_EVERY = 4

    def __init__(self, geometry: FrameGeometry, threshold_db: float, chunk_frames: int = 50,
                 past_chunks: int = 120, future_chunks: int = 8, min_chunks: int = 60,
                 percentile: float = 10.0, keep_frames: int = 0):
        self.g = geometry
        self.threshold_db = float(threshold_db)
        self.keep_frames = int(keep_frames)
        # The backgrounds of the chunks of the last keep_frames frames, and
        # which of them belongs to each frame (frame p in row p % keep_frames).
        self._ring_bg = self._ring_slot = None
        self._ring_last = -1
        self.window = gaussian_window(geometry)
        self.chunk_frames = int(chunk_frames)
        self.past, self.future, self.min_chunks = int(past_chunks), int(future_chunks), int(min_chunks)
        self.percentile = float(percentile)
        self._buf = np.empty(0, dtype=np.float32)   # decimated samples not yet framed
        self._work = None                            # scratch of power_spectra_db
        self._buf_start = 0                          # decimated index of _buf[0]
        self._next_frame = 0                         # next frame index to compute
        self._chunks = {}                            # chunk index -> p_db (frames x bins)
        # Per-bin mean of chunk j in row j - _means_first: the windows of the
        # background are slices of it (rows before the earliest window dropped).
        self._means = None
        self._means_first = 0
        self._partial = []                           # p_db rows of the chunk being filled
        self._n_chunks = 0                           # chunks completed
        self._done = 0                               # chunks whose peaks were emitted
        self._bg, self._bg_key = None, None          # background of the current chunk group

    # -- framing -------------------------------------------------------
    def push(self, y: np.ndarray) -> list:
        """Add decimated samples; returns a list of :class:`Peaks` (maybe empty)."""
        if y.size:
            self._buf = np.concatenate([self._buf, y.astype(np.float32)])
        g = self.g
        avail = self._buf_start + self._buf.size - g.start
        n_frames = 0
        if avail >= g.n_window:
            n_frames = (avail - g.n_window) // g.hop + 1 - self._next_frame
        if n_frames > 0:
            start = g.start + self._next_frame * g.hop - self._buf_start
            stop = start + (n_frames - 1) * g.hop + g.n_window
            seg = self._buf[start:stop]
            frames = strided_frames(seg, g.n_window, g.hop)
            if self._work is None or self._work.shape[0] < n_frames:
                self._work = np.zeros((max(n_frames, 128), g.n_fft), dtype=np.float32)
            self._add_rows(power_spectra_db(frames, self.window, g, self._work))
            self._next_frame += n_frames
            keep_from = g.start + self._next_frame * g.hop - self._buf_start
            self._buf = self._buf[keep_from:].copy()
            self._buf_start += keep_from
        return self._emit(final=False)

    def finish(self) -> list:
        """End of stream: emit the peaks of every remaining frame."""
        if self._partial:
            self._close_chunk(np.concatenate(self._partial))
            self._partial = []
        return self._emit(final=True)

    def _add_rows(self, rows: np.ndarray):
        c = self.chunk_frames
        have = sum(r.shape[0] for r in self._partial)
        i = 0
        while i < rows.shape[0]:
            take = min(c - have, rows.shape[0] - i)
            self._partial.append(rows[i:i + take])
            i += take
            have += take
            if have == c:
                part = self._partial
                self._close_chunk(part[0] if len(part) == 1 else np.concatenate(part))
                self._partial, have = [], 0

    def _close_chunk(self, p_db: np.ndarray):
        j = self._n_chunks
        self._chunks[j] = p_db
        # Mean of the dB values: a tone present in part of the chunk raises it,
        # which the low percentile across chunks then ignores.
        mean = p_db.mean(axis=0)
        if self._means is None:
            rows = self.past + self.future + self.min_chunks + 4 * self.BG_EVERY
            self._means = np.empty((rows, mean.size), dtype=mean.dtype)
        row = j - self._means_first
        if row >= self._means.shape[0]:
            # No window reaches before chunk done - past - BG_EVERY (see _window_of).
            drop = max(0, self._done - self.past - self.BG_EVERY - self._means_first)
            kept = self._means[drop:row]
            rows = max(self._means.shape[0], 2 * (kept.shape[0] + 1))
            self._means = np.concatenate([kept, np.empty((rows - kept.shape[0], mean.size), mean.dtype)])
            self._means_first += drop
            row -= drop
        self._means[row] = mean
        self._n_chunks += 1

    def _window_of(self, j: int, n_known: int):
        """Chunks whose means make the background of chunk ``j``'s group.

        The background is computed once for a group of ``BG_EVERY``
        chunks (it changes slowly), from the window of the group's first
        chunk, reaching ``future`` chunks past the group's last.
        """
        j0 = j - j % self.BG_EVERY
        lo = max(0, j0 - self.past)
        hi = max(j0 + self.BG_EVERY - 1 + self.future, lo + self.min_chunks - 1)
        return lo, min(hi, n_known - 1), hi

    def _emit(self, final: bool) -> list:
        out = []
        while self._done < self._n_chunks:
            j = self._done
            key = j // self.BG_EVERY
            if self._bg_key != key:
                lo, hi, want = self._window_of(j, self._n_chunks)
                if not final and hi < want:
                    break
                rows = self._means[lo - self._means_first: hi - self._means_first + 1]
                kth = int(round(self.percentile / 100.0 * (rows.shape[0] - 1)))
                self._bg = np.partition(rows, kth, axis=0)[kth]
                self._bg_key = key
            # Every closed chunk of the group at once (they share the
            # background; the peaks of a frame depend on that frame alone).
            js = range(j, min((key + 1) * self.BG_EVERY, self._n_chunks))
            p_db = np.concatenate([self._chunks[k] for k in js]) if len(js) > 1 else self._chunks[j]
            first = j * self.chunk_frames
            peaks = pick_peaks(p_db, self._bg, first, self.g, self.threshold_db,
                               levels=frame_levels(p_db, self._bg))
            out += _split_chunks(peaks, [self._chunks[k].shape[0] for k in js])
            for k in js:
                if self.keep_frames > 0:
                    self._keep(k, k * self.chunk_frames, self._chunks[k].shape[0], self._bg)
                del self._chunks[k]
            self._done = js[-1] + 1
        return out

    def _keep(self, j: int, first: int, n_rows: int, bg: np.ndarray):
        """Keep a chunk's background for its frames in the ring."""
        k = self.keep_frames
        if self._ring_bg is None:
            self._ring_bg = np.zeros((k // self.chunk_frames + 2, bg.size), dtype=np.float32)
            self._ring_slot = np.zeros(k, dtype=np.int32)
        slot = j % self._ring_bg.shape[0]
        self._ring_bg[slot] = bg
        self._ring_slot[(first + np.arange(n_rows)) % k] = slot
        self._ring_last = first + n_rows - 1

    @property
    def kept_from(self) -> int:
        """First frame whose background is still kept (-1 before any)."""
        if self._ring_bg is None:
            return -1
        return max(0, self._ring_last - self.keep_frames + 1)

    def line_excess(self, frames: np.ndarray, freq_hz: np.ndarray, floor_bins: int = 8) -> np.ndarray:
        """How far the background stands above its local floor, dB, at kept frames.

        A steady line (a fan, a transformer, mains hum) is part of the
        background; its height above the median of the background over
        ``2 floor_bins + 1`` bins around it says where it lies. ``frames``
        (shape (n,)) and ``freq_hz`` (shape (n, m)); 0 outside the band or
        the kept frames.
        """
        freq_hz = np.atleast_2d(np.asarray(freq_hz, dtype=float))
        out = np.zeros(freq_hz.shape, dtype=np.float32)
        if self._ring_bg is None:
            return out
        g = self.g
        frames = np.asarray(frames, dtype=np.int64)
        kept = (frames >= self.kept_from) & (frames <= self._ring_last)
        # The floor of the backgrounds these frames use, and only of those.
        used, slot = np.unique(self._ring_slot[frames % self.keep_frames], return_inverse=True)
        bg = self._ring_bg[used]
        floor = scipy.ndimage.median_filter(bg, size=(1, 2 * floor_bins + 1), mode="nearest")
        slot = slot.reshape(-1)[:, None]
        col = np.rint(freq_hz / g.bin_hz).astype(np.int64) - (g.k_lo - 1)
        inside = kept[:, None] & (col >= 0) & (col < bg.shape[1])
        col = np.clip(col, 0, bg.shape[1] - 1)
        ex = bg[slot, col] - floor[slot, col]
        out[inside] = ex[inside]
        return out


def _split_chunks(peaks: Peaks, rows) -> list:
    """``peaks`` of consecutive chunks of ``rows`` frames each, as one :class:`Peaks` per chunk."""
    if len(rows) == 1:
        return [peaks]
    edges = peaks.first_frame + np.cumsum(np.concatenate(([0], rows)))
    cut = np.searchsorted(peaks.frame, edges)
    return [Peaks(peaks.frame[a:b], peaks.freq_hz[a:b], peaks.snr_db[a:b], int(f), int(n), peaks.level_db[a:b])
            for a, b, f, n in zip(cut[:-1], cut[1:], edges[:-1], rows)]


@dataclass(frozen=True)
class Timebase:
    """Frame ``p`` of every band is centred at ``t_first + p * hop_s`` seconds."""

    hop_s: float
    t_first: float

    def frame_time(self, p):
        """Centre time of frame ``p``, seconds from the first input sample."""
        return self.t_first + np.asarray(p) * self.hop_s


class FrontEnd:
    """Two analysis bands on one frame grid: long windows low, short high.

    The sweep of a passing tone near closest approach is about
    ``f0 v^2 / (c d)`` Hz/s, proportional to its frequency, while engine
    harmonics crowd together at low frequencies. So tones below
    ``split_hz`` are analysed with a long window (s.d. 36 ms, resolving
    harmonics 25 Hz apart) at about 2 kHz, and tones above it with a short
    one (s.d. 12 ms) at 10-16 kHz. Both bands share the hop and the frame
    centres exactly, so their peaks merge frame by frame.

    Parameters
    ----------
    sample_rate : int
    f_min_hz, f_max_hz : float
    threshold_db : float
    keep_s : float
        How long the decimated samples (:meth:`kept_samples`) and the
        backgrounds (:meth:`line_excess`) are kept, seconds.

    Attributes
    ----------
    timebase : Timebase
    split_hz : float
    bands : list of (Decimator, FrameAnalyser)
    """

    SIGMA_LOW_S = 0.036
    SIGMA_HIGH_S = 0.012
    LOW_RATE_HZ = 2000.0

    def __init__(self, sample_rate: int, f_min_hz: float, f_max_hz: float, threshold_db: float,
                 keep_s: float = 40.0):
        q = decimation_factor(sample_rate, f_max_hz)
        fs_high = sample_rate / q
        hop = max(1, int(round(0.01 * fs_high)))
        # Second decimation factor: a divisor of the hop, near fs_high / 2 kHz.
        target = fs_high / self.LOW_RATE_HZ
        r = min((d for d in range(1, hop + 1) if hop % d == 0), key=lambda d: (abs(d - target), d))
        fs_low = fs_high / r
        split = min(700.0, fs_low / 2.6, f_max_hz)
        self.split_hz = split if r > 1 and split > f_min_hz else f_min_hz
        dec_high = Decimator(sample_rate, q, f_max_hz, k_multiple=r)
        specs = []
        if self.split_hz > f_min_hz:
            dec_low = Decimator(int(round(fs_high)), r, self.split_hz, min_fft=16384) if r > 1 else None
            g = make_geometry(fs_low, f_min_hz, self.split_hz, self.SIGMA_LOW_S, hop // r)
            delay = dec_high.delay_out // r + (dec_low.delay_out if dec_low else 0)
            specs.append(("low", dec_low, g, delay))
        if f_max_hz > self.split_hz:
            g = make_geometry(fs_high, self.split_hz, f_max_hz, self.SIGMA_HIGH_S, hop)
            specs.append(("high", None, g, dec_high.delay_out))
        # Frame p of each band is centred at (p + m) hops after the first
        # input sample, once its decimation delay is taken off.
        m = max(math.ceil(((g.n_window - 1) / 2 - delay) / g.hop) for _, _, g, delay in specs)
        m = max(m, 0)
        self.decimator = dec_high
        self.bands = []
        for name, dec, g, delay in specs:
            start = m * g.hop + delay - (g.n_window - 1) // 2
            g = FrameGeometry(g.fs, g.sigma_s, g.n_window, g.n_fft, g.hop, g.k_lo, g.k_hi, start,
                              m * g.hop / g.fs)
            keep = int(round(keep_s * g.fs / g.hop))
            self.bands.append((name, dec, FrameAnalyser(g, threshold_db, keep_frames=keep)))
        self.timebase = Timebase(hop / fs_high, m * hop / fs_high)
        bins = [fa.g.bin_hz for _, _, fa in self.bands]
        self._bin_low, self._bin_high = bins[0], bins[-1]
        self._queues = [[] for _ in self.bands]
        # The decimated samples of the last keep_s seconds (float32),
        # for narrow-band spectra along a fitted course (passby.dechirp).
        self.fs_high = float(fs_high)
        # Each sample is written twice, at i and i + n (n the ring's length),
        # so that any n consecutive samples are one slice: no copy to read.
        self._raw_len = int(math.ceil(keep_s * fs_high)) + hop
        self._raw = np.zeros(2 * self._raw_len, dtype=np.float32)
        self._raw_n = 0          # decimated samples written so far

    @property
    def geometries(self):
        return [fa.g for _, _, fa in self.bands]

    def bin_hz_at(self, f):
        """Bin spacing of the band that analyses frequency ``f``."""
        return self._bin_low if f < self.split_hz else self._bin_high

    def sigma_at(self, f):
        """Window s.d. (s) of the band that analyses each frequency in ``f``."""
        g = self.geometries
        if len(g) == 1:
            return np.full(np.shape(f), g[0].sigma_s)
        return np.where(np.asarray(f) < self.split_hz, g[0].sigma_s, g[1].sigma_s)

    def push(self, x: np.ndarray) -> list:
        """Input samples in; merged :class:`Peaks`, one per completed chunk."""
        return self._run(self.decimator.push(x), final=False)

    def finish(self) -> list:
        """End of stream: the peaks of every remaining frame."""
        return self._run(self.decimator.flush(), final=True)

    def _run(self, y: np.ndarray, final: bool) -> list:
        self._keep_raw(y)
        for i, (_, dec, fa) in enumerate(self.bands):
            z = y if dec is None else (np.concatenate([dec.push(y), dec.flush()]) if final else dec.push(y))
            self._queues[i] += fa.push(z)
            if final:
                self._queues[i] += fa.finish()
        out = []
        while all(self._queues):
            parts = [self._own(self.bands[i][0], q.pop(0)) for i, q in enumerate(self._queues)]
            out.append(merge_peaks(parts))
        if final:
            rest = [self._own(self.bands[i][0], p) for i, q in enumerate(self._queues) for p in q]
            if rest:
                out.append(merge_peaks(rest))
            self._queues = [[] for _ in self.bands]
        return out

    @property
    def kept_from(self) -> int:
        """First frame whose background every band still keeps."""
        return max(fa.kept_from for _, _, fa in self.bands)

    def _keep_raw(self, y: np.ndarray):
        n = self._raw_len
        total = self._raw_n + y.size
        y = y[-n:]
        a = (total - y.size) % n
        head = min(y.size, n - a)      # up to the ring's end, then from its start
        for lo, part in ((a, y[:head]), (0, y[head:])):
            self._raw[lo: lo + part.size] = part
            self._raw[lo + n: lo + n + part.size] = part
        self._raw_n = total

    def kept_samples(self, t_lo: float, t_hi: float):
        """The kept decimated samples heard from ``t_lo`` to ``t_hi`` (s).

        Returns
        -------
        (y, fs, t_y0)
            The samples (float32, a read-only view: valid until the next
            block is pushed), their rate, and the time of ``y[0]``;
            the decimation delay is taken off, so sample times match the
            frame times of :attr:`timebase`. Only what is still kept.
        """
        delay = self.decimator.delay_out
        n = self._raw_len
        j_lo = max(int(math.floor(t_lo * self.fs_high)) + delay, self._raw_n - n, 0)
        j_hi = min(int(math.ceil(t_hi * self.fs_high)) + delay + 1, self._raw_n)
        if j_hi <= j_lo:
            return np.empty(0, dtype=np.float32), self.fs_high, 0.0
        a = j_lo % n
        return self._raw[a: a + (j_hi - j_lo)], self.fs_high, (j_lo - delay) / self.fs_high

    def line_excess(self, frames: np.ndarray, freq_hz: np.ndarray) -> np.ndarray:
        """Height of steady lines in the background (see :meth:`FrameAnalyser.line_excess`), both bands."""
        freq_hz = np.atleast_2d(np.asarray(freq_hz, dtype=float))
        parts = [fa.line_excess(frames, freq_hz) for _, _, fa in self.bands]
        if len(parts) == 1:
            return parts[0]
        return np.where(freq_hz < self.split_hz, parts[0], parts[1])

    def window_sum(self, f) -> float:
        """Sum of the analysis window of the band that analyses ``f`` (its level scale)."""
        g = self.geometries
        band = g[0] if (len(g) == 1 or f < self.split_hz) else g[1]
        return float(gaussian_window(band).sum(dtype=np.float64))

    def _own(self, name: str, peaks: Peaks) -> Peaks:
        """The peaks of band ``name`` on its own side of the split (the bins overlap)."""
        if len(self.bands) == 1:
            return peaks
        keep = peaks.freq_hz < self.split_hz if name == "low" else peaks.freq_hz >= self.split_hz
        if keep.all():
            return peaks
        return peaks.take(keep)


def merge_peaks(parts) -> Peaks:
    """Peaks of several bands for the same frames, in frame order."""
    if len(parts) == 1:
        return parts[0]
    frame = np.concatenate([p.frame for p in parts])
    order = np.argsort(frame, kind="stable")
    first = min(p.first_frame for p in parts)
    last = max(p.first_frame + p.n_frames for p in parts)
    return Peaks(frame[order], np.concatenate([p.freq_hz for p in parts])[order],
                 np.concatenate([p.snr_db for p in parts])[order], first, last - first,
                 np.concatenate([p.level_db for p in parts])[order])
