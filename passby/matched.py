"""Matched search along the course of a close, fast pass, on the samples themselves.

At a pass whose transit time ``d / v`` is a few hundredths of a second,
every tone falls by a fifth or more within a tenth of a second: the tracking
spectrogram smears that sweep over many bins, and at a low signal-to-noise
ratio only scattered peaks of it stand out. Yet the pass holds much more
evidence than those peaks: a tone of rest frequency ``f_k`` is heard with
the phase ``2 pi f_k F(t)``, ``F`` the integral of the Doppler factor
(:func:`~passby.dechirp.integrated_factor`), so along the right course
``(v, d, t0)`` the samples multiplied by ``exp(-2 pi i f_k F(t))`` hold the
tone at 0 Hz for the whole pass, sweep and all. Summing them over blocks of
``block_s`` (coherently within a block, in power across blocks, so that a
slow wander of the pitch costs little) gives the generalised likelihood
ratio of a tone of unknown amplitude and phase in each block [Kay]_; its sum
over the tones and the blocks, maximised over the course, is the
maximum-likelihood estimate of the course (Ferguson & Quinn's model [FQ]_,
fitted to the waveform instead of to tracked frequencies).

The search starts from a rough course (the vote of scattered peaks,
:func:`~passby.fitting.sweep_search`): a grid around it, then the simplex
method of Nelder & Mead [NM]_ with short blocks and again with long ones.
Each tone's rest frequency is profiled out on a grid of offsets. The
standard uncertainty of the speed comes from the curvature of the
log-likelihood ratio at its maximum (the observed Fisher information).

References
----------
.. [Kay] S. M. Kay, *Fundamentals of Statistical Signal Processing, Vol. II:
   Detection Theory*, Prentice Hall (1998), sec. 7.6 (GLRT for a signal of
   unknown amplitude and phase in white Gaussian noise).
.. [FQ] B. G. Ferguson and B. G. Quinn, "Application of the short-time
   Fourier transform and the Wigner-Ville distribution to the acoustic
   localization of aircraft", J. Acoust. Soc. Am. 96(2), 821-827 (1994).
.. [NM] J. A. Nelder and R. Mead, "A simplex method for function
   minimization", Computer Journal 7(4), 308-313 (1965).
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass

import numpy as np
import scipy.fft
import scipy.ndimage
import scipy.optimize
import scipy.signal

from passby.physics import doppler_factor

log = logging.getLogger(__name__)

#: Block lengths of the coarse grid and of the two simplex rounds, s.
BLOCK_COARSE_S, BLOCK_FINE_S = 0.05, (0.1, 0.25)
#: Rest-frequency offsets profiled per tone, in units of 1 / block (grid step and half-width).
OFFSET_STEP, OFFSET_HALF = 0.25, 1.5
OFFSET_GRID = np.arange(-OFFSET_HALF, OFFSET_HALF + 1e-9, OFFSET_STEP)
#: Offsets (units of 1 / block) at which the noise under each tone is measured.
NOISE_OFFSETS = (-10.0, -8.0, -6.0, -4.0, 4.0, 6.0, 8.0, 10.0)
#: The simplex stops when its points are within SIMPLEX_XATOL of one another in (ln v, ln d,
#: t0 in s, ln scale) and within SIMPLEX_FATOL in log-likelihood ratio (well under the
#: uncertainty: a change of 0.5 in it is one standard deviation).
SIMPLEX_XATOL, SIMPLEX_FATOL = 1e-4, 1e-2
#: The grid's courses are scored together in arrays of at most this many complex elements
#: (small: large short-lived arrays make the heap of a long run grow).
GRID_CHUNK_ELEMENTS = 1 << 16
#: Distinct starts of the simplex taken from the grid.
N_STARTS = 4
#: Rival maxima (see :class:`MatchedCourse`): log-likelihood ratio margin, relative speed apart.
RIVAL_LLR, RIVAL_REL, RIVAL_SIDE_SHARE, RIVAL_SIDE_Z = 15.0, 0.03, 0.75, 2.0
#: A course this close (log) to the search box's speed or distance limits, or this share of
#: the pass-time window from its edges, is at the box's bound (see :class:`MatchedCourse`).
BOUND_REL = 0.02
#: The rise of the evidence at the pass (see :class:`MatchedCourse`): near within RISE_NEAR_S
#: of the pass heard, far beyond RISE_FAR_S.
RISE_NEAR_S, RISE_FAR_S = 0.1, 0.35
#: Steady lines at the plateaus (:func:`_steady_lines`): blocks this far (s) from the pass are used.
STEADY_GUARD_S = 0.1
#: Steady lines taken off the samples before the search (:func:`without_steady_lines`): each
#: side of the pass beyond the guard must hold LINE_SIDE_MIN_S of samples (at most LINE_SIDE_MAX_S
#: are used); a line stands LINE_PEAK_RATIO above the median power within LINE_FLOOR_HZ on both
#: sides, and its complex amplitude in each half of each side differs from their mean by at most
#: LINE_MAX_CHANGE of the mean's magnitude;
#: at most LINE_MAX lines, the strongest, below LINE_TOP_SHARE of the Nyquist rate.
LINE_SIDE_MIN_S, LINE_SIDE_MAX_S, LINE_PEAK_RATIO, LINE_FLOOR_HZ = 1.0, 2.5, 10.0, 10.0
LINE_MAX_CHANGE, LINE_MAX, LINE_TOP_SHARE = 0.5, 8, 0.9
#: Further tones tried (see :func:`_more_tones`).
MORE_DENOMINATOR, MORE_MAX_RATIO, MORE_APART, MORE_MIN_Z_SIDE, MORE_MIN_HZ = 4, 4.0, 0.02, 5.0, 50.0


@dataclass(frozen=True)
class MatchedCourse:
    """The course found by :func:`matched_course`.

    Attributes
    ----------
    speed_mps, closest_m, pass_time_s : float
        The course (``pass_time_s``: closest approach, emission time).
    speed_std_mps, closest_std_m : float
        Standard uncertainties from the observed Fisher information (NaN
        when the curvature is not that of a maximum).
    tones_hz : tuple of float
        Rest frequency of each tone, in the order given.
    tone_llr : tuple of float
        Each tone's log-likelihood ratio less its expectation under noise
        alone (its number of blocks).
    excess_before, excess_after : float
        Log-likelihood ratio, all tones, of the blocks heard before and after
        the pass, less its expectation under noise alone, divided by its
        standard deviation there (z-scores: each block's ratio is
        exponentially distributed with mean 1 under noise).
    rival_speed_mps : float
        The speed of another maximum of the likelihood, reached from another
        start, whose speed differs by more than RIVAL_REL (relative, log) and
        whose log-likelihood ratio is within RIVAL_LLR of the best, or at
        least RIVAL_SIDE_SHARE of it with evidence on its weaker side of the
        pass stronger than the best's by RIVAL_SIDE_Z (z-score)
        (a stationary line heard near one plateau's pitch lifts a wrong
        course on that side only); NaN when there is none. The data do not
        tell the two courses apart.
    steady_z : float
        The strongest evidence (z-score) of a steady line at a tone's
        plateau pitch on the side of the pass where the tone is not (its
        approach pitch after the pass, its recession pitch before; see
        :func:`_steady_lines`): a course drawn along a fan's or a
        transformer's line holds it on both sides.
    rise_db, expected_rise_db : float
        How much stronger the tones' evidence (its excess over noise, all
        tones) is within RISE_NEAR_S of the pass heard than from
        RISE_FAR_S to the end of the samples searched, dB; and the rise
        spherical spreading (amplitude ``d / r``) gives along the course.
        A chord of steady tones (a slow train's horn) that a fast course
        joins across the pass is heard about as loud near it as away.
    at_bound : bool
        Whether the course ended within BOUND_REL (log) of the search's
        box in speed or distance, or within BOUND_REL of its width from
        its edges in pass time: no maximum of the likelihood inside it
        (a fan spinning down, searched from the fit of its brief fall,
        ran to the largest distance allowed).
    """

    speed_mps: float
    closest_m: float
    pass_time_s: float
    speed_std_mps: float
    closest_std_m: float
    tones_hz: tuple
    tone_llr: tuple
    excess_before: float
    excess_after: float
    rival_speed_mps: float = math.nan
    steady_z: float = math.nan
    at_bound: bool = False
    rise_db: float = math.nan
    expected_rise_db: float = math.nan


def heard_s(course, c):
    """When the pass of ``course`` (``v, d, t0, ...``) is heard: ``t0 + d / c``, s."""
    return float(course[2]) + float(course[1]) / c


def _basebands(y, fs, t_y0, rests, max_rate_hz):
    """The samples shifted to 0 Hz at each rest frequency and decimated: (t, z of shape (k, n)).

    By the discrete Fourier transform: the bins within half the output rate
    of each tone, shifted to 0 Hz and transformed back at the lower rate
    (an ideal low-pass filter and decimation by ``q``, circular over the
    samples; [OS]_ sec. 4.6); the part of the shift below one bin is taken
    off in the time domain. One transform serves every tone, and the
    complex samples of the tones are never held at the full rate.

    References
    ----------
    .. [OS] A. V. Oppenheim and R. W. Schafer, *Discrete-Time Signal
       Processing*, 3rd ed., Pearson (2010).
    """
    q = max(1, int(fs // max_rate_hz))
    m = np.asarray(y).size // q
    n = m * q
    if m == 0:
        return t_y0 + np.empty(0), np.empty((len(rests), 0), dtype=complex), q
    spec = scipy.fft.fft(np.asarray(y[:n], dtype=float))
    band = np.rint(scipy.fft.fftfreq(m, 1.0 / m)).astype(np.int64)     # 0, 1, ..., -1 (inverse-transform order)
    tl = np.arange(m) * (q / fs)
    z = np.empty((len(rests), m), dtype=complex)
    for i, f in enumerate(rests):
        k0 = int(round(float(f) * n / fs))
        z[i] = scipy.fft.ifft(spec[(k0 + band) % n]) * (m / n)
        z[i] *= np.exp(-2j * np.pi * (float(f) - k0 * fs / n) * tl)
    return t_y0 + tl, z, q


class _Evidence:
    """Log-likelihood ratio of courses, on the basebands of a set of tones."""

    def __init__(self, t, z, rests, t_y0, c, wind_mps):
        self.t, self.z, self.rests, self.t_y0 = t, z, np.asarray(rests, float), t_y0
        self.c, self.wind = c, wind_mps
        self.dt = t[1] - t[0] if t.size > 1 else 1.0
        self.noise = None      # per tone, E|Y_b|^2 per sample of a block under noise
        self.shift_hz = np.zeros(self.rests.size)   # per tone, a refinement of its rest frequency

    def demodulated(self, thetas):
        """The basebands along each course (rows of ``thetas``): y of shape (courses, tones, n), F of (courses, n)."""
        th = np.asarray(thetas, dtype=float).reshape(-1, 4)
        v, d, t0, scale = (th[:, j:j + 1] for j in range(4))
        D = doppler_factor(self.t[None, :], v, d, t0, self.c, self.wind) * scale
        F = np.concatenate([np.zeros((D.shape[0], 1)), np.cumsum(0.5 * (D[:, 1:] + D[:, :-1]) * self.dt, axis=1)],
                           axis=1)
        # z already had exp(-2 pi i f (t - t_y0)) taken off; take off the rest of the course.
        tt = self.t - self.t_y0
        base = tt[0] if tt.size else 0.0
        y = self.z[None] * np.exp(-2j * np.pi * (self.rests[None, :, None] * (F[:, None, :] + base - tt[None, None, :])
                                                 + self.shift_hz[None, :, None] * F[:, None, :]))
        return y, F

    def refine_tones(self, theta, block_s):
        """Each tone's rest frequency moved to its own maximum along ``theta`` (within half a bin of ``block_s``)."""
        half = 0.5 / block_s
        for k in range(self.rests.size):
            def minus(off, k=k):
                keep = self.shift_hz[k]
                self.shift_hz[k] = off
                p, _, _ = self.block_powers(theta, block_s, (0.0,))
                self.shift_hz[k] = keep
                return -float(p[k].sum())
            r = scipy.optimize.minimize_scalar(minus, bounds=(self.shift_hz[k] - half, self.shift_hz[k] + half),
                                               method="bounded", options=dict(xatol=1e-3))
            self.shift_hz[k] = float(r.x)

    def tones_hz(self, scale):
        """The rest frequency of each tone, Hz, at the common ``scale``."""
        return tuple(float(f) for f in (self.rests + self.shift_hz) * scale)

    def block_powers(self, theta, block_s, offsets):
        """|block sums|^2 / block length, shape (tones, offsets, blocks), and block centre times."""
        y, F = self.demodulated(theta)
        y, F = y[0], F[0]
        b = max(1, int(round(block_s / self.dt)))
        n = (y.shape[1] // b) * b
        off = np.asarray(offsets, float) / (b * self.dt)
        if off.size == 1 and off[0] == 0.0:
            s = y[:, None, :n].reshape(y.shape[0], 1, n // b, b).sum(axis=3)
        else:
            # One tone at a time: all tones' products at every offset at once
            # would take megabytes that the station's small board must spare.
            rot = _rotations(off, F[None, :n])[0]      # (offsets, n)
            s = np.empty((y.shape[0], off.size, n // b), dtype=complex)
            for k in range(y.shape[0]):
                s[k] = (y[k, None, :n] * rot).reshape(off.size, n // b, b).sum(axis=2)
        tb = self.t[:n].reshape(-1, b).mean(axis=1)
        return np.abs(s) ** 2 / b, tb, off

    def measure_noise(self, theta, block_s):
        p, _, _ = self.block_powers(theta, block_s, NOISE_OFFSETS)
        self.noise = np.maximum(np.median(p.mean(axis=2), axis=1), 1e-300)

    def llr_many(self, thetas, block_s, grid):
        """:meth:`llr` of many courses at once (rows of ``thetas``), in chunks of GRID_CHUNK_ELEMENTS."""
        th = np.asarray(thetas, dtype=float).reshape(-1, 4)
        k, n_all = self.z.shape
        b = max(1, int(round(block_s / self.dt)))
        n = (n_all // b) * b
        grid = np.asarray(grid, float)
        off = grid / (b * self.dt)
        step = max(1, GRID_CHUNK_ELEMENTS // max(1, k * grid.size * n_all))
        out = np.empty(th.shape[0])
        for i in range(0, th.shape[0], step):
            y, F = self.demodulated(th[i:i + step])
            rot = _rotations(off, F[:, :n])
            prod = y[:, :, None, :n] * rot[:, None, :, :]
            s = prod.reshape(F.shape[0], k, off.size, n // b, b).sum(axis=4)
            per = (np.abs(s) ** 2 / b).sum(axis=3) / self.noise[None, :, None]
            out[i:i + step] = per.max(axis=2).sum(axis=1)
        return out

    def llr(self, theta, block_s, best_offsets=False, grid=(0.0,)):
        """Sum over tones of the best offset's log-likelihood ratio (and the per-tone offsets, Hz).

        ``grid``: the offsets of each tone's rest frequency tried, in units of 1 / block.
        """
        p, tb, off = self.block_powers(theta, block_s, grid)
        per = p.sum(axis=2) / self.noise[:, None]        # (tones, offsets)
        k = np.argmax(per, axis=1)
        total = float(per[np.arange(per.shape[0]), k].sum())
        if best_offsets:
            return total, off[k], p[np.arange(per.shape[0]), k] / self.noise[:, None], tb
        return total


def _rotations(off, F):
    """``exp(-2 pi i off_j F)`` of shape (rows of F, offsets, n) for offsets in even steps.

    The powers of one complex exponential (a product per offset instead of
    an exponential: the grid's cost); any other offsets, one by one.
    """
    off = np.asarray(off, dtype=float)
    if off.size > 2 and np.allclose(np.diff(off), off[1] - off[0], rtol=1e-9, atol=0.0):
        out = np.empty((F.shape[0], off.size, F.shape[1]), dtype=complex)
        out[:, 0] = np.exp(-2j * np.pi * off[0] * F)
        step = np.exp(-2j * np.pi * (off[1] - off[0]) * F)
        for j in range(1, off.size):
            np.multiply(out[:, j - 1], step, out=out[:, j])
        return out
    return np.exp(-2j * np.pi * off[None, :, None] * F[:, None, :])


def matched_course(y, fs, t_y0, start, c, wind_mps=0.0, reach_s=0.6, max_steady_z=math.inf):
    """The maximum-likelihood course of a close pass near a rough one.

    Parameters
    ----------
    y : array_like
        Samples (1-D) that hold the pass, at rate ``fs``; ``y[0]`` heard at ``t_y0`` s.
    fs : float
        Sampling rate, Hz.
    t_y0 : float
        Time of ``y[0]``, s.
    start : sequence
        ``[v, d, t0, f_1, ..., f_k]``: the rough course and rest frequencies
        (m/s, m, s, Hz).
    c : float
        Speed of sound, m/s.
    wind_mps : float
        Wind component along the travel, m/s.
    reach_s : float
        Samples used: within ``reach_s`` of the rough pass.
    max_steady_z : float
        A maximum whose refined course has steady-line evidence
        (:func:`_steady_lines`) of this or more runs along a steady line,
        not a vehicle's course: the next likeliest is refined and taken
        instead (the likeliest of all when every one does).

    Returns
    -------
    MatchedCourse or None
        None when the samples do not cover the pass.

    Examples
    --------
    A 500 Hz tone at 150 km/h passing 3 m away at 1 s, in noise:

    >>> from passby.physics import doppler_factor
    >>> from passby.dechirp import integrated_factor
    >>> fs, c, v, d = 8000, 343.2, 150 / 3.6, 3.0
    >>> t = np.arange(2 * fs) / fs
    >>> r = np.hypot(d, v * (t - 1.0))
    >>> x = np.sin(2 * np.pi * 500.0 * integrated_factor(t, doppler_factor(t, v, d, 1.0, c))) / r
    >>> x += np.random.default_rng(1).normal(0.0, 0.3, t.size)
    >>> m = matched_course(x, fs, 0.0, [0.9 * v, 1.3 * d, 1.02, 505.0], c)
    >>> round(m.speed_mps * 3.6), round(m.closest_m, 1), round(m.tones_hz[0])
    (150, 3.0, 500)
    """
    v1, d1, t1 = (float(s) for s in start[:3])
    rests = np.asarray(start[3:], dtype=float)
    got = _segment(y, fs, t_y0, start, c, reach_s)
    if got is None:
        return None
    seg, i0 = got
    t, z, _ = _basebands(seg, fs, t_y0 + i0 / fs, rests, 0.8 * float(rests.max()))
    ev = _Evidence(t, z, rests, t_y0 + i0 / fs, c, wind_mps)
    v_max = 0.45 * c
    ev.measure_noise((v1, d1, t1, 1.0), BLOCK_COARSE_S)
    # A grid around the rough course (its speed within 30 %, its transit
    # time within a factor 2.2), each tone's rest frequency profiled.
    grid = OFFSET_GRID
    courses = [(v, tr * v, t0, 1.0) for v in v1 * np.exp(np.arange(-0.3, 0.301, 0.04)) if v < v_max
               for tr in (d1 / v1) * np.exp(np.arange(-0.8, 0.801, 0.2))
               for t0 in t1 + np.arange(-0.04, 0.0401, 0.01)]
    scores = list(zip(ev.llr_many(courses, BLOCK_COARSE_S, grid), courses)) if courses else []
    scores.sort(key=lambda s: -s[0])
    lo = np.array([math.log(0.5 * v1), math.log(0.2 * d1), t1 - 0.1, math.log(0.97)])
    hi = np.array([math.log(v_max), math.log(5.0 * d1), t1 + 0.1, math.log(1.03)])

    def to_theta(u):
        u = np.clip(u, lo, hi)
        return (math.exp(u[0]), math.exp(u[1]), float(u[2]), math.exp(u[3]))

    def simplex(theta, block, evidence):
        evidence.measure_noise(tuple(theta), block)
        u0 = [math.log(theta[0]), math.log(theta[1]), theta[2], math.log(theta[3])]
        r = scipy.optimize.minimize(lambda u: -evidence.llr(to_theta(u), block), u0, method="Nelder-Mead",
                                    options=dict(xatol=SIMPLEX_XATOL, fatol=SIMPLEX_FATOL, maxiter=800))
        return np.array(to_theta(r.x)), -r.fun

    # The best few distinct starts, each with its tones' rest frequencies moved to their best offsets.
    finals = []
    starts = []
    for s, th in scores:
        if len(starts) == N_STARTS:
            break
        if all(abs(math.log(th[0] / o[0])) > 0.05 or abs(math.log(th[1] / o[1])) > 0.3 for o in starts):
            starts.append(th)
    for th in starts:
        _, off, _, _ = ev.llr(th, BLOCK_COARSE_S, best_offsets=True, grid=grid)
        my_rests = rests + off
        more = _more_tones(seg, fs, t_y0 + i0 / fs, th, my_rests, c, wind_mps)
        my_rests = np.r_[my_rests, more]
        t, z, _ = _basebands(seg, fs, t_y0 + i0 / fs, my_rests, 0.8 * float(my_rests.max()))
        e = _Evidence(t, z, my_rests, t_y0 + i0 / fs, c, wind_mps)
        theta, _ = simplex(th, BLOCK_FINE_S[0], e)
        e.measure_noise(tuple(theta), BLOCK_FINE_S[-1])
        score = e.llr(tuple(theta), BLOCK_FINE_S[-1])
        finals.append((score, tuple(float(x) for x in theta), len(my_rests), _sides(e, theta, c)[0], e))

    def refined(final):
        _, theta, _, _, e = final
        theta, _ = simplex(np.array(theta), BLOCK_FINE_S[-1], e)
        # The common scale leaves each tone's offset at the coarse grid's step:
        # each is refined on its own, then the course once more.
        e.refine_tones(tuple(theta), BLOCK_FINE_S[-1])
        theta, _ = simplex(theta, BLOCK_FINE_S[-1], e)
        e.refine_tones(tuple(theta), BLOCK_FINE_S[-1])
        tones = e.tones_hz(theta[3])
        steady = _steady_lines(seg, fs, t_y0 + i0 / fs, theta, np.asarray(tones) / theta[3], c, wind_mps)
        return theta, tones, steady

    # The likeliest maximum, unless its course runs along a steady line (a fan heard
    # near one plateau's pitch can lift a wrong course above the right one): then the next.
    ranked = sorted(finals, key=lambda f: -f[0])
    first, on_lines = None, []
    for chosen in ranked:
        theta, tones, steady = got = refined(chosen)
        first = first or (chosen, got)
        if not steady >= max_steady_z:
            break
        on_lines.append(chosen)
    else:
        chosen, (theta, tones, steady) = first
        on_lines = []
    best_score, _, _, best_sides, ev = chosen
    # The evidence either side of the pass in short blocks (a long block
    # straddling the pass would hold the sweep on one side only).
    stats, per_block, block_times = _sides(ev, theta, c)
    block = BLOCK_FINE_S[-1]
    ev.measure_noise(tuple(theta), block)
    cov = _inverse_curvature(lambda th: ev.llr(th, block), theta)
    v, d, t0 = (float(x) for x in theta[:3])
    # A rival maximum: another start that ends nearly as likely at another speed (not
    # the chosen one's own start: refined, its speed may have moved by more than
    # RIVAL_REL; nor one found to run along a steady line).
    best_sides = min(best_sides)
    rivals = [f[1][0] for f in finals if f is not chosen and all(f is not o for o in on_lines) and (f[0] >= best_score - RIVAL_LLR or (f[0] >= RIVAL_SIDE_SHARE * best_score and min(f[3]) > best_sides + RIVAL_SIDE_Z))
              and abs(math.log(f[1][0] / v)) > RIVAL_REL]
    log.debug("matched search: maxima (llr, km/h, m, tones, z before, z after) %s, chosen %d",
              [(round(f[0], 1), round(3.6 * f[1][0], 1), round(f[1][1], 2), f[2], round(f[3][0], 1), round(f[3][1], 1))
               for f in finals], finals.index(chosen))
    rival = max(rivals, key=lambda r: abs(math.log(r / v))) if rivals else math.nan
    u = np.array([math.log(v), math.log(d), t0])
    width = hi[:3] - lo[:3]
    margin = np.array([BOUND_REL, BOUND_REL, BOUND_REL * width[2]])
    at_bound = bool(np.any((u - lo[:3] < margin) | (hi[:3] - u < margin)))
    rise, expected = _rise_db(per_block, theta, c, block_times)
    return MatchedCourse(v, d, t0, _sd(cov, 0), _sd(cov, 1), tones,
                         tuple(float(x) for x in per_block.sum(axis=1) - per_block.shape[1]),
                         stats[0], stats[1], rival, steady, at_bound, rise, expected)


def without_steady_lines(y, fs, t_y0, heard, guard_s, band_hz=(0.0, math.inf)):
    """The samples with the steady lines heard on both sides of a pass taken off.

    A steady line (a transformer's hum, a fan at constant speed) near the
    pitch of a plateau lifts a course drawn along it on that side of the
    pass: the likeliest course of a passing car can then be several per
    cent off in speed. Such a line is the same sinusoid before and after
    the pass, where no tone of a vehicle is (its pitch falls across the
    pass by ``2 v / c``). Each side (beyond ``guard_s`` of the pass heard
    at ``heard``) is transformed with a Hann window [Harris]_; a line
    stands out on both sides (LINE_PEAK_RATIO above the local median); its
    frequency is refined on the two sides together, first on their powers,
    then on their sum (one phase across the gap); its complex amplitude in
    each half of each side must agree with their mean within
    LINE_MAX_CHANGE; then the sinusoid of the mean amplitude is subtracted
    from all the samples. A line whose pitch wanders (a fan) keeps no one
    phase over the span and is left (subtracting it could add power).

    Parameters
    ----------
    y : array_like
        Samples (1-D) at rate ``fs``; ``y[0]`` heard at ``t_y0`` s.
    fs, t_y0, heard, guard_s : float
        Rate (Hz), time of ``y[0]``, the pass heard and the guard either side (s).
    band_hz : (float, float)
        Lines are looked for within this band, and below LINE_TOP_SHARE of the Nyquist rate.

    Returns
    -------
    (ndarray, tuple of float)
        The samples (float64, a copy) less the lines, and the lines' frequencies, Hz.

    References
    ----------
    .. [Harris] F. J. Harris, "On the use of windows for harmonic analysis with the
       discrete Fourier transform", Proc. IEEE 66(1), 51-83 (1978).

    Examples
    --------
    A steady 400 Hz line under a pass heard at 3 s is taken off; noise stays:

    >>> fs = 4000.0
    >>> t = np.arange(int(6 * fs)) / fs
    >>> noise = np.random.default_rng(2).normal(0.0, 0.1, t.size)
    >>> clean, lines = without_steady_lines(np.sin(2 * np.pi * 400.2 * t + 1.0) + noise, fs, 0.0, 3.0, 0.6)
    >>> [round(f, 1) for f in lines], bool(np.std(clean - noise) < 0.01)
    ([400.2], True)
    """
    y = np.array(y, dtype=float)
    t = t_y0 + np.arange(y.size) / fs
    nb = int(np.sum(t < heard - guard_s))
    na = int(np.sum(t > heard + guard_s))
    n = min(nb, na, int(LINE_SIDE_MAX_S * fs))
    if n < LINE_SIDE_MIN_S * fs:
        return y, ()
    ib, ia = nb - n, y.size - na           # first sample of each side's window (nearest the pass)
    w = scipy.signal.get_window("hann", n)
    nfft = scipy.fft.next_fast_len(2 * n)
    df = fs / nfft
    side = [y[i:i + n] * w for i in (ib, ia)]
    power = [np.abs(scipy.fft.rfft(s, nfft)) ** 2 for s in side]
    size = 2 * max(1, int(LINE_FLOOR_HZ / df)) + 1
    ratio = np.minimum(*[p / np.maximum(scipy.ndimage.median_filter(p, size=size, mode="nearest"), 1e-300)
                         for p in power])
    f_bins = np.arange(ratio.size) * df
    ratio[(f_bins < max(band_hz[0], 3 * df)) | (f_bins > min(band_hz[1], LINE_TOP_SHARE * fs / 2))] = 0.0
    peaks, _ = scipy.signal.find_peaks(ratio, height=LINE_PEAK_RATIO, distance=max(1, int(2.0 / (n / fs) / df)))
    peaks = peaks[np.argsort(-(power[0][peaks] + power[1][peaks]))][:LINE_MAX]
    tt = [t[i:i + n] - heard for i in (ib, ia)]
    h = n // 2
    wh = scipy.signal.get_window("hann", h)

    def sums(f):
        return [np.dot(s, np.exp(-2j * np.pi * f * u)) for s, u in zip(side, tt)]

    lines = []
    gap = float(tt[1].mean() - tt[0].mean())     # between the two windows' centres, s
    for k in peaks:
        f0 = float(k) * df
        r = scipy.optimize.minimize_scalar(lambda f: -sum(abs(x) ** 2 for x in sums(f)),
                                           bounds=(f0 - df, f0 + df), method="bounded", options=dict(xatol=1e-4))
        r = scipy.optimize.minimize_scalar(lambda f: -abs(sum(sums(f))) ** 2, bounds=(r.x - 0.5 / gap, r.x + 0.5 / gap),
                                           method="bounded", options=dict(xatol=1e-5))
        f = float(r.x)
        a = sum(2.0 * x / w.sum() for x in sums(f)) / 2.0
        # One phase and amplitude over the whole span: each half of each side agrees with their mean.
        halves = [2.0 * np.dot(y[i:i + h] * wh, np.exp(-2j * np.pi * f * (t[i:i + h] - heard))) / wh.sum()
                  for i in (ib, ib + h, ia, ia + h)]
        if max(abs(x - a) for x in halves) > LINE_MAX_CHANGE * abs(a):
            continue
        y -= np.real(a * np.exp(2j * np.pi * f * (t - heard)))
        lines.append(f)
    return y, tuple(lines)


def _segment(y, fs, t_y0, start, c, reach_s):
    """``(samples within reach_s of the pass heard along start, index of the first)``, or None."""
    v1, d1 = float(start[0]), float(start[1])
    heard = heard_s(start, c)
    i0 = int(math.floor((heard - reach_s - t_y0) * fs))
    i1 = int(math.ceil((heard + reach_s - t_y0) * fs))
    if i0 < 0 or i1 > len(y) or len(start) < 4 or not (v1 > 0 and d1 > 0):
        return None
    return np.asarray(y[i0:i1], dtype=float), i0


def start_steady_z(y, fs, t_y0, start, c, wind_mps=0.0, reach_s=0.6):
    """The steady-line evidence (see :func:`_steady_lines`) along the rough course ``start`` itself.

    Costs a few milliseconds where :func:`matched_course` costs some
    tenths of a second: a vote drawn between two steady lines (two
    harmonics of a receding engine, a fan and its neighbour) holds both
    plateau pitches on both sides of its pass, and no search is needed
    to see it. NaN when the samples do not cover the pass.
    """
    got = _segment(y, fs, t_y0, start, c, reach_s)
    if got is None:
        return math.nan
    seg, i0 = got
    theta = (float(start[0]), float(start[1]), float(start[2]), 1.0)
    return _steady_lines(seg, fs, t_y0 + i0 / fs, theta, np.asarray(start[3:], dtype=float), c, wind_mps)


def _steady_lines(seg, fs, t0_seg, theta, rests, c, wind_mps):
    """The strongest z-score of a steady line at a plateau pitch where the tone is not.

    Each tone is heard at ``f D(-inf)`` before the pass and ``f D(+inf)``
    after it; a course that follows a steady line (a fan, a transformer)
    along one plateau holds that line on the other side of the pass too.
    Each plateau pitch is tried as a fixed tone on the other side, in
    blocks of BLOCK_FINE_S[0] beyond STEADY_GUARD_S of the pass.
    """
    v, d, t0, scale = (float(x) for x in theta)
    heard = heard_s(theta, c)
    ends = doppler_factor(np.array([t0 - 1e6, t0 + 1e6]), v, d, t0, c, wind_mps) * scale
    pitches = np.r_[np.asarray(rests) * ends[0], np.asarray(rests) * ends[1]]
    t, z, _ = _basebands(seg, fs, t0_seg, pitches, 0.8 * float(pitches.max()))
    ev = _Evidence(t, z, pitches, t0_seg, c, wind_mps)
    still = (1e-9, d, t0, 1.0)
    grid = OFFSET_GRID
    ev.measure_noise(still, BLOCK_FINE_S[0])
    _, _, per, tb = ev.llr(still, BLOCK_FINE_S[0], best_offsets=True, grid=grid)
    n = len(rests)
    after, before = tb > heard + STEADY_GUARD_S, tb < heard - STEADY_GUARD_S
    zs = np.r_[_z(per[:n, after]), _z(per[n:, before])]
    return float(np.max(zs)) if zs.size else math.nan


def _more_tones(seg, fs, t0_seg, theta, rests, c, wind_mps):
    """Rest frequencies of further tones of the source heard along ``theta``.

    Engine orders and horn chords stand in simple ratios to the strongest
    tone: each ``f_1 m / n`` (n up to MORE_DENOMINATOR, up to MORE_MAX_RATIO
    times ``f_1``, none within MORE_APART of a tone already held) is tried
    along the course, its offset profiled; those whose evidence reaches a
    z-score of MORE_MIN_Z_SIDE both before and after the pass are added, at
    their best offset (a stationary line near one plateau's pitch is heard
    on one side only).
    """
    f1 = float(rests[0]) * theta[3]
    top = min(MORE_MAX_RATIO * f1, fs / 2.0 / 1.3)
    cands = sorted({f1 * m / n for n in range(1, MORE_DENOMINATOR + 1)
                    for m in range(1, int(top * n / f1) + 1) if math.gcd(m, n) == 1})
    held = [float(r) * theta[3] for r in rests]
    cands = [f for f in cands if f >= MORE_MIN_HZ and all(abs(f - h) > MORE_APART * h for h in held)]
    if not cands:
        return []
    t, z, _ = _basebands(seg, fs, t0_seg, np.asarray(cands), 0.8 * max(cands))
    ev = _Evidence(t, z, np.asarray(cands) / theta[3], t0_seg, c, wind_mps)
    grid = OFFSET_GRID
    ev.measure_noise(theta, BLOCK_FINE_S[0])
    _, off, per, tb = ev.llr(theta, BLOCK_FINE_S[0], best_offsets=True, grid=grid)
    heard = heard_s(theta, c)
    sides = [_z(per[:, side]) for side in (tb < heard, tb > heard)]
    z_all = np.minimum(*sides)
    return [float(f + o / theta[3]) for f, o, zz in zip(ev.rests, off, z_all) if zz >= MORE_MIN_Z_SIDE]


def _sides(ev, theta, c):
    """z-scores (all tones) of the evidence before and after the pass heard along ``theta``, and the block ratios.

    Short blocks (BLOCK_COARSE_S): a long block straddling the pass would
    hold the sweep on one side only.
    """
    ev.measure_noise(tuple(theta), BLOCK_COARSE_S)
    _, _, per_block, tb = ev.llr(tuple(theta), BLOCK_COARSE_S, best_offsets=True)
    at = heard_s(theta, c)
    flat = [per_block[:, side].reshape(1, -1) for side in (tb < at, tb > at)]
    return [float(_z(f)[0]) for f in flat], per_block, tb


def _rise_db(per_block, theta, c, tb):
    """The rise of the evidence at the pass, measured and along ``theta`` (see :class:`MatchedCourse`), dB.

    Expected: the mean of ``(d / r)^2`` (spherical spreading of the
    amplitude; ``r`` at the time heard less ``d / c``, near enough here)
    over the same blocks.
    """
    v, d, t0 = (float(x) for x in theta[:3])
    lag = np.abs(tb - heard_s(theta, c))
    near, far = lag <= RISE_NEAR_S, lag >= RISE_FAR_S
    if not near.any() or not far.any():
        return math.nan, math.nan
    excess = np.maximum(per_block.sum(axis=0) - per_block.shape[0], 0.0)
    spread = d ** 2 / (d ** 2 + (v * (tb - heard_s(theta, c))) ** 2)
    measured = 10.0 * math.log10(max(excess[near].mean(), 1e-12) / max(excess[far].mean(), 1e-12))
    return measured, 10.0 * math.log10(spread[near].mean() / spread[far].mean())


def _z(per_block):
    """Per tone, the z-score of the sum of block ratios (each exponential with mean 1 under noise alone)."""
    n = per_block.shape[1]
    return (per_block.sum(axis=1) - n) / math.sqrt(n) if n else np.full(per_block.shape[0], -math.inf)


def _sd(cov, i):
    return float(math.sqrt(cov[i, i])) if cov is not None and cov[i, i] > 0 else math.nan


def _inverse_curvature(f, theta, rel=(2e-3, 2e-2, None)):
    """Inverse of minus the Hessian of ``f`` at ``theta`` by central differences; None unless positive definite."""
    theta = np.asarray(theta, float)
    h = np.array([rel[0] * theta[0], rel[1] * theta[1], 2e-3 * max(theta[1] / theta[0], 1e-3), 1e-4])
    n = theta.size
    H = np.empty((n, n))
    f0 = f(tuple(theta))
    for i in range(n):
        for j in range(i, n):
            if i == j:
                e = np.zeros(n)
                e[i] = h[i]
                H[i, i] = (f(tuple(theta + e)) - 2 * f0 + f(tuple(theta - e))) / h[i] ** 2
            else:
                ei, ej = np.zeros(n), np.zeros(n)
                ei[i], ej[j] = h[i], h[j]
                H[i, j] = H[j, i] = (f(tuple(theta + ei + ej)) - f(tuple(theta + ei - ej))
                                     - f(tuple(theta - ei + ej)) + f(tuple(theta - ei - ej))) / (4 * h[i] * h[j])
    try:
        cov = np.linalg.inv(-H)
    except np.linalg.LinAlgError:
        return None
    if not np.all(np.linalg.eigvalsh(0.5 * (cov + cov.T)) > 0):
        return None
    return cov
