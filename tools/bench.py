"""Benchmark of ``passby analyze``: accuracy and cost against the physical
limit and a naive method, in one run.

Usage::

    python tools/bench.py [--quick] [--jobs N] [--out PATH] [--no-readme]
                          [--seed N] [--no-cost] [--raw PATH] [--show CASE]

What it does, in order:

1. **Accuracy.** A seeded grid of simulated pass-bys
   (:mod:`passby.simulation`, retarded-time synthesis): speeds 10-200 km/h,
   closest distances 2-50 m, tones 150-3000 Hz (single tones, engine-like
   harmonic series whose fundamental is sometimes weaker than a harmonic,
   horn chords of 3-5 tones), SNR -10 to 30 dB, pitch wander 0-0.5 %,
   ground reflection on or off, a stationary tone near the vehicle's tone,
   sample rates 8-48 kHz, air at -20 to 40 C (the analysis is given the
   true temperature). One vehicle per recording of 20-30 s, passing in the
   middle. Plus a "hard" grid (SNR -5 dB, 0.3 % wander, reflection, a tone
   near the vehicle's, weak fundamental) and noise-only recordings (with
   and without stationary tones, and a fan that starts and stops) for the
   false events per hour. Every recording goes through
   :func:`passby.api.analyze` and through a naive method (peak bin of a
   plain spectrogram, two-plateau formula) on the same samples.
2. **Physical floor.** The Cramer-Rao bound of the speed for a pure tone of
   the same scenario, from the Fisher information of the exact model.
3. **Cost.** Real-time factor and peak memory of ``analyze()`` on a WAV file
   read block by block, against a bare :func:`scipy.signal.spectrogram` of
   the same audio, each in a fresh single-threaded interpreter; and how
   time and memory grow with the length of the recording.

It writes ``tools/bench_results.md`` (Markdown tables headed by the machine
and the command) and puts the same tables between the markers
``<!-- bench:begin -->`` and ``<!-- bench:end -->`` of ``README.md`` when
both are there (``--no-readme`` skips that). Progress goes to stderr.

A case that looks wrong can be rerun alone and shown in full with
``--show main:17`` (or ``hard:3``, ``noise:2``).

References
----------
.. [OIML] OIML R 91 (1990), Radar equipment for the measurement of the
   speed of vehicles: maximum permissible error +-1 km/h up to 100 km/h and
   +-1 % above (from memory).
.. [Kay] S. M. Kay, Fundamentals of Statistical Signal Processing, Vol. I:
   Estimation Theory, Prentice Hall (1993): the Cramer-Rao bound, Fisher
   information of a signal in white Gaussian noise, ``I = J^T J / sigma^2``
   (ch. 3; from memory).
.. [FQ] B. G. Ferguson and B. G. Quinn, J. Acoust. Soc. Am. 96(2), 821-827
   (1994): the two-plateau speed ``v = c (fa - fr) / (fa + fr)``.
"""

from __future__ import annotations

import os
import sys

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))  # tools/, for benchkit
from benchkit import THREAD_ENV, cpu_model, markdown_table, replace_between_markers, shown_command  # noqa: E402
from benchkit import write_scene_wav  # noqa: E402

# Single-threaded numerics everywhere (the workers of the accuracy grid and
# the timed children). OPENBLAS_CORETYPE / OPENBLAS_L2_SIZE are left alone
# (only recorded): the machine sets them on some processors on purpose.
if __name__ == "__main__":  # before numpy loads its thread pools; not when imported by the tests
    os.environ.update(THREAD_ENV)

import argparse  # noqa: E402
import datetime  # noqa: E402
import json  # noqa: E402
import math  # noqa: E402
import multiprocessing  # noqa: E402
import platform  # noqa: E402
import subprocess  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
import traceback  # noqa: E402
from dataclasses import dataclass  # noqa: E402

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
if ROOT not in sys.path:
    sys.path.insert(0, ROOT)

import numpy as np  # noqa: E402
import scipy  # noqa: E402
import scipy.integrate  # noqa: E402
import scipy.optimize  # noqa: E402
import scipy.signal  # noqa: E402

from passby.api import analyze  # noqa: E402
from passby.physics import doppler_factor, plateau_solution, speed_of_sound  # noqa: E402
from passby.simulation import (  # noqa: E402
    Interferer,
    Scene,
    Tone,
    Vehicle,
    background_noise_rms,
    emission_time,
    harmonic_tones,
    received_frequency_numeric,
    render,
    speed_of_sound_iso,
)

KMH = 3.6  # km/h per m/s (exact)
DEFAULT_OUT = os.path.join(ROOT, "tools", "bench_results.md")
README = os.path.join(ROOT, "README.md")
MARK_BEGIN, MARK_END = "<!-- bench:begin -->", "<!-- bench:end -->"

SAMPLE_RATES = (8000, 16000, 22050, 44100, 48000)
SNR_BANDS = ((-math.inf, 0.0, "< 0 dB"), (0.0, 10.0, "0-10 dB"), (10.0, 20.0, "10-20 dB"),
             (20.0, math.inf, ">= 20 dB"))
#: A vehicle is detected by an event that is not rejected within this of its pass time, s.
MATCH_S = 1.0
#: Peak above the spectrogram's median power that makes a frame "loud" for
#: the naive method, dB (the analysis' default peak threshold, for a fair match).
NAIVE_LOUD_DB = 12.0
#: The naive method is told the band of the vehicle's strongest tone,
#: this factor below and above its rest frequency (covers the Doppler
#: shift up to 200 km/h at -20 C: 1/(1 - 0.174) = 1.21).
NAIVE_BAND = 1.25

# Sizes of the run: (main grid, hard grid, noise-only files, noise file s,
#                    cost audio s per rate, growth lengths in minutes, timing repeats)
FULL = dict(n_main=4000, n_hard=500, n_noise=120, noise_s=60.0, cost_s=600.0,
            growth_min=(1, 10, 60), repeats=5)
QUICK = dict(n_main=40, n_hard=12, n_noise=4, noise_s=60.0, cost_s=60.0,
             growth_min=(1, 3), repeats=3)

SUBSET_IDS = {"main": 1, "hard": 2, "noise": 3}


def log(msg):
    print(f"[bench] {msg}", file=sys.stderr, flush=True)


# --------------------------------------------------------------------------
# Tolerances


def oiml_tolerance_kmh(speed_kmh, scale=1.0):
    """Maximum permissible error of a speed, km/h: 1 km/h up to 100 km/h, 1 % above.

    ``scale`` multiplies both parts (3 gives +-3 km/h | 3 %).

    References
    ----------
    OIML R 91 [OIML]_ (from memory).

    Examples
    --------
    >>> oiml_tolerance_kmh(80.0), oiml_tolerance_kmh(150.0), oiml_tolerance_kmh(150.0, 3)
    (1.0, 1.5, 4.5)
    """
    v = float(speed_kmh)
    return scale * (1.0 if v <= 100.0 else 0.01 * v)


# --------------------------------------------------------------------------
# The grid of scenes


def _rng(seed, subset, index):
    return np.random.default_rng(np.random.SeedSequence([int(seed), SUBSET_IDS[subset], int(index)]))


def _log_uniform(rng, lo, hi):
    return float(math.exp(rng.uniform(math.log(lo), math.log(hi))))


def _top_tone_hz(fs, speed_mps, c, wander):
    """Highest rest frequency whose approach stays below 95 % of Nyquist."""
    return 0.95 * (fs / 2.0) * (1.0 - speed_mps / c) / (1.0 + 4.0 * wander)


def _tones(rng, kind, f_hi, weak_fundamental=None):
    """Tones of a source: ``(tones, kind label)``."""
    if kind == "tone":
        return (Tone(_log_uniform(rng, 150.0, f_hi), 1.0),)
    if kind == "harmonic":
        n = int(rng.integers(3, 6))
        while n > 2 and f_hi / n < 150.0:
            n -= 1
        f1 = _log_uniform(rng, 150.0, f_hi / n)
        amps = list(rng.uniform(0.3, 1.0, n))
        amps[int(rng.integers(0, n))] = 1.0
        weak = rng.uniform() < 0.4 if weak_fundamental is None else weak_fundamental
        if weak:  # the fundamental weaker than a harmonic
            amps[1] = 1.0
            amps[0] = float(rng.uniform(0.15, 0.4))
        return harmonic_tones(f1, amps)
    if kind == "horn":
        n = int(rng.integers(3, 6))
        steps = sorted(int(s) for s in rng.choice(np.arange(2, 13), size=n - 1, replace=False))
        top = 2.0 ** (steps[-1] / 12.0)  # equal temperament (common practice, no source)
        base = _log_uniform(rng, 150.0, max(150.0 * 1.0001, f_hi / top))
        freqs = [base] + [base * 2.0 ** (s / 12.0) for s in steps]
        return tuple(Tone(f, float(a)) for f, a in zip(freqs, rng.uniform(0.5, 1.0, n)))
    raise ValueError(kind)


def case_params(subset, index, seed):
    """Parameters of one recording of the grid, drawn from ``(seed, subset, index)``.

    The draw of a case does not depend on the size of the grid, so the quick
    grid is the first cases of the full one.

    Returns
    -------
    dict
        Plain values (SI units), enough for :func:`build_scene`.
    """
    rng = _rng(seed, subset, index)
    p = dict(subset=subset, index=int(index), seed=int(seed),
             scene_seed=(int(seed) * 1_000_003 + SUBSET_IDS[subset] * 100_000 + int(index)) % (2**31))
    p["fs"] = int(rng.choice(SAMPLE_RATES))
    p["temperature_c"] = float(rng.uniform(-20.0, 40.0))
    c = speed_of_sound_iso(p["temperature_c"])
    p["duration_s"] = float(rng.uniform(20.0, 30.0))
    if subset == "noise":
        p["noise"] = str(rng.choice(["road", "road", "pink", "white"]))
        p["mode"] = ("quiet", "steady", "fan", "steady+fan")[index % 4]
        p["duration_s"] = None  # set by the caller
        p["interferers"] = []
        if "steady" in p["mode"]:
            for _ in range(int(rng.integers(1, 4))):
                p["interferers"].append(dict(kind="steady", freq_hz=_log_uniform(rng, 60.0, 3000.0),
                                             amp=float(rng.uniform(0.3, 3.0)), on_s=-math.inf,
                                             off_s=math.inf, spin_s=2.0))
        if "fan" in p["mode"]:
            for _ in range(int(rng.integers(1, 3))):
                on = float(rng.uniform(3.0, 25.0))
                p["interferers"].append(dict(kind="fan", freq_hz=_log_uniform(rng, 150.0, 2000.0),
                                             amp=float(rng.uniform(0.3, 3.0)), on_s=on,
                                             off_s=on + float(rng.uniform(8.0, 25.0)),
                                             spin_s=float(rng.uniform(1.0, 5.0))))
        return p
    p["speed_mps"] = float(rng.uniform(10.0, 200.0)) / KMH
    p["closest_m"] = _log_uniform(rng, 2.0, 50.0)
    p["pass_time_s"] = p["duration_s"] / 2.0 + float(rng.uniform(-1.5, 1.5))
    if subset == "hard":
        p["kind"] = "harmonic"
        p["snr_db"] = -5.0
        p["wander"] = 0.003
        p["reflection"] = 0.7
        p["noise"] = "road"
        p["interferer"] = True
        p["interferer_rel"] = 0.5
        weak = True
    else:
        p["kind"] = str(rng.choice(["tone", "harmonic", "horn"]))
        p["snr_db"] = float(rng.uniform(-10.0, 30.0))
        p["wander"] = 0.0 if rng.uniform() < 0.5 else float(rng.uniform(0.0, 0.005))
        p["reflection"] = float(rng.uniform(0.5, 0.9)) if rng.uniform() < 0.5 else 0.0
        p["noise"] = str(rng.choice(["road", "road", "road", "pink", "white"]))
        p["interferer"] = bool(rng.uniform() < 0.3)
        p["interferer_rel"] = float(rng.uniform(0.2, 1.0))
        weak = None
    f_hi = min(3000.0, _top_tone_hz(p["fs"], p["speed_mps"], c, p["wander"]))
    tones = _tones(rng, p["kind"], f_hi, weak)
    p["tones"] = [(t.freq_hz, t.amplitude) for t in tones]
    hm = 1.2
    hs = float(rng.uniform(2.5, 4.0)) if p["kind"] == "horn" else float(rng.uniform(0.3, 1.0))
    p["source_height_m"] = min(hs, hm + 0.95 * p["closest_m"]) if hs > hm else hs
    p["mic_height_m"] = hm
    if p["kind"] == "horn":
        p["on_s"] = p["pass_time_s"] - float(rng.uniform(4.0, 8.0))
        p["off_s"] = p["pass_time_s"] + float(rng.uniform(4.0, 8.0))
    else:
        p["on_s"], p["off_s"] = -math.inf, math.inf
    # The interferer: a steady tone inside the heard sweep of the strongest tone.
    fs_tone, a_tone = max(p["tones"], key=lambda t: t[1])
    x = float(rng.uniform(-0.9, 0.9))
    p["interferers"] = []
    if p["interferer"]:
        p["interferers"].append(dict(kind="steady", freq_hz=fs_tone / (1.0 - x * p["speed_mps"] / c),
                                     amp=p["interferer_rel"] * a_tone / p["closest_m"],
                                     on_s=-math.inf, off_s=math.inf, spin_s=2.0))
    return p


def build_scene(p):
    """The :class:`~passby.simulation.Scene` of a case from :func:`case_params`."""
    inter = tuple(Interferer(i["freq_hz"], i["amp"], on_s=i["on_s"], off_s=i["off_s"], kind=i["kind"],
                             spin_s=i["spin_s"]) for i in p["interferers"])
    if p["subset"] == "noise":
        return Scene((), p["duration_s"], p["fs"], temperature_c=p["temperature_c"], noise=p["noise"],
                     snr_db=None, noise_level=1.0, interferers=inter, seed=p["scene_seed"])
    veh = Vehicle(p["speed_mps"], p["closest_m"], p["pass_time_s"],
                  tuple(Tone(f, a) for f, a in p["tones"]), source_height_m=p["source_height_m"],
                  wander_rms=p["wander"], on_s=p["on_s"], off_s=p["off_s"], ramp_s=0.1)
    return Scene((veh,), p["duration_s"], p["fs"], temperature_c=p["temperature_c"],
                 mic_height_m=p["mic_height_m"], ground_reflection=p["reflection"], noise=p["noise"],
                 snr_db=p["snr_db"], interferers=inter, seed=p["scene_seed"])


def is_stable(p):
    """The "stable tone" subset: no wander, no interferer, SNR >= 0 dB."""
    return p["subset"] == "main" and p["wander"] == 0.0 and not p["interferer"] and p["snr_db"] >= 0.0


# --------------------------------------------------------------------------
# The naive method


@dataclass(frozen=True)
class NaiveResult:
    """One estimate per file: speed, rest frequency, the two plateaus."""

    speed_mps: float
    f0_hz: float
    f_approach_hz: float
    f_recede_hz: float
    n_loud: int


def naive_nperseg(fs):
    """Spectrogram segment: the power of two nearest to 0.1 s."""
    return int(2 ** round(math.log2(0.1 * fs)))


def naive_estimate(x, fs, band_hz, c):
    """Speed from the peak bin of a plain spectrogram and two plateaus.

    ``scipy.signal.spectrogram`` (segment of about 0.1 s, 3/4 overlap,
    scipy's default window), the peak bin of every frame within
    ``band_hz``; the loud frames are those whose peak stands at least
    ``NAIVE_LOUD_DB`` above the median power of the band over the whole
    recording; ``fa`` and ``fr`` are the median peak frequencies of the
    first and the last third of the loud frames, and
    ``v = c (fa - fr) / (fa + fr)``, ``f0 = 2 fa fr / (fa + fr)``.

    Parameters
    ----------
    x : ndarray
        Samples.
    fs : int
        Sample rate, Hz.
    band_hz : (float, float)
        Band searched for the peak, Hz.
    c : float
        Speed of sound, m/s.

    Returns
    -------
    NaiveResult or None
        None when fewer than 9 frames are loud.

    References
    ----------
    Two-plateau formula: Ferguson & Quinn (1994) [FQ]_, as
    :func:`passby.physics.plateau_solution`.
    """
    n = naive_nperseg(fs)
    f, _, s = scipy.signal.spectrogram(np.asarray(x, dtype=np.float32), fs, nperseg=n, noverlap=3 * n // 4)
    sel = (f >= band_hz[0]) & (f <= band_hz[1])
    if sel.sum() < 3:
        return None
    fb, sb = f[sel], s[sel]
    peak_bin = np.argmax(sb, axis=0)
    peak = sb[peak_bin, np.arange(sb.shape[1])]
    floor = float(np.median(sb))
    loud = np.flatnonzero(peak >= floor * 10.0 ** (NAIVE_LOUD_DB / 10.0)) if floor > 0 else \
        np.flatnonzero(peak > 0)
    if loud.size < 9:
        return None
    third = loud.size // 3
    fa = float(np.median(fb[peak_bin[loud[:third]]]))
    fr = float(np.median(fb[peak_bin[loud[-third:]]]))
    v, f0 = plateau_solution(fa, fr, c)
    return NaiveResult(float(v), float(f0), fa, fr, int(loud.size))


# --------------------------------------------------------------------------
# The Cramer-Rao bound


def noise_shape(kind, f):
    """Relative power spectrum of the simulator's background noise.

    The shapes the :class:`passby.simulation.Scene` docstring defines:
    white: flat; pink: ``1/max(f, 20 Hz)``; road: ``1/f (f/100)^4 / (1 +
    (f/100)^4)`` (f in Hz).
    """
    f = np.asarray(f, dtype=float)
    if kind == "white":
        return np.ones_like(f)
    if kind == "pink":
        return 1.0 / np.maximum(f, 20.0)
    if kind == "road":
        q = (f / 100.0) ** 4
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(f > 0, q / (1.0 + q) / np.where(f > 0, f, 1.0), 0.0)
    raise ValueError(kind)


def noise_psd_one_sided(kind, rms, fs, f_hz):
    """One-sided power spectral density of the background noise at ``f_hz``.

    ``N1(f) = rms^2 S(f) / integral_0^{fs/2} S`` with the shape ``S`` of
    :func:`noise_shape`: the noise variance ``rms^2`` spread over 0..fs/2
    (unit^2 / Hz).
    """
    grid = np.concatenate(([0.0], np.geomspace(1e-3, fs / 2.0, 200001)))
    total = float(scipy.integrate.trapezoid(noise_shape(kind, grid), grid))
    return float(rms ** 2 * noise_shape(kind, f_hz) / total)


def _tone_model(theta, t, c):
    """Log-amplitude and phase of the direct-path tone heard at ``t``.

    ``p(t) = (a / r(tau)) cos(2 pi f0 (tau - t0) + phi)``, ``tau`` the
    emission time (Newton iteration of ``t = tau + r(tau)/c`` by
    :func:`passby.simulation.emission_time`), ``r(tau) = sqrt(v^2 (tau -
    t0)^2 + d^2)``.
    """
    v, d, t0, f0, a, phi = theta
    tau = emission_time(t, v, d, t0, c)
    u = tau - t0
    r = np.sqrt((v * u) ** 2 + d * d)
    return np.log(a / r), 2.0 * np.pi * f0 * u + phi, tau


def fisher_baseband(model, theta, t, psd_one_sided, rel_step=1e-5, mask=None):
    """Fisher information of a tone ``A(t) cos(Phi(t))`` in white Gaussian noise.

    ``model(theta, t) -> (ln A, Phi, ...)``. With the fast phase averaged
    out (``cos^2, sin^2 -> 1/2``, ``sin cos -> 0``), ``I = J^T J / sigma^2``
    over samples at rate ``fs`` with ``sigma^2 = fs N1 / 2`` becomes
    ``I_ij = (1/N1) integral A^2 (d_i lnA d_j lnA + d_i Phi d_j Phi) dt``
    [Kay]_; the integrand is the smooth envelope, so a grid much coarser
    than the samples suffices (trapezoid rule on ``t``). Derivatives by
    central differences of relative step ``rel_step``.

    Parameters
    ----------
    model : callable
    theta : sequence of float
    t : ndarray
        Uniform time grid, s.
    psd_one_sided : float
        One-sided noise PSD at the tone, unit^2/Hz.
    mask : ndarray of bool, optional
        Where the tone sounds (elsewhere it carries no information).

    Returns
    -------
    ndarray (k, k)
    """
    theta = np.asarray(theta, dtype=float)
    k = theta.size
    lna, _, *_ = model(theta, t)
    amp2 = np.exp(2.0 * lna)
    if mask is not None:
        amp2 = amp2 * mask
    d_lna, d_phi = [], []
    for i in range(k):
        h = rel_step * max(abs(theta[i]), 1e-3)
        hi, lo = theta.copy(), theta.copy()
        hi[i] += h
        lo[i] -= h
        la_p, ph_p, *_ = model(hi, t)
        la_m, ph_m, *_ = model(lo, t)
        d_lna.append((la_p - la_m) / (2 * h))
        d_phi.append((ph_p - ph_m) / (2 * h))
    fim = np.empty((k, k))
    for i in range(k):
        for j in range(i, k):
            g = amp2 * (d_lna[i] * d_lna[j] + d_phi[i] * d_phi[j])
            fim[i, j] = fim[j, i] = float(scipy.integrate.trapezoid(g, t)) / psd_one_sided
    return fim


def crb_from_fim(fim):
    """Diagonal of the inverse Fisher information (the Cramer-Rao bounds).

    Inverted after scaling to unit diagonal, for conditioning.
    """
    s = 1.0 / np.sqrt(np.diag(fim))
    inv = np.linalg.inv(fim * s[:, None] * s[None, :])
    return np.diag(inv) * s * s


def crb_speed_mps(p, scene=None):
    """Square root of the Cramer-Rao bound of the speed for the case ``p``, m/s.

    A single tone at the rest frequency and amplitude (at 1 m) of the
    case's strongest tone, on the direct path only (no reflection, no
    wander, no other tones), sounding where the case's tone sounds, in
    white Gaussian noise whose PSD is the simulated noise's at that rest
    frequency; unknowns ``(v, d, t0, f0, a, phi)``; the whole recording.
    """
    scene = scene or build_scene(p)
    c = speed_of_sound_iso(p["temperature_c"])
    f0, a = max(p["tones"], key=lambda t: t[1])
    v, d, t0 = p["speed_mps"], p["closest_m"], p["pass_time_s"]
    rms = background_noise_rms(scene)
    n1 = noise_psd_one_sided(p["noise"], rms, p["fs"], f0)
    dt = min(2e-3, d / max(v, 1e-3) / 100.0)
    t = np.arange(0.0, p["duration_s"], dt)
    theta = (v, d, t0, f0, a, 0.0)
    _, _, tau = _tone_model(theta, t, c)
    mask = ((tau >= p["on_s"]) & (tau <= p["off_s"])).astype(float)
    fim = fisher_baseband(lambda th, tt: _tone_model(th, tt, c), theta, t, n1, mask=mask)
    return float(math.sqrt(crb_from_fim(fim)[0]))


# --------------------------------------------------------------------------
# Running one case


#: Grid step (s) of the noise-free pitch fitted by :func:`wander_floor_kmh`.
FLOOR_STEP_S = 0.01


def wander_floor_kmh(p, scene, start_s, end_s, tone):
    """Speed error left by the pitch wander alone over a stretch of a recording, km/h.

    The noise-free frequency heard on the direct path (the simulator's own
    retarded-time phase, wander included: no closed form, see
    :func:`passby.simulation.received_frequency_numeric`) of tone ``tone``,
    every FLOOR_STEP_S from ``start_s`` to ``end_s``, is fitted with the
    exact moving-source model (:func:`passby.physics.doppler_factor`,
    unknowns v, d, t0, f0; Levenberg-Marquardt least squares of
    :func:`scipy.optimize.least_squares`, started at the truth). Without
    wander it returns about 0; with it, the error that no tracking of that
    stretch can avoid with this model. NaN for a stretch of under 8 points.
    """
    t = np.arange(max(start_s, FLOOR_STEP_S), min(end_s, p["duration_s"] - FLOOR_STEP_S), FLOOR_STEP_S)
    if t.size < 8:
        return math.nan
    c = speed_of_sound(p["temperature_c"])
    f = received_frequency_numeric(scene, 0, t, tone=tone)
    truth = np.array([p["speed_mps"], p["closest_m"], p["pass_time_s"], p["tones"][tone][0]])

    def resid(x):
        return x[3] * doppler_factor(t, x[0], x[1], x[2], c) / f - 1.0

    fit = scipy.optimize.least_squares(resid, truth, x_scale=np.r_[truth[:2], 0.1, truth[3]], method="lm")
    return abs(float(fit.x[0]) - p["speed_mps"]) * KMH if fit.success else math.nan


def _nearest_rel(f_est, freqs):
    if f_est is None or not math.isfinite(f_est):
        return math.nan
    return min(abs(f_est - f) / f for f in freqs)


def match_events(events, truth_t0):
    """Split the events of a one-vehicle recording by the detection rule.

    Returns ``(match, extra, rejected_near, rejected_far)``: the event that
    is not rejected closest in pass time within ``MATCH_S`` of
    ``truth_t0`` (or None), the other events that are not rejected (false
    events), and the counts of rejected events within and beyond
    ``MATCH_S``.
    """
    good = [e for e in events if e.quality != "rejected"]
    rejected = [e for e in events if e.quality == "rejected"]
    if truth_t0 is None:
        return None, good, 0, len(rejected)
    near = [e for e in good if math.isfinite(e.pass_time_s) and abs(e.pass_time_s - truth_t0) < MATCH_S]
    match = min(near, key=lambda e: abs(e.pass_time_s - truth_t0)) if near else None
    extra = [e for e in good if e is not match]
    rej_near = sum(1 for e in rejected if math.isfinite(e.pass_time_s)
                   and abs(e.pass_time_s - truth_t0) < MATCH_S)
    return match, extra, rej_near, len(rejected) - rej_near


def _event_summary(e):
    return dict(t=e.pass_time_s, v_kmh=e.speed_mps * KMH, d=e.closest_approach_m,
                f=e.emitted_hz, q=e.quality, reason=e.reason, method=e.method)


def run_case(spec):
    """Render, analyse and measure one case; returns a plain dict."""
    subset, index, seed, noise_s = spec
    p = case_params(subset, index, seed)
    if subset == "noise":
        p["duration_s"] = noise_s
    out = dict(params=p, error=None)
    try:
        scene = build_scene(p)
        t = time.perf_counter()
        x = render(scene)
        out["render_s"] = time.perf_counter() - t
        x *= 0.5 / float(np.max(np.abs(x)))
        t = time.perf_counter()
        res = analyze(x, sample_rate=p["fs"], temperature_c=p["temperature_c"])
        out["analyze_s"] = time.perf_counter() - t
    except Exception as exc:  # an analysis failure is a finding, not a crash of the benchmark
        out["error"] = f"{type(exc).__name__}: {exc}"
        out["traceback"] = traceback.format_exc(limit=-4)
        return out
    out["events"] = [_event_summary(e) for e in res.events]
    if subset == "noise":
        match, extra, _, rej = match_events(res.events, None)
        out.update(extra=len(extra), rej_near=0, rej_far=rej,
                   extra_idx=[i for i, e in enumerate(res.events) if any(e is x for x in extra)])
        return out
    c = speed_of_sound(p["temperature_c"])
    match, extra, rej_near, rej_far = match_events(res.events, p["pass_time_s"])
    out["extra_idx"] = [i for i, e in enumerate(res.events) if any(e is x for x in extra)]
    freqs = [f for f, _ in p["tones"]]
    out.update(extra=len(extra), rej_near=rej_near, rej_far=rej_far, detected=match is not None)
    if match is not None:
        out["v_err_kmh"] = abs(match.speed_mps - p["speed_mps"]) * KMH \
            if math.isfinite(match.speed_mps) else math.nan
        out["d_rel"] = abs(match.closest_approach_m - p["closest_m"]) / p["closest_m"] \
            if math.isfinite(match.closest_approach_m) else math.nan
        out["f_rel"] = _nearest_rel(match.emitted_hz, freqs)
        out["v_std_kmh"] = match.speed_std_mps * KMH
        if p["wander"] > 0 and math.isfinite(match.emitted_hz):
            k = int(np.argmin([abs(math.log(match.emitted_hz / f)) for f in freqs]))
            out["floor_kmh"] = wander_floor_kmh(p, scene, match.start_s, match.end_s, k)
    k_strong = int(np.argmax([a for _, a in p["tones"]]))
    if p["wander"] > 0:
        out["floor_whole_kmh"] = wander_floor_kmh(p, scene, 0.0, p["duration_s"], k_strong)
    f_strong = p["tones"][k_strong][0]
    nv = naive_estimate(x, p["fs"], (f_strong / NAIVE_BAND, f_strong * NAIVE_BAND), c)
    out["naive"] = None if nv is None else dict(v_err_kmh=abs(nv.speed_mps - p["speed_mps"]) * KMH,
                                                f_rel=_nearest_rel(nv.f0_hz, freqs),
                                                v_kmh=nv.speed_mps * KMH)
    out["crb_kmh"] = crb_speed_mps(p, scene) * KMH
    return out


# --------------------------------------------------------------------------
# Statistics


def _pct(a, q):
    a = np.asarray([x for x in a if math.isfinite(x)], dtype=float)
    return float(np.percentile(a, q)) if a.size else math.nan


def _share(flags, n):
    return 100.0 * sum(flags) / n if n else math.nan


def uncertainty_stats(rows):
    """Coverage of the stated speed uncertainty: shares within 1 and 2 u, median |error| / u."""
    z = [r["v_err_kmh"] / r["v_std_kmh"] for r in rows
         if r.get("detected") and math.isfinite(r.get("v_err_kmh", math.nan))
         and math.isfinite(r.get("v_std_kmh", math.nan)) and r["v_std_kmh"] > 0]
    n = len(z)
    return dict(n=n, in1=_share([x <= 1.0 for x in z], n), in2=_share([x <= 2.0 for x in z], n),
                z_med=float(np.median(z)) if n else math.nan)


def accuracy_stats(rows, method):
    """Figures of one method over the case results ``rows``.

    Shares count every vehicle of the subset (a missed one counts as
    outside); medians, percentiles and maxima are over the vehicles
    measured (finite estimate).
    """
    n = len(rows)
    v_err, f_rel, d_rel, in1, in3, in_d, in_f, det = [], [], [], [], [], [], [], 0
    for r in rows:
        p = r["params"]
        v_kmh = p["speed_mps"] * KMH
        if method == "ours":
            if r.get("error") or not r.get("detected"):
                continue
            e, fr, dr = r["v_err_kmh"], r["f_rel"], r["d_rel"]
        else:
            nv = r.get("naive")
            if nv is None:
                continue
            e, fr, dr = nv["v_err_kmh"], nv["f_rel"], math.nan
        det += 1
        if math.isfinite(e):
            v_err.append(e)
            in1.append(e <= oiml_tolerance_kmh(v_kmh))
            in3.append(e <= oiml_tolerance_kmh(v_kmh, 3.0))
        if math.isfinite(fr):
            f_rel.append(fr)
            in_f.append(fr <= 1e-3)
        if math.isfinite(dr):
            d_rel.append(dr)
            in_d.append(dr <= 0.10)
    return dict(
        n=n, measured=det, recall=_share([True] * det, n),
        v_med=_pct(v_err, 50), v_p95=_pct(v_err, 95), v_max=max(v_err) if v_err else math.nan,
        in1=_share(in1, n), in3=_share(in3, n),
        d_med=_pct(d_rel, 50), d_p95=_pct(d_rel, 95), in_d=_share(in_d, n) if method == "ours" else math.nan,
        f_med=_pct(f_rel, 50), f_p95=_pct(f_rel, 95), in_f=_share(in_f, n),
    )


def floor_stats(rows):
    """Our errors against the wander floor (:func:`wander_floor_kmh`), +-3 km/h or 3 %."""
    tol = lambda r: oiml_tolerance_kmh(r["params"]["speed_mps"] * KMH, 3.0)
    found = [r for r in rows if r.get("detected") and math.isfinite(r.get("floor_kmh", math.nan))
             and math.isfinite(r.get("v_err_kmh", math.nan))]
    whole = [r for r in rows if math.isfinite(r.get("floor_whole_kmh", math.nan))]
    ours_out = [r for r in found if r["v_err_kmh"] > tol(r)]
    return dict(n=len(rows), found=len(found),
                floor_med=float(np.median([r["floor_kmh"] for r in found])) if found else math.nan,
                floor_in3=_share([r["floor_kmh"] <= tol(r) for r in found], len(found)),
                ours_in3=_share([r["v_err_kmh"] <= tol(r) for r in found], len(found)),
                ours_out=len(ours_out), both_out=sum(r["floor_kmh"] > tol(r) for r in ours_out),
                whole_in3=_share([r["floor_whole_kmh"] <= tol(r) for r in whole], len(whole)))


def detection_stats(rows, hours):
    n = len(rows)
    err = sum(1 for r in rows if r.get("error"))
    det = sum(1 for r in rows if r.get("detected"))
    return dict(n=n, detected=det, missed=n - det, errors=err,
                rej_near=sum(r.get("rej_near", 0) for r in rows),
                rej_far=sum(r.get("rej_far", 0) for r in rows),
                extra=sum(r.get("extra", 0) for r in rows), hours=hours)


def crb_stats(rows, method):
    """Our (or the naive) error against the Cramer-Rao bound of each case."""
    e, crb = [], []
    for r in rows:
        if method == "ours":
            if not r.get("detected") or not math.isfinite(r.get("v_err_kmh", math.nan)):
                continue
            err = r["v_err_kmh"]
        else:
            if r.get("naive") is None:
                continue
            err = r["naive"]["v_err_kmh"]
        if math.isfinite(r.get("crb_kmh", math.nan)):
            e.append(err)
            crb.append(r["crb_kmh"])
    if not e:
        return dict(n=0, crb_med=math.nan, ratio_med=math.nan, ratio_rms=math.nan)
    e, crb = np.asarray(e), np.asarray(crb)
    return dict(n=int(e.size), crb_med=float(np.median(crb)), ratio_med=float(np.median(e / crb)),
                ratio_rms=float(np.sqrt(np.mean(e ** 2)) / np.sqrt(np.mean(crb ** 2))))


def subsets(main, hard):
    """Named groups of case results, in table order."""
    groups = [("all (main grid)", main)]
    for lo, hi, label in SNR_BANDS:
        groups.append((f"SNR {label}", [r for r in main if lo <= r["params"]["snr_db"] < hi]))
    groups.append(("stable tones (SNR >= 0)", [r for r in main if is_stable(r["params"])]))
    groups.append(("hard", hard))
    for kind, label in (("tone", "single tone"), ("harmonic", "harmonic series"), ("horn", "horn chord")):
        groups.append((label, [r for r in main if r["params"]["kind"] == kind]))
    return groups


# --------------------------------------------------------------------------
# Cost: timed children


CHILD_IMPORTS = ("numpy", "scipy.signal", "scipy.fft", "passby.api", "passby.wavio", "passby.pipeline")


def child_main(mode, path, temperature, repeats=1):
    """Entry point of a timed child process: prints one JSON line.

    ``analyze`` and ``spectrogram`` are run ``repeats`` times in the same
    process (fresh arrays each time); the shortest wall time is kept.
    """
    import importlib
    import resource

    for name in CHILD_IMPORTS:
        importlib.import_module(name)  # the same in every mode, so the baseline matches
    from passby.api import analyze as _analyze
    from passby.wavio import WavReader
    out = dict(mode=mode, walls=[], cpus=[])
    for _ in range(int(repeats) if mode != "baseline" else 0):
        if mode == "analyze":
            t, c = time.perf_counter(), time.process_time()
            res = _analyze(path, temperature_c=float(temperature))
            out["walls"].append(time.perf_counter() - t)
            out["cpus"].append(time.process_time() - c)
            out.update(events=[(e.pass_time_s, e.speed_mps, e.quality) for e in res.events],
                       duration_s=res.duration_s)
        elif mode == "spectrogram":
            with WavReader(path) as r:
                fs, n = r.info.sample_rate, r.info.frames
                x = np.empty(n, dtype=np.float32)
                i = 0
                for b in r.blocks(1 << 16):
                    x[i:i + b.size] = b
                    i += b.size
            t, c = time.perf_counter(), time.process_time()
            f, tt, s = scipy.signal.spectrogram(x, fs, nperseg=4096, noverlap=4096 - 512)
            out["walls"].append(time.perf_counter() - t)
            out["cpus"].append(time.process_time() - c)
            out.update(shape=list(s.shape), dtype=str(s.dtype), duration_s=n / fs)
            del x, f, tt, s
    if out["walls"]:
        k = int(np.argmin(out["walls"]))
        out.update(wall_s=out["walls"][k], cpu_s=out["cpus"][k])
    out["maxrss_kib"] = peak_rss_kib()
    out["ru_maxrss_kib"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    print(json.dumps(out))


def peak_rss_kib():
    """Peak resident memory of this process, KiB.

    ``VmHWM`` of ``/proc/self/status`` where there is one: it belongs to
    the process image, whereas Linux carries ``ru_maxrss`` over from the
    parent through fork and exec (a child of a large benchmark process
    would report the parent's peak). ``ru_maxrss`` elsewhere.
    """
    import resource

    try:
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1])
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss


def run_child(mode, path="", temperature=15.0, repeats=1):
    env = dict(os.environ)
    env.update(THREAD_ENV)
    cmd = [sys.executable, os.path.abspath(__file__), "--child", mode, path or "-", str(temperature),
           str(int(repeats))]
    done = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=3600, cwd=ROOT)
    if done.returncode != 0:
        raise RuntimeError(f"child {mode} failed ({done.returncode}): {done.stderr.strip()[-2000:]}")
    return json.loads(done.stdout.strip().splitlines()[-1])


def long_scene(duration_s, fs, seed, temperature_c=15.0):
    """A long recording: road noise, a steady 150 Hz hum and a pass-by in the middle of every minute.

    Every minute holds the same car (engine-like harmonics with a weak
    fundamental, 72 km/h, 7.5 m, 0.1 % wander), so the work per minute is
    the same whatever the length; only the noise differs. The car sounds
    only within 12 s of its pass (``on_s``/``off_s``) so the simulator's
    work stays proportional to the length. Its tones are 12 dB above the
    noise (SNR as defined in :class:`passby.simulation.Scene`).
    """
    p_tone = 1.0
    noise_rms = math.sqrt(p_tone / 10 ** 1.2)
    v, d = 72.0 / KMH, 7.5
    tones = harmonic_tones(180.0, [0.3, 1.0, 0.6, 0.4])
    scale = math.sqrt(p_tone * d * d / sum(t.amplitude ** 2 / 2.0 for t in tones))
    tones = tuple(Tone(t.freq_hz, t.amplitude * scale) for t in tones)
    vehicles, truth = [], []
    t0 = 30.0
    while t0 + 20.0 <= duration_s:
        vehicles.append(Vehicle(v, d, t0, tones, source_height_m=0.6, wander_rms=0.001,
                                on_s=t0 - 12.0, off_s=t0 + 12.0, ramp_s=1.0))
        truth.append((t0, v))
        t0 += 60.0
    hum = (Interferer(150.0, 0.5 * noise_rms),)
    scene = Scene(tuple(vehicles), duration_s, fs, temperature_c=temperature_c, ground_reflection=0.7,
                  noise="road", snr_db=None, noise_level=noise_rms, interferers=hum, seed=seed)
    return scene, truth, 0.02 / noise_rms


def _count_found(events, truth):
    found = 0
    for t0, _ in truth:
        if any(q != "rejected" and abs(t - t0) < MATCH_S for t, _, q in events):
            found += 1
    return found


def measure_cost(cfg, seed, tmp):
    """The cost table and the growth table (sequential, one child at a time)."""
    reps = cfg["repeats"]
    base = [run_child("baseline")["maxrss_kib"] for _ in range(2)]
    baseline_kib = min(base)
    load = os.getloadavg() if hasattr(os, "getloadavg") else (math.nan,) * 3
    log(f"cost: baseline interpreter {baseline_kib / 1024:.1f} MiB")
    cost = []
    for fs in (8000, 16000, 44100, 48000):
        scene, truth, gain = long_scene(cfg["cost_s"], fs, seed)
        path = os.path.join(tmp, f"cost_{fs}.wav")
        t = time.perf_counter()
        write_scene_wav(path, scene, gain)
        log(f"cost: {fs} Hz, {cfg['cost_s']:.0f} s written in {time.perf_counter() - t:.1f} s")
        a = run_child("analyze", path, 15.0, reps)
        s = run_child("spectrogram", path, 15.0, reps)
        cost.append(dict(fs=fs, audio_s=a["duration_s"], an_wall=a["wall_s"], an_cpu=a["cpu_s"],
                         an_mib=(a["maxrss_kib"] - baseline_kib) / 1024,
                         sp_wall=s["wall_s"], sp_mib=(s["maxrss_kib"] - baseline_kib) / 1024,
                         found=_count_found(a["events"], truth), truth=len(truth)))
        log(f"cost: {fs} Hz analyze {a['wall_s']:.2f} s, spectrogram {s['wall_s']:.2f} s")
        os.remove(path)
    growth = []
    for minutes in cfg["growth_min"]:
        scene, truth, gain = long_scene(60.0 * minutes, 48000, seed)
        path = os.path.join(tmp, f"growth_{minutes}.wav")
        t = time.perf_counter()
        write_scene_wav(path, scene, gain)
        log(f"growth: {minutes} min at 48 kHz written in {time.perf_counter() - t:.1f} s")
        a = run_child("analyze", path, 15.0, reps if minutes < 30 else 1)
        growth.append(dict(minutes=minutes, audio_s=a["duration_s"], wall=a["wall_s"], cpu=a["cpu_s"],
                           mib=(a["maxrss_kib"] - baseline_kib) / 1024, reps=len(a["walls"]),
                           found=_count_found(a["events"], truth), truth=len(truth)))
        log(f"growth: {minutes} min analysed in {a['wall_s']:.1f} s")
        os.remove(path)
    load_end = os.getloadavg() if hasattr(os, "getloadavg") else (math.nan,) * 3
    return dict(baseline_mib=baseline_kib / 1024, cost=cost, growth=growth, load=(load[0], load_end[0]))


# --------------------------------------------------------------------------
# Report


def _f(x, nd=2, unit=""):
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "-"
    if isinstance(x, float) and math.isinf(x):
        return "inf"
    return f"{x:.{nd}f}{unit}"


def _g(x, sig=2):
    """A positive number to ``sig`` significant digits, plain or with an exponent."""
    if x is None or not math.isfinite(x):
        return _f(x)
    return f"{x:.{sig}g}"


def _pc(x, nd=1):
    return _f(x, nd, " %")


def _rel(x):
    """A relative error as a percentage with sensible digits."""
    if x is None or not math.isfinite(x):
        return _f(x)
    v = 100.0 * x
    return f"{v:.3f} %" if v < 1 else f"{v:.2f} %" if v < 10 else f"{v:.1f} %"


_table = markdown_table


def replace_readme(text, path=README):
    """Put ``text`` between this benchmark's markers of README; False if they are not both there."""
    return replace_between_markers(text, path, MARK_BEGIN, MARK_END)


def machine_facts():
    cpu = cpu_model()
    blas = {k: os.environ.get(k, "unset") for k in ("OPENBLAS_CORETYPE", "OPENBLAS_L2_SIZE")}
    load = os.getloadavg() if hasattr(os, "getloadavg") else (math.nan,) * 3
    return dict(cpu=cpu, cores=os.cpu_count(), python=platform.python_version(), numpy=np.__version__,
                scipy=scipy.__version__, machine=platform.machine(), system=platform.system(),
                date=datetime.datetime.now(datetime.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"), blas=blas,
                load=load)


def targets(acc, noise, cost, growth):
    """The pass/fail rows: (target, value, ok)."""
    rows = []
    a_all, n_all = acc["all (main grid)"]
    ratio = a_all["v_med"] / n_all["v_med"] if n_all["v_med"] and n_all["v_med"] > 0 else math.nan
    rows.append(("median speed error <= 1/3 of the naive method's (main grid)",
                 f"{_f(a_all['v_med'])} vs {_f(n_all['v_med'])} km/h (ratio {_f(ratio)})",
                 math.isfinite(ratio) and ratio <= 1.0 / 3.0))
    st = acc["stable tones (SNR >= 0)"][0]
    rows.append(("stable tones, SNR >= 0 dB: >= 95 % within +-1 km/h or 1 %",
                 f"{_pc(st['in1'])} of {st['n']}", st["n"] > 0 and st["in1"] >= 95.0))
    hd = acc["hard"][0]
    rows.append(("hard conditions: >= 90 % within +-3 km/h or 3 %", f"{_pc(hd['in3'])} of {hd['n']}",
                 hd["n"] > 0 and hd["in3"] >= 90.0))
    rows.append(("zero false events per hour on noise-only audio",
                 f"{noise['extra']} in {noise['hours']:.2f} h ({noise['extra'] / noise['hours']:.1f} per hour)",
                 noise["extra"] == 0))
    if cost:
        c48 = [c for c in cost["cost"] if c["fs"] == 48000][0]
        rows.append(("analysis time <= bare spectrogram time at 48 kHz (other rates in the cost table)",
                     f"{c48['an_wall']:.2f} s vs {c48['sp_wall']:.2f} s "
                     f"({c48['an_wall'] / c48['sp_wall']:.2f}x)", c48["an_wall"] <= c48["sp_wall"]))
        rtf = c48["an_wall"] / c48["audio_s"]
        rows.append(("analysis <= 1/200 of real time at 48 kHz", f"RTF {rtf:.5f} (1/{1 / rtf:.0f})",
                     rtf <= 1.0 / 200.0))
        g = growth
        if len(g) >= 2:
            per_min = [r["cpu"] / (r["audio_s"] / 60.0) for r in g]
            lin = per_min[-1] / per_min[0]
            rows.append(("time linear in record length (CPU s per audio minute, longest / shortest "
                         "<= 1.25)", f"{per_min[0]:.3f} -> {per_min[-1]:.3f} s/min ({lin:.2f}x)", lin <= 1.25))
            dm = g[-1]["mib"] - g[0]["mib"]
            allow = max(5.0, 0.10 * g[0]["mib"])
            rows.append((f"memory flat in record length (growth <= max(5 MiB, 10 %))",
                         f"{g[0]['mib']:.1f} -> {g[-1]['mib']:.1f} MiB ({dm:+.1f} MiB)", dm <= allow))
    return rows


def report(cfg, args, facts, main, hard, noise_rows, cost, elapsed):
    """The Markdown text of the results (and the part for README)."""
    groups = subsets(main, hard)
    acc = {name: (accuracy_stats(rows, "ours"), accuracy_stats(rows, "naive")) for name, rows in groups}
    noise_hours = sum(r["params"]["duration_s"] for r in noise_rows) / 3600.0
    noise = detection_stats(noise_rows, noise_hours)
    parts = []
    parts.append("Machine: " + f"{facts['cpu']}, {facts['cores']} cores ({facts['system']} {facts['machine']}); "
                 f"Python {facts['python']}, numpy {facts['numpy']}, scipy {facts['scipy']}; "
                 f"OPENBLAS_CORETYPE={facts['blas']['OPENBLAS_CORETYPE']}, "
                 f"OPENBLAS_L2_SIZE={facts['blas']['OPENBLAS_L2_SIZE']}; load average {facts['load'][0]:.2f} "
                 "at the start.  \n"
                 f"Date: {facts['date']}. Command: `{shown_command('tools/bench.py', args)}` "
                 f"(seed {cfg['seed']}, {cfg['jobs']} worker(s), {elapsed / 60:.1f} min).  \n"
                 f"Run: {'QUICK (a small grid: figures are indicative only)' if cfg.get('quick') else 'full'}; "
                 f"{len(main)} + {len(hard)} pass-bys (main + hard grid), {len(noise_rows)} noise-only "
                 f"recordings ({noise_hours:.2f} h).")
    # Targets
    tg = targets(acc, noise, cost, cost["growth"] if cost else [])
    parts.append("### Targets\n\n" + _table(["target", "measured", "pass"],
                                             [(t, v, "PASS" if ok else "FAIL") for t, v, ok in tg]))
    # Speed
    rows = []
    for name, _ in groups:
        o, n = acc[name]
        rows.append((name, o["n"], _pc(o["recall"]), _pc(n["recall"]), _f(o["v_med"]), _f(n["v_med"]),
                     _f(o["v_p95"]), _f(n["v_p95"]), _f(o["v_max"]), _f(n["v_max"]),
                     _pc(o["in1"]), _pc(n["in1"]), _pc(o["in3"]), _pc(n["in3"])))
    parts.append("### Speed accuracy: passby (ours) vs the naive method\n\n"
                 "Absolute speed error in km/h over the vehicles measured; shares within "
                 "+-1 km/h up to 100 km/h and +-1 % above (OIML R 91 maximum permissible error, "
                 "from memory), and +-3 km/h or 3 %, of all vehicles of the row (a missed vehicle "
                 "counts as outside). \"found\" is our detection recall and, for the naive method, "
                 "the share of recordings where it gave an estimate.\n\n"
                 + _table(["subset", "n", "found ours", "found naive", "median ours", "median naive",
                           "p95 ours", "p95 naive", "max ours", "max naive", "+-1 km/h or 1 % ours",
                           "naive", "+-3 km/h or 3 % ours", "naive"], rows))
    # Distance and rest frequency
    rows = []
    for name, _ in groups:
        o, n = acc[name]
        rows.append((name, o["n"], _rel(o["d_med"]), _rel(o["d_p95"]), _pc(o["in_d"]),
                     _rel(o["f_med"]), _rel(n["f_med"]), _rel(o["f_p95"]), _rel(n["f_p95"]),
                     _pc(o["in_f"]), _pc(n["in_f"])))
    parts.append("### Closest distance and rest frequency\n\n"
                 "Relative errors. The rest frequency is the event's strongest tone against the nearest "
                 "true tone. The naive method gives no distance.\n\n"
                 + _table(["subset", "n", "distance median", "distance p95", "within 10 %",
                           "rest freq. median ours", "naive", "p95 ours", "naive",
                           "within 0.1 % ours", "naive"], rows))
    # Detection
    drows = []
    for name, rr in groups + [("noise only", noise_rows)]:
        h = sum(r["params"]["duration_s"] for r in rr) / 3600.0
        d = detection_stats(rr, h)
        vehicles = name != "noise only"
        drows.append((name, len(rr), f"{h:.2f}", d["detected"] if vehicles else "-",
                      d["missed"] if vehicles else "-", d["rej_near"] if vehicles else "-", d["rej_far"],
                      d["extra"], _f(d["extra"] / h if h else math.nan, 1), d["errors"]))
    modes = {}
    for r in noise_rows:
        m = r["params"]["mode"]
        modes.setdefault(m, [0, 0.0, 0])
        modes[m][0] += r.get("extra", 0)
        modes[m][1] += r["params"]["duration_s"] / 3600.0
        modes[m][2] += r.get("rej_far", 0)
    mode_txt = "; ".join(f"{m}: {e} false, {rj} rejected in {h:.2f} h" for m, (e, h, rj) in sorted(modes.items()))
    parts.append("### Detection and false events\n\n"
                 "A vehicle is detected by an event that is not rejected with |pass time - truth| < 1 s; "
                 "other events that are not rejected are false events. Rejected events are counted "
                 "apart: at the vehicle (< 1 s) and elsewhere.\n\n"
                 + _table(["recordings", "files", "hours", "detected", "missed", "rejected at vehicle",
                           "rejected elsewhere", "false events", "false per hour", "analysis errors"], drows)
                 + f"\n\nNoise-only audio by kind: {mode_txt}.")
    # CRB
    crows = []
    wf = [r for r in main if r["params"]["wander"] == 0.0]
    for label, rr in ([("wander-free, all SNR", wf)]
                      + [(f"wander-free, SNR {lab}", [r for r in wf if lo <= r["params"]["snr_db"] < hi])
                         for lo, hi, lab in SNR_BANDS]
                      + [("stable tones (SNR >= 0)", [r for r in main if is_stable(r["params"])]),
                         ("with wander (for contrast)", [r for r in main if r["params"]["wander"] > 0])]):
        o, n = crb_stats(rr, "ours"), crb_stats(rr, "naive")
        crows.append((label, o["n"], _g(o["crb_med"]), _f(o["ratio_med"], 1), _f(o["ratio_rms"], 1),
                      n["n"], _f(n["ratio_med"], 1), _f(n["ratio_rms"], 1)))
    parts.append("### Against the physical floor (Cramer-Rao bound)\n\n"
                 "sqrt(CRB) of the speed for a pure tone of the same scenario: one tone at the rest frequency, "
                 "amplitude, speed, distance and pass time of the case's strongest tone, direct path only "
                 "(no reflection, no wander, no other tones, no interferer), sounding where the case's tone "
                 "sounds, over the whole recording, in white Gaussian noise whose PSD is that of the simulated "
                 "noise at the rest frequency (the noise colour across the Doppler sweep is neglected). Model "
                 "p(t) = (a/r(tau)) cos(2 pi f0 (tau - t0) + phi) with tau the emission time; unknowns "
                 "(v, d, t0, f0, a, phi); derivatives by central differences; Fisher information "
                 "J^T J / sigma^2 in its complex-baseband form (fast phase averaged out), integrated on a grid "
                 "of <= 2 ms. A source with several tones carries more information than this bound assumes, "
                 "so a ratio below 1 is possible. Ratios: median of |error| / sqrt(CRB) per vehicle, and "
                 "RMS error / RMS sqrt(CRB).\n\n"
                 + _table(["subset (main grid)", "n ours", "median sqrt(CRB) km/h", "ours median ratio",
                           "ours RMS ratio", "n naive", "naive median ratio", "naive RMS ratio"], crows))
    # Stated uncertainty against the actual error
    urows = []
    for label, rr in ([(lab, rr) for lab, rr in groups if lab in ("all (main grid)", "SNR < 0 dB", "hard")]
                      + [("stable tones (SNR >= 0)", [r for r in main if is_stable(r["params"])]),
                         ("main grid, no wander", [r for r in main if r["params"]["wander"] == 0]),
                         ("main grid, with wander", [r for r in main if r["params"]["wander"] > 0])]):
        u = uncertainty_stats(rr)
        urows.append((label, u["n"], _pc(u["in1"]), _pc(u["in2"]), _f(u["z_med"])))
    parts.append("### Stated uncertainty against the actual error\n\n"
                 "For every vehicle found with a finite stated standard uncertainty u of the speed "
                 "(`speed_std_mps`, k = 1): the share whose actual error is within u and within 2u, and the "
                 "median of abs(error) / u. For normally distributed errors and an honest u these are 68.3 %, "
                 "95.4 % and 0.67 (normal distribution, common practice, no source); lower shares and a "
                 "larger median mean the stated uncertainty is optimistic.\n\n"
                 + _table(["subset", "n", "within u", "within 2u", "median abs(error) / u"], urows))
    # Against the wander floor
    frows = []
    for label, rr in (("hard", hard), ("main grid, with wander", [r for r in main if r["params"]["wander"] > 0])):
        w = floor_stats(rr)
        frows.append((label, w["n"], w["found"], _f(w["floor_med"]), _pc(w["floor_in3"]), _pc(w["ours_in3"]),
                      f"{w['both_out']} of {w['ours_out']}", _pc(w["whole_in3"])))
    parts.append("### Against the wander floor\n\n"
                 "The speed error the pitch wander alone leaves (`wander_floor_kmh`): the exact model fitted to "
                 "the noise-free pitch heard on the direct path, wander included, of the event's tone, over the "
                 "stretch its tracks span (or over the whole recording, last column). Shares within +-3 km/h or "
                 "3 % (\"within\") are of the vehicles found; the 'both / ours' column counts our errors outside it whose "
                 "floor over the same stretch is outside it too: those would need a longer stretch heard, not "
                 "better tracking of it.\n\n"
                 + _table(["subset", "n", "found", "floor median km/h", "floor within (stretch heard)",
                           "ours within", "outside: both / ours", "floor within (whole record)"],
                          frows))
    # By sample rate
    srows = []
    for fs in SAMPLE_RATES:
        rr = [r for r in main if r["params"]["fs"] == fs]
        o, n = accuracy_stats(rr, "ours"), accuracy_stats(rr, "naive")
        srows.append((f"{fs / 1000:g} kHz", o["n"], _pc(o["recall"]), _f(o["v_med"]), _f(n["v_med"]),
                      _pc(o["in1"]), _pc(o["in3"])))
    parts.append("### Speed by sample rate (main grid)\n\n"
                 + _table(["rate", "n", "found", "median ours", "median naive", "+-1 km/h or 1 %", "+-3 km/h or 3 %"],
                          srows))
    if cost:
        rows = []
        for c in cost["cost"]:
            rows.append((f"{c['fs'] / 1000:g} kHz", f"{c['audio_s']:.0f}", f"{c['an_wall']:.2f}",
                         f"{c['an_cpu']:.2f}", f"{c['an_wall'] / c['audio_s']:.5f}",
                         f"{c['audio_s'] / c['an_wall']:.0f}", f"{c['an_mib']:.1f}", f"{c['sp_wall']:.2f}",
                         f"{c['sp_mib']:.1f}", f"{c['an_wall'] / c['sp_wall']:.2f}",
                         f"{c['found']}/{c['truth']}"))
        parts.append("### Cost\n\n"
                     "`passby.api.analyze()` on a 16-bit WAV file (read block by block, as `passby analyze` "
                     "does), against a bare `scipy.signal.spectrogram(x, fs, nperseg=4096, "
                     "noverlap=4096-512)` of the same audio as float32 (already in memory; its time excludes "
                     "reading the file). Each run in a fresh interpreter with one thread "
                     "(OMP/OPENBLAS/MKL_NUM_THREADS=1; scipy.fft default workers); best wall time of "
                     f"{cfg['repeats']} runs in that interpreter (one run for files of 30 minutes or more); "
                     "import time excluded. Peak memory: peak resident set (VmHWM of /proc/self/status) of the child minus "
                     f"that of the same interpreter after the same imports ({cost['baseline_mib']:.1f} MiB); "
                     "for the spectrogram it includes the float32 audio. RTF = analysis time / audio time. "
                     f"Load average (1 min) of the machine {cost['load'][0]:.2f} at the start of these "
                     f"measurements and {cost['load'][1]:.2f} at the end (other work on the machine slows the "
                     "wall times; CPU s is the child's own). "
                     "The audio: road noise, a steady 150 Hz hum and, in the middle of every minute, the same car passing (72 km/h, 7.5 m, harmonics of 180 Hz, 12 dB SNR).\n\n"
                     + _table(["rate", "audio s", "analysis s", "CPU s", "RTF", "x real time", "peak MiB",
                               "spectrogram s", "spectrogram MiB", "analysis / spectrogram",
                               "passes found"], rows))
        rows = []
        for g in cost["growth"]:
            rows.append((f"{g['minutes']:g}", f"{g['wall']:.2f}", f"{g['cpu']:.2f}",
                         f"{g['cpu'] / (g['audio_s'] / 60):.3f}",
                         f"{g['wall'] / g['audio_s']:.5f}", f"{g['mib']:.1f}", f"{g['found']}/{g['truth']}"))
        parts.append("### Growth with record length (48 kHz)\n\n"
                     + _table(["minutes", "analysis s", "CPU s", "CPU s per audio minute", "RTF", "peak MiB",
                               "passes found"], rows))
    tables = "\n\n".join(parts)
    # Diagnostics (results file only)
    diag = ["### Definitions\n\n"
            "- Grid: one vehicle per recording of 20-30 s passing within 1.5 s of the middle; speed uniform "
            "10-200 km/h; closest distance log-uniform 2-50 m; source kind single tone, harmonic series "
            "(3-5 harmonics, fundamental weaker than a harmonic in 40 %) or horn chord (3-5 equal-tempered "
            "tones, sounding 4-8 s either side of the pass); tones 150-3000 Hz (kept below 95 % of "
            "Nyquist when approaching); SNR uniform -10..30 dB (as defined in passby.simulation: the "
            "direct-path tones at closest approach against the whole-band noise variance); pitch wander "
            "0 in half the cases, else uniform 0-0.5 % RMS; ground reflection (coefficient 0.5-0.9) in "
            "half; a steady tone inside the heard sweep of the strongest tone (0.2-1 times its received "
            "amplitude) in 30 %; road, pink or white noise; sample rate 8, 16, 22.05, 44.1 or 48 kHz; "
            "air -20..40 C, given to the analysis. Audio scaled to a peak of 0.5 and passed as an array.",
            "- Hard grid: harmonic series with the fundamental at 0.15-0.4 of the 2nd harmonic, SNR -5 dB, "
            "0.3 % wander, reflection 0.7, road noise, a steady tone at half the strongest tone's received "
            "amplitude inside its heard sweep; speed, distance, rate, temperature as the main grid.",
            "- Noise only: road/pink/white noise; quiet, 1-3 steady tones (60-3000 Hz), 1-2 fans that spin "
            "up and down (150-2000 Hz), or both.",
            f"- Naive method: scipy.signal.spectrogram (segment the power of two nearest 0.1 s, 3/4 overlap, "
            f"default window), peak bin per frame within 1/{NAIVE_BAND} to {NAIVE_BAND} times the strongest "
            f"tone's rest frequency (it is told the band, which favours it), frames whose peak is >= "
            f"{NAIVE_LOUD_DB:g} dB above the median power of the band, median frequency of the first and "
            "last third of those frames, v = c (fa - fr) / (fa + fr). One estimate per file.",
            "- These are simulated recordings: the figures compare methods and track the analysis, they are "
            "not a type approval. Speeds measured with passby are for engineering studies, not for legal "
            "enforcement unless the local authority approves the method."]
    timed = [r for r in main + hard + noise_rows if "analyze_s" in r]
    if timed:
        slow = max(timed, key=lambda r: r["analyze_s"])
        audio = sum(r["params"]["duration_s"] for r in timed)
        spent = sum(r["analyze_s"] for r in timed)
        diag.append(f"- Analysis time over the grid (arrays, inside the workers): {spent:.0f} s for "
                    f"{audio / 3600:.2f} h of audio (RTF {spent / audio:.4f}); median "
                    f"{_pct([r['analyze_s'] for r in timed], 50):.2f} s per recording, slowest "
                    f"{slow['analyze_s']:.2f} s (`{slow['params']['subset']}:{slow['params']['index']}`).")
    failures = [r for r in main + hard + noise_rows if r.get("error")]
    if failures:
        lines = [f"- `{r['params']['subset']}:{r['params']['index']}`: {r['error']}" for r in failures[:20]]
        diag.append("### Analysis failures\n\n" + "\n".join(lines))
    worst = sorted([r for r in main + hard if r.get("detected") and math.isfinite(r.get("v_err_kmh", math.nan))],
                   key=lambda r: -r["v_err_kmh"])[:12]
    if worst:
        diag.append("### Largest speed errors (rerun with `--show CASE`)\n\n" + _table(
            ["case", "error km/h", "true km/h", "kind", "d m", "f Hz", "SNR dB", "wander %", "refl.", "interf.",
             "rate", "T C"], [_case_row(r, r["v_err_kmh"]) for r in worst]))
    missed = [r for r in main + hard if not r.get("detected") and not r.get("error")]
    missed_st = [r for r in missed if is_stable(r["params"])] + [r for r in missed if not is_stable(r["params"])]
    if missed:
        diag.append(f"### Missed vehicles ({len(missed)}; stable-tone cases first)\n\n" + _table(
            ["case", "-", "true km/h", "kind", "d m", "f Hz", "SNR dB", "wander %", "refl.", "interf.",
             "rate", "T C"], [_case_row(r, math.nan) for r in missed_st[:12]]))
    false = [r for r in noise_rows + main + hard if r.get("extra")]
    if false:
        lines = []
        for r in false[:16]:
            p = r["params"]
            evs = [r["events"][i] for i in r["extra_idx"]]
            truth = "" if p["subset"] == "noise" else \
                f" (truth: t0 {p['pass_time_s']:.1f} s, {p['speed_mps'] * KMH:.1f} km/h)"
            lines.append(f"- `{p['subset']}:{p['index']}`{truth}: " + "; ".join(
                f"t {e['t']:.1f} s, {e['v_kmh']:.1f} km/h, {e['f']:.0f} Hz, {e['q']}" for e in evs))
        diag.append("### Recordings with false events\n\n" + "\n".join(lines))
    return tables, "\n\n".join(diag)


def _case_row(r, err):
    p = r["params"]
    f = max(p["tones"], key=lambda t: t[1])[0]
    return (f"`{p['subset']}:{p['index']}`", _f(err), f"{p['speed_mps'] * KMH:.1f}", p["kind"],
            f"{p['closest_m']:.1f}", f"{f:.0f}", f"{p['snr_db']:.1f}", f"{100 * p['wander']:.2f}",
            f"{p['reflection']:.1f}", "yes" if p["interferer"] else "no", f"{p['fs'] / 1000:g}",
            f"{p['temperature_c']:.0f}")


# --------------------------------------------------------------------------
# Shell


def show_case(name, seed):
    subset, _, index = name.partition(":")
    if subset not in ("main", "hard", "noise") or not index.isdigit():
        raise SystemExit(f"bench: --show wants main:N, hard:N or noise:N, not {name!r}")
    spec = (subset, int(index), seed, QUICK["noise_s"])
    p = case_params(subset, int(index), seed)
    if subset == "noise":
        p["duration_s"] = QUICK["noise_s"]
    print("parameters:", json.dumps(p, indent=1, default=str))
    print("scene:", build_scene(p))
    r = run_case(spec)
    for k in ("error", "traceback", "events", "detected", "v_err_kmh", "v_std_kmh", "d_rel", "f_rel", "naive",
              "crb_kmh", "render_s", "analyze_s"):
        if k in r:
            print(f"{k}: {r[k]}")


def run_grid(specs, jobs, label):
    out = []
    t = time.perf_counter()
    step = max(1, len(specs) // 20)
    if jobs > 1:
        ctx = multiprocessing.get_context("fork") if "fork" in multiprocessing.get_all_start_methods() \
            else multiprocessing.get_context()
        with ctx.Pool(jobs) as pool:
            for k, r in enumerate(pool.imap_unordered(run_case, specs, chunksize=1), 1):
                out.append(r)
                if k % step == 0 or k == len(specs):
                    log(f"{label}: {k}/{len(specs)} ({time.perf_counter() - t:.0f} s)")
    else:
        for k, s in enumerate(specs, 1):
            out.append(run_case(s))
            if k % step == 0 or k == len(specs):
                log(f"{label}: {k}/{len(specs)} ({time.perf_counter() - t:.0f} s)")
    out.sort(key=lambda r: r["params"]["index"])
    for r in out:
        if r.get("error"):
            p = r["params"]
            log(f"analysis failure {p['subset']}:{p['index']}: {r['error']}")
    return out


def main(argv=None):
    argv = sys.argv[1:] if argv is None else argv
    if argv[:1] == ["--child"]:
        child_main(*argv[1:5])
        return 0
    ap = argparse.ArgumentParser(description="Accuracy and cost of passby analyze against the physical "
                                             "limit and a naive method.")
    ap.add_argument("--quick", action="store_true", help="a small grid and short files (under ~90 s)")
    ap.add_argument("--jobs", type=int, default=1, help="worker processes for the accuracy grid (default 1)")
    ap.add_argument("--out", default=DEFAULT_OUT, help="results file (default tools/bench_results.md)")
    ap.add_argument("--no-readme", action="store_true", help="leave README.md alone")
    ap.add_argument("--seed", type=int, default=1, help="seed of the grid (default 1)")
    ap.add_argument("--no-cost", action="store_true", help="skip the cost and growth measurements")
    ap.add_argument("--raw", metavar="PATH", help="also write every case's result as JSON lines")
    ap.add_argument("--show", metavar="CASE", help="rerun one case (e.g. main:17) and print everything")
    args = ap.parse_args(argv)
    if args.show:
        show_case(args.show, args.seed)
        return 0
    cfg = dict(QUICK if args.quick else FULL)
    cfg.update(seed=args.seed, jobs=max(1, args.jobs), quick=args.quick)
    facts = machine_facts()
    t_start = time.perf_counter()
    log(f"{'quick' if args.quick else 'full'} run: {cfg['n_main']} + {cfg['n_hard']} pass-bys, "
        f"{cfg['n_noise']} noise-only files, {cfg['jobs']} worker(s)")
    specs = [("main", i, args.seed, 0.0) for i in range(cfg["n_main"])]
    main_rows = run_grid(specs, cfg["jobs"], "main grid")
    hard_rows = run_grid([("hard", i, args.seed, 0.0) for i in range(cfg["n_hard"])], cfg["jobs"], "hard grid")
    noise_rows = run_grid([("noise", i, args.seed, cfg["noise_s"]) for i in range(cfg["n_noise"])],
                          cfg["jobs"], "noise only")
    cost = None
    if not args.no_cost:
        with tempfile.TemporaryDirectory(prefix="passby-bench-") as tmp:
            cost = measure_cost(cfg, args.seed, tmp)
    elapsed = time.perf_counter() - t_start
    tables, diag = report(cfg, argv, facts, main_rows, hard_rows, noise_rows, cost, elapsed)
    text = ("# passby benchmark results\n\nWritten by `tools/bench.py`; do not edit by hand.\n\n"
            + tables + "\n\n" + diag + "\n")
    os.makedirs(os.path.dirname(os.path.abspath(args.out)), exist_ok=True)
    with open(args.out, "w", encoding="utf-8") as f:
        f.write(text)
    log(f"wrote {args.out} ({elapsed:.0f} s)")
    if args.raw:
        with open(args.raw, "w", encoding="utf-8") as f:
            for r in main_rows + hard_rows + noise_rows:
                f.write(json.dumps({k: v for k, v in r.items() if k != "traceback"}, default=str) + "\n")
        log(f"wrote {args.raw}")
    if not args.no_readme:
        if replace_readme(tables):
            log("README.md tables replaced between the bench markers")
        else:
            log("README.md has no bench markers; left alone")
    return 0


if __name__ == "__main__":
    sys.exit(main())
