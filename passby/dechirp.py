"""Narrow-band spectra along a fitted Doppler course (complex demodulation).

Once a pass has been fitted, the phase of each of its tones at the
microphone is known up to the slow wander of the source's pitch: a tone of
rest frequency ``f_k`` is heard with phase ``2 pi f_k F(t)``, where
``F(t)`` is the integral of the Doppler factor ``D(t) = f(t) / f_k``.
Multiplying the samples by ``exp(-2 pi i f_k F(t))`` moves the tone to
near 0 Hz whatever its sweep (complex demodulation [BGT]_ along a chirp,
the "dechirp" of radar pulse compression); averaged over short blocks it
becomes a slow complex signal whose spectrum can be taken with a window
ten times longer than the tracking STFT's without smearing the tone: a
bandwidth ten times narrower, so about 10 dB less noise under the tone.
What is left of the tone's frequency there is the wander of its pitch and
the error of the fit, a few hertz.

References
----------
.. [BGT] C. Bingham, M. D. Godfrey and J. W. Tukey, "Modern techniques of
   power spectrum estimation", IEEE Trans. Audio Electroacoust. AU-15(2),
   56-66 (1967) (complex demodulation).
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import numpy as np
import scipy.fft
import scipy.signal

from passby.spectral import interpolate_peaks, strided_frames
from passby.tracking import Track

#: Frames transformed together, and sub-blocks demodulated together (bound the temporaries).
_CHUNK_FRAMES, _CHUNK_SUBBLOCKS = 512, 2048


@functools.lru_cache(maxsize=8)
def _antialias(sub: int) -> np.ndarray:
    """Kaiser-window low-pass FIR for decimating by ``sub``: flat to 0.4, stopped from 0.6 of the new rate.

    80 dB stopband (Kaiser 1974 design formulas, by :func:`scipy.signal.kaiserord`).
    """
    if sub == 1:
        return np.ones(1)
    width = 0.2 / (sub / 2.0)               # transition, as a fraction of the Nyquist rate
    numtaps, beta = scipy.signal.kaiserord(80.0, width)
    numtaps |= 1
    return scipy.signal.firwin(numtaps, 0.5 / (sub / 2.0) * 1.0, window=("kaiser", beta))


def integrated_factor(t: np.ndarray, factor: np.ndarray) -> np.ndarray:
    """``F(t) = integral of the Doppler factor``, by the trapezoidal rule, from ``t[0]``.

    The heard phase of a tone of rest frequency ``f0`` is ``2 pi f0 F(t)``
    (plus a constant): its instantaneous frequency is ``f0 D(t)``.

    Examples
    --------
    A constant factor integrates to a straight line:

    >>> integrated_factor(np.array([0.0, 0.5, 1.0]), np.full(3, 1.1)).round(6).tolist()
    [0.0, 0.55, 1.1]
    """
    t = np.asarray(t, dtype=float)
    factor = np.asarray(factor, dtype=float)
    steps = 0.5 * (factor[1:] + factor[:-1]) * np.diff(t)
    return np.r_[0.0, np.cumsum(steps)]


@dataclass(frozen=True)
class CourseSpectrogram:
    """Narrow-band spectra of one tone along its fitted course.

    Attributes
    ----------
    frame : ndarray of int, shape (n,)
        Frame index of each row (consecutive).
    course_hz : ndarray, shape (n,)
        Heard frequency of the course in each frame, ``f_k D(t)``.
    offset_hz : ndarray, shape (m,)
        Offset from the course of each column, Hz.
    p_db : ndarray, shape (n, m), float32
        Power, dB re a tone of unit amplitude ``A / 2 = 1`` (a unit-sum
        window), before the block average's response is taken off.
    block_s : float
        Length of the averaging sub-blocks (a boxcar), s.
    """

    frame: np.ndarray
    course_hz: np.ndarray
    offset_hz: np.ndarray
    p_db: np.ndarray
    block_s: float

    @property
    def bin_hz(self) -> float:
        return float(self.offset_hz[1] - self.offset_hz[0]) if self.offset_hz.size > 1 else 1.0

    def level_db(self, offset_hz) -> np.ndarray:
        """What to add to interpolated heights for the level ``20 log10(A / 2)``.

        The block average's (boxcar) response at the offset, taken off.
        """
        return -20.0 * np.log10(np.abs(np.sinc(np.asarray(offset_hz) * self.block_s)))


def course_spectrograms(y: np.ndarray, fs: float, t_y0: float, frame_t: np.ndarray,
                        factor: np.ndarray, rest_hz, half_band_hz, sigma_s: float,
                        first_frame: int = 0) -> list:
    """Narrow-band spectra of each tone along its fitted course, frame by frame.

    Parameters
    ----------
    y : ndarray
        Samples, evenly spaced at ``fs``; ``y[0]`` was heard at ``t_y0`` s.
    fs : float
        Sampling rate of ``y``, Hz.
    t_y0 : float
    frame_t : ndarray, shape (n,)
        Evenly spaced frame centre times, s; each frame centre must fall on
        a sample of ``y`` (``(frame_t - t_y0) * fs`` whole numbers).
    factor : ndarray, shape (n,)
        Fitted Doppler factor at ``frame_t`` (heard over rest frequency).
    rest_hz : array_like, shape (k,)
        Rest frequency of each tone.
    half_band_hz : array_like, shape (k,)
        How far from each course (Hz, heard) the spectra reach.
    sigma_s : float
        Standard deviation of the Gaussian window, s.
    first_frame : int
        Index of the frame at ``frame_t[0]``.

    Returns
    -------
    list of CourseSpectrogram or None
        One per tone; None where no frame's window lies within ``y`` and
        ``frame_t``.

    Notes
    -----
    The demodulated samples are averaged over sub-blocks (a boxcar
    low-pass), low-passed again by a Kaiser FIR (80 dB, so that a strong
    steady line far from the course does not fold into the band) and
    decimated to blocks of a fraction of a hop; each frame's block values
    are weighted by the Gaussian window (unit sum) and transformed.

    Examples
    --------
    A 1000 Hz tone heard at a factor of 1.05 throughout, 20 Hz beside a
    course drawn for a rest frequency of 1000 Hz; the peak is found by a
    parabola through the log power of three bins, exact for a steady tone
    under a Gaussian window (Gasior & Gonzalez 2004, see
    :func:`passby.spectral.interpolate_peaks`):

    >>> fs = 8000.0
    >>> t = np.arange(int(3 * fs)) / fs
    >>> y = np.cos(2 * np.pi * 1070.0 * t)
    >>> ft = np.arange(50, 251) / 100.0
    >>> sp = course_spectrograms(y, fs, 0.0, ft, np.full(ft.size, 1.05), [1000.0], [40.0], 0.15)[0]
    >>> row = sp.p_db[sp.p_db.shape[0] // 2][None, :]
    >>> col = int(np.argmax(row))
    >>> d, h = interpolate_peaks(row, np.array([0]), np.array([col]))
    >>> off = float(sp.offset_hz[col] + d[0] * sp.bin_hz)
    >>> round(off, 3), round(float(h[0] + sp.level_db(off)), 2)   # 20 log10(1/2)
    (20.0, -6.02)
    """
    y = np.asarray(y, dtype=np.float32)
    frame_t = np.asarray(frame_t, dtype=float)
    factor = np.asarray(factor, dtype=float)
    rest = np.atleast_1d(np.asarray(rest_hz, dtype=float))
    half = np.broadcast_to(np.asarray(half_band_hz, dtype=float), rest.shape)
    n = frame_t.size
    if n < 2 or y.size == 0:
        return [None] * rest.size
    h = float(frame_t[1] - frame_t[0])
    hop = int(round(h * fs))
    # Blocks per hop: enough that the band fits well inside the blocks'
    # Nyquist frequency; a divisor of the hop, so blocks tile frames.
    need = 2.5 * float(np.max(half)) * h
    r = min((d for d in range(1, hop + 1) if hop % d == 0 and d >= need), default=hop)
    L = hop // r
    fb = fs / L
    # Each block is made of `sub` sub-blocks (an odd number, so that a block's
    # centre is a sub-block's), low-passed at fb / 2 before decimation.
    sub = next(k for k in (5, 3, 1) if L % k == 0)
    Ls = L // sub
    h_aa = _antialias(sub)
    s0 = int(round((frame_t[0] - t_y0) * fs))      # frame 0's centre, as a sample of y
    e0 = s0 - hop // 2                             # blocks tile from half a hop before it
    # Window: block p r + i of frame p is centred delta_i from the frame centre.
    span = 3.5 * sigma_s
    i_lo = int(math.floor((-span * fs + hop // 2 - (L - 1) / 2.0) / L))
    i_hi = int(math.ceil((span * fs + hop // 2 - (L - 1) / 2.0) / L))
    i = np.arange(i_lo, i_hi + 1)
    delta = (-(hop // 2) + i * L + (L - 1) / 2.0) / fs
    w = np.exp(-0.5 * (delta / sigma_s) ** 2)
    w = (w / w.sum()).astype(np.float32)
    K = i.size
    n_fft = 1 << int(math.ceil(math.log2(max(K, 8))))
    b_first = np.arange(n) * r + i_lo
    ok = ((e0 + b_first * L >= max(0, int(math.ceil((frame_t[0] - t_y0) * fs))))
          & (e0 + (b_first + K) * L <= min(y.size, int(math.floor((frame_t[-1] - t_y0) * fs)) + 1)))
    good = np.flatnonzero(ok)
    if good.size == 0:
        return [None] * rest.size
    p_lo, p_hi = int(good[0]), int(good[-1])
    j0 = e0 + (p_lo * r + i_lo) * L
    seg = y[j0: e0 + (p_hi * r + i_lo + K) * L]
    F_frames = integrated_factor(frame_t, factor)
    rows = np.arange(p_lo, p_hi + 1)
    step = Ls * _CHUNK_SUBBLOCKS          # samples demodulated at a time (bounds the temporaries)
    out = []
    for k in range(rest.size):
        zs = np.empty(seg.size // Ls, dtype=np.complex128)
        for a in range(0, seg.size, step):
            part = seg[a: a + step]
            ts = t_y0 + (j0 + a + np.arange(part.size)) / fs
            ph = np.mod(rest[k] * np.interp(ts, frame_t, F_frames), 1.0).astype(np.float32)
            ph *= np.float32(2.0 * np.pi)
            z = (part * np.cos(ph)).reshape(-1, Ls).mean(axis=1) - 1j * (part * np.sin(ph)).reshape(-1, Ls).mean(axis=1)
            zs[a // Ls: a // Ls + z.size] = z
        if sub > 1:
            # Anti-alias: a steady line far from the course must not fold
            # into the band when the sub-blocks are decimated to blocks.
            zs = np.convolve(zs, h_aa, mode="same")
        zb = zs[(sub - 1) // 2::sub].astype(np.complex64)
        m = min(int(math.ceil(half[k] / fb * n_fft)), n_fft // 2 - 2)
        cols = np.arange(-m, m + 1)
        p_db = np.empty((rows.size, cols.size), dtype=np.float32)
        view = np.lib.stride_tricks.sliding_window_view(zb, K)
        for c0 in range(0, rows.size, _CHUNK_FRAMES):
            fr = rows[c0: c0 + _CHUNK_FRAMES]
            spec = scipy.fft.fft(view[(fr - p_lo) * r] * w, n_fft, axis=1)[:, cols % n_fft]
            p_db[c0: c0 + fr.size] = 10.0 * np.log10(spec.real ** 2 + spec.imag ** 2 + 1e-30)
        out.append(CourseSpectrogram(first_frame + rows, rest[k] * factor[rows], cols * fb / n_fft,
                                     p_db, Ls / fs))
    return out


def best_path(score: np.ndarray, max_step: int) -> np.ndarray:
    """The column path through a score matrix with the largest total score.

    Dynamic programming (the Viterbi algorithm) over rows, the column
    moving at most ``max_step`` from row to row: the hidden-Markov
    tracking of a weak frequency line [SB]_, with a flat transition
    probability within the step.

    Parameters
    ----------
    score : ndarray, shape (n, m)
        ``-inf`` forbids a cell.
    max_step : int

    Returns
    -------
    ndarray of int, shape (n,)

    References
    ----------
    .. [SB] R. L. Streit and R. F. Barrett, "Frequency line tracking using
       hidden Markov models", IEEE Trans. Acoust., Speech, Signal Process.
       38(4), 586-598 (1990).

    Examples
    --------
    >>> s = np.array([[0, 5, 0, 0], [0, 1, 0, 3], [0, 4, 0, 0]], float)
    >>> best_path(s, 1).tolist(), best_path(s, 2).tolist()
    ([1, 1, 1], [1, 3, 1])
    """
    n, m = score.shape
    acc = score[0].astype(float)
    back = np.zeros((n, m), dtype=np.int32)
    cols = np.arange(m, dtype=np.int32)
    k = max(0, min(max_step, m - 1))
    # acc between k cells of -inf either side: column c - s of acc is pad[k - s + c]
    pad = np.full(m + 2 * k, -np.inf)
    for row in range(1, n):
        pad[k: k + m] = acc
        best = acc.copy()
        arg = back[row]
        arg[:] = cols
        for s in range(1, k + 1):
            # from column c - s, then from column c + s; a later candidate
            # must beat what an earlier one chose (ties stay with the nearer)
            for cand, shift in ((pad[k - s: k - s + m], -s), (pad[k + s: k + s + m], s)):
                better = cand > best
                np.copyto(best, cand, where=better)
                np.copyto(arg, cols + shift, where=better)
        acc = best + score[row]
    path = np.empty(n, dtype=np.int64)
    path[-1] = int(np.argmax(acc))
    for row in range(n - 1, 0, -1):
        path[row - 1] = back[row, path[row]]
    return path


def follow_in_spectrogram(track: Track, spec: CourseSpectrogram, level_offset_db: float = 0.0,
                          masked: np.ndarray | None = None,
                          step: int = 5, max_step_bins: int = 1, window: int = 20,
                          min_power: float = 4.0, min_point_db: float = 3.0) -> Track:
    """Extend a track along the best path through its course spectrogram.

    The rows of every ``step``-th frame are whitened (power over the row's
    median) and searched for the best path (:func:`best_path`, at most
    ``max_step_bins`` columns per row), pulled towards the track where the
    track lies within the band. From each end of the track the path is followed
    outwards while its mean whitened power over the last ``window`` rows
    stays at least ``min_power`` (noise alone gives about 3 to 3.5: the
    best path through exponential noise of median 1, measured); the last
    window is given back. Steady lines of the background (``masked``)
    count as noise and give no points. In the frames followed, and in the
    track's inner gaps, each frame's peak nearest the path (within one
    column) is taken when it stands ``min_point_db`` above the row's median.

    Parameters
    ----------
    track : Track
    spec : CourseSpectrogram or None
    level_offset_db : float
        Added to the levels taken (to the scale of the track's own levels).
    masked : ndarray of bool, shape like ``spec.p_db``, optional
        Cells to leave out.
    step, max_step_bins, window : int
    min_power, min_point_db : float

    Returns
    -------
    Track
    """
    if spec is None or spec.frame.size < 2 * step:
        return track
    med = np.median(spec.p_db, axis=1)
    z = spec.p_db - med[:, None]                                      # dB over the row median
    if masked is not None:
        z = np.where(masked, np.float32(-3.0), z)
    nb = z.shape[1]
    rows = np.arange(0, spec.frame.size, step)
    power = np.minimum(10.0 ** (z[rows] / 10.0), 30.0)
    score = power - 1.0 / math.log(2.0)         # noise: exponential power, mean 1/ln 2 of its median
    # Hold the path to the track where the track lies well inside the band.
    f0 = spec.frame[0]
    at = track.frame - f0
    inside = (at >= 0) & (at < spec.frame.size)
    off = track.freq_hz[inside] - spec.course_hz[at[inside]]
    col = np.rint((off - spec.offset_hz[0]) / spec.bin_hz).astype(int)
    on_row = at[inside] % step == 0
    keep = on_row & (col >= 3) & (col <= nb - 4)
    for rr, cc in zip(at[inside][keep] // step, col[keep]):
        score[rr, cc - 2: cc + 3] += 10.0     # a pull towards the track, not a wall
    path = best_path(score, max_step_bins)
    along = power[np.arange(rows.size), path]
    # Walk outwards from the track's ends (in rows of the path).
    r_end = (track.end - f0) // step
    r_start = -(-(track.start - f0) // step)
    taken_rows = []

    def walk(r0, stop, dirn):
        # The rows from r0 towards stop, up to the first window of them whose
        # mean lies below min_power, that window given back.
        got = np.arange(r0, stop, dirn)
        if got.size < window:
            return got.tolist()
        means = strided_frames(along[got], window, 1).mean(axis=1)
        low = np.flatnonzero(means < min_power)
        return (got if low.size == 0 else got[: low[0]]).tolist()

    if 0 <= r_end + 1 < rows.size:
        taken_rows += walk(r_end + 1, rows.size, 1)
    if 0 <= r_start - 1 < rows.size:
        taken_rows += walk(r_start - 1, -1, -1)
    # Frames to look at: those between the rows taken outside, and the inner gaps.
    frames = []
    for r in taken_rows:
        frames.append(np.arange(rows[r], min(rows[r] + step, spec.frame.size)))
    inner = np.setdiff1d(np.arange(max(track.start - f0, 0), min(track.end - f0, spec.frame.size - 1) + 1), at)
    frames.append(inner)
    q = np.unique(np.concatenate(frames)) if frames else np.empty(0, int)
    q = q[(q < track.start - f0) | (q > track.end - f0) | np.isin(q, inner)]
    if q.size == 0:
        return track
    guide = np.interp(q, rows, path)
    cols = np.clip(np.rint(guide).astype(int), 2, nb - 3)
    cand = cols[:, None] + np.arange(-1, 2)
    zz = z[q[:, None], cand]
    best = cand[np.arange(q.size), np.argmax(zz, axis=1)]
    ok = ((z[q, best] >= min_point_db) & (z[q, best] > z[q, best - 1]) & (z[q, best] >= z[q, best + 1])
          & (best >= 1) & (best <= nb - 2))
    q, best = q[ok], best[ok]
    if q.size == 0:
        return track
    d, height = interpolate_peaks(spec.p_db, q, best)
    offset = spec.offset_hz[best] + d * spec.bin_hz
    freq = spec.course_hz[q] + offset
    snr = height - med[q]
    level = height + spec.level_db(offset) + level_offset_db
    fr = np.r_[track.frame, spec.frame[q]].astype(int)
    order = np.argsort(fr, kind="stable")
    lv = track.level_db if track.level_db is not None else np.full(track.frame.size, np.nan)
    return Track(fr[order], np.r_[track.freq_hz, freq][order], np.r_[track.snr_db, snr][order],
                 np.r_[lv, level][order])
