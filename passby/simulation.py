"""Synthetic pass-by recordings, computed from the retarded time.

A reference simulator for testing and for the demo recordings. It is kept
independent of the analysis on purpose: it never uses a closed-form
received-frequency (Doppler) formula, nor the package's physics module. The
microphone pressure is synthesised directly: for every output sample time
``t`` the emission time ``tau`` of the sound that arrives then is found by
Newton iteration of ``t = tau + r(tau)/c``, and the source signal emitted at
``tau`` is spread spherically, ``p(t) = s(tau) / r(tau)``. The Doppler shift
then comes out of the physics by itself, and the analysis is checked
against it.

Geometry (SI units): the microphone is at height ``mic_height_m`` above a
flat ground. A vehicle moves along a straight horizontal line at height
``source_height_m`` at constant speed ``v``; its position along the line is
``x(tau) = v (tau - t0)``, so it is closest to the microphone at emission
time ``t0`` (``pass_time_s``), at the 3-D distance ``d`` (``closest_m``) of
the direct path. The ground reflection comes from the image source mirrored
in the ground plane (height ``-source_height_m``), whose closest distance is
``sqrt(d**2 + 4 hs hm)``; it has its own retarded time, is scaled by a real
reflection coefficient and spread by its own path length.

Everything is a pure function of a :class:`Scene` (small frozen
dataclasses): the same scene, seed included, gives the same samples, bit
for bit, whether rendered whole (:func:`render`) or block by block
(:func:`render_blocks`, memory independent of the duration). The work is
done in fixed chunks aligned to the absolute sample index, and every random
stream is drawn per fixed chunk from a seed derived from
``(seed, stream, chunk index)``, so no result depends on how the output is
cut into blocks.

References
----------
.. [ISO9613] ISO 9613-1:1993, Acoustics -- Attenuation of sound during
   propagation outdoors -- Part 1 (speed of sound in air,
   c = 343.2 (T/T0)^(1/2) m/s with T0 = 293.15 K).
.. [dB] C. de Boor, "A Practical Guide to Splines", Springer (cubic
   B-spline; from memory).
.. [JOS] J. O. Smith, "Spectral Audio Signal Processing" (FIR design by
   frequency sampling and windowing; from memory).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Iterator

import numpy as np

from passby.errors import ConfigError

__all__ = [
    "Tone",
    "Vehicle",
    "Interferer",
    "Scene",
    "speed_of_sound_iso",
    "harmonic_tones",
    "emission_time",
    "frame_count",
    "background_noise_rms",
    "vehicle_snr_db",
    "render",
    "render_blocks",
    "scale_to_peak",
    "received_frequency_numeric",
    "NOISE_KINDS",
    "INTERFERER_KINDS",
    "SAMPLE_RATE_RANGE",
]

#: ISO 9613-1:1993: reference speed of sound (m/s) at the reference
#: temperature (K), ideal-gas form c = 343.2 sqrt(T / 293.15 K).
_ISO_C_REF = 343.2
_ISO_T_REF_K = 293.15
#: Kelvin at 0 degrees Celsius (SI definition).
_ZERO_C_K = 273.15

#: Sample rates the simulator accepts, Hz (inclusive).
SAMPLE_RATE_RANGE = (8000, 192000)
#: Background noise spectra, see :class:`Scene`.
NOISE_KINDS = ("white", "pink", "road")
#: Kinds of stationary interferer, see :class:`Interferer`.
INTERFERER_KINDS = ("steady", "fan")

# Newton iteration of the retarded time: stop a sample once its step is
# below this (s); the next step would be ~1e-24 s (quadratic convergence).
_NEWTON_TOL_S = 1e-12
_NEWTON_MAX_ITER = 60

# Cubic B-spline random process for the pitch wander: mean of
# sum_j beta(x - j)^2 over x, i.e. the integral of beta^2 = 151/315 (exact),
# and the half-power point of its spectrum sinc(f h)^8 = 1/2 at f h = 0.22751
# (solved numerically).
_BSPLINE_SQ_MEAN = 151.0 / 315.0
_BSPLINE_HALF_POWER = 0.22751
# Knots drawn per random chunk of the wander process.
_KNOTS_PER_CHUNK = 1024

# Pink background noise is 1/f above this and flat below (Hz); the "road"
# spectrum is pink above this corner and falls as f^3 below it (Hz).
_PINK_FLOOR_HZ = 20.0
_ROAD_CORNER_HZ = 100.0

# Fan interferer: the frequency at standstill as a fraction of running.
_FAN_IDLE_FRACTION = 0.3

# Random stream identifiers (part of the seed of every random chunk).
_S_NOISE, _S_WANDER, _S_PHASE, _S_TYRE, _S_WOBBLE, _S_IPHASE = 1, 2, 3, 4, 5, 6
_CHUNK_OFFSET = 2**40  # keeps negative chunk indices non-negative for seeding


# --------------------------------------------------------------------------
# Scene description


def _finite(value, where, minimum=None, strict=False):
    try:
        x = float(value)
    except (TypeError, ValueError):
        raise ConfigError(f"must be a number, got {value!r}", where=where) from None
    if not math.isfinite(x):
        raise ConfigError(f"must be finite, got {value!r}", where=where)
    if minimum is not None and (x < minimum or (strict and x == minimum)):
        op = ">" if strict else ">="
        raise ConfigError(f"must be {op} {minimum:g}, got {x:g}", where=where)
    return x


def _window(on, off, where):
    for name, x in (("on_s", on), ("off_s", off)):
        if not isinstance(x, (int, float)) or math.isnan(x):
            raise ConfigError(f"must be a number, got {x!r}", where=f"{where}.{name}")
    if not on < off:
        raise ConfigError(f"on_s ({on:g}) must be before off_s ({off:g})", where=where)


@dataclass(frozen=True)
class Tone:
    """One steady tone of a source.

    Parameters
    ----------
    freq_hz : float
        Rest (emitted) frequency, Hz, > 0.
    amplitude : float
        Peak pressure amplitude at 1 m from the source (arbitrary pressure
        unit; the received direct-path amplitude at distance ``r`` is
        ``amplitude / r``). >= 0.

    Examples
    --------
    >>> Tone(440.0, 0.5)
    Tone(freq_hz=440.0, amplitude=0.5)
    """

    freq_hz: float
    amplitude: float = 1.0

    def __post_init__(self):
        _finite(self.freq_hz, "Tone.freq_hz", 0.0, strict=True)
        _finite(self.amplitude, "Tone.amplitude", 0.0)


@dataclass(frozen=True)
class Vehicle:
    """A source moving on a straight line at constant speed.

    Parameters
    ----------
    speed_mps : float
        Speed along the line, m/s, >= 0 and below the speed of sound.
    closest_m : float
        3-D distance of the direct path at closest approach, m; at least
        ``|source_height_m - mic_height_m|`` (the horizontal offset of the
        line is ``sqrt(closest_m**2 - (hs - hm)**2)``).
    pass_time_s : float
        Emission time ``t0`` of closest approach, s from the file start. The
        sound emitted then arrives ``closest_m / c`` later.
    tones : tuple of Tone
        The tones the source emits (a horn chord or engine harmonics, see
        :func:`harmonic_tones`); may be empty (tyre noise only).
    source_height_m : float
        Height of the source above the ground, m.
    wander_rms : float
        RMS of the slow relative pitch wander ``w`` common to all tones
        (0.003 is 0.3 %); 0 for steady pitch.
    wander_bandwidth_hz : float
        Half-power bandwidth of ``w``, Hz.
    on_s, off_s : float
        The tones sound from ``on_s`` to ``off_s`` in emission time, s from
        the file start (a horn blast); infinite for always.
    ramp_s : float
        Raised-cosine rise and fall inside ``[on_s, off_s]``, s.
    tyre_noise : float
        RMS at 1 m of broadband noise carried by the vehicle (tyre or wheel
        noise), spread by ``1/r`` like the tones; not gated by ``on_s`` /
        ``off_s``. 0 for none.
    tyre_cutoff_hz : float
        Corner of the tyre noise spectrum (flat below, falling as f^-4
        above: the power response of a 2nd-order Butterworth low-pass), Hz.

    Examples
    --------
    >>> car = Vehicle(13.9, 6.0, 12.0, harmonic_tones(41.7, [0.3, 1.0]))
    >>> [round(t.freq_hz, 1) for t in car.tones]
    [41.7, 83.4]
    """

    speed_mps: float
    closest_m: float
    pass_time_s: float
    tones: tuple[Tone, ...] = ()
    source_height_m: float = 0.5
    wander_rms: float = 0.0
    wander_bandwidth_hz: float = 0.5
    on_s: float = -math.inf
    off_s: float = math.inf
    ramp_s: float = 0.05
    tyre_noise: float = 0.0
    tyre_cutoff_hz: float = 2000.0

    def __post_init__(self):
        w = "Vehicle"
        _finite(self.speed_mps, f"{w}.speed_mps", 0.0)
        _finite(self.closest_m, f"{w}.closest_m", 0.0, strict=True)
        _finite(self.pass_time_s, f"{w}.pass_time_s")
        object.__setattr__(self, "tones", tuple(self.tones))
        for tone in self.tones:
            if not isinstance(tone, Tone):
                raise ConfigError(f"tones must be Tone objects, got {tone!r}", where=f"{w}.tones")
        _finite(self.source_height_m, f"{w}.source_height_m", 0.0)
        _finite(self.wander_rms, f"{w}.wander_rms", 0.0)
        if self.wander_rms > 0.1:
            raise ConfigError(f"must be <= 0.1, got {self.wander_rms:g}", where=f"{w}.wander_rms")
        _finite(self.wander_bandwidth_hz, f"{w}.wander_bandwidth_hz", 0.0, strict=True)
        _window(self.on_s, self.off_s, w)
        _finite(self.ramp_s, f"{w}.ramp_s", 0.0)
        _finite(self.tyre_noise, f"{w}.tyre_noise", 0.0)
        _finite(self.tyre_cutoff_hz, f"{w}.tyre_cutoff_hz", 0.0, strict=True)


@dataclass(frozen=True)
class Interferer:
    """A stationary tone near the microphone (transformer hum, fan).

    Parameters
    ----------
    freq_hz : float
        Running frequency, Hz.
    amplitude : float
        Peak amplitude received at the microphone (no propagation is
        modelled; same pressure unit as the vehicles' received tones).
    on_s, off_s : float
        Switch-on and switch-off times, s from the file start.
    kind : str
        ``"steady"``: raised-cosine ramps of ``ramp_s`` inside
        ``[on_s, off_s]``. ``"fan"``: spins up over ``spin_s`` from
        ``on_s`` (frequency from 0.3 to 1 of its running value, amplitude
        from 0 to 1, raised-cosine progress) and spins down over ``spin_s``
        from ``off_s`` (the reverse), silent after ``off_s + spin_s``.
    ramp_s : float
        Ramp of a steady interferer, s.
    spin_s : float
        Spin-up and spin-down time of a fan, s.
    wobble_rms, wobble_bandwidth_hz : float
        Optional slow random frequency wobble (relative RMS and half-power
        bandwidth), the same process as a vehicle's pitch wander.

    Examples
    --------
    >>> Interferer(100.0, 0.01).kind
    'steady'
    """

    freq_hz: float
    amplitude: float
    on_s: float = -math.inf
    off_s: float = math.inf
    kind: str = "steady"
    ramp_s: float = 0.05
    spin_s: float = 2.0
    wobble_rms: float = 0.0
    wobble_bandwidth_hz: float = 0.5

    def __post_init__(self):
        w = "Interferer"
        _finite(self.freq_hz, f"{w}.freq_hz", 0.0, strict=True)
        _finite(self.amplitude, f"{w}.amplitude", 0.0)
        _window(self.on_s, self.off_s, w)
        if self.kind not in INTERFERER_KINDS:
            raise ConfigError(f"must be one of {', '.join(INTERFERER_KINDS)}, got {self.kind!r}",
                              where=f"{w}.kind")
        _finite(self.ramp_s, f"{w}.ramp_s", 0.0)
        _finite(self.spin_s, f"{w}.spin_s", 0.0, strict=True)
        _finite(self.wobble_rms, f"{w}.wobble_rms", 0.0)
        if self.wobble_rms > 0.1:
            raise ConfigError(f"must be <= 0.1, got {self.wobble_rms:g}", where=f"{w}.wobble_rms")
        _finite(self.wobble_bandwidth_hz, f"{w}.wobble_bandwidth_hz", 0.0, strict=True)


@dataclass(frozen=True)
class Scene:
    """A whole recording: vehicles, interferers, noise, air, microphone.

    Parameters
    ----------
    vehicles : tuple of Vehicle
        The moving sources; they may overlap in time.
    duration_s : float
        Length of the recording, s (``round(duration_s * sample_rate)``
        frames).
    sample_rate : int
        Hz, 8000..192000.
    temperature_c : float
        Air temperature, degrees C; sets the speed of sound through
        :func:`speed_of_sound_iso`.
    mic_height_m : float
        Microphone height above the ground, m.
    ground_reflection : float
        Real pressure reflection coefficient of the ground (0 = no
        reflected path; 0.7 is a plausible value for hard-ish ground,
        common practice, no source). In [-1, 1].
    noise : str
        Background noise spectrum: ``"white"``; ``"pink"`` (power
        proportional to 1/f above 20 Hz, flat below); ``"road"`` (pink
        above 100 Hz, falling as f^3 below: power 1/f times
        ``(f/100)^4 / (1 + (f/100)^4)``; a model shape for tests and demos,
        not a measured traffic spectrum).
    snr_db : float or None
        Signal-to-noise ratio that sets the noise level (definition in
        Notes), relative to ``vehicles[0]``; None when ``noise_level`` is
        given or for no noise.
    noise_level : float or None
        Alternative to ``snr_db``: RMS of the background noise (same unit as
        the received pressure, before ``gain``).
    interferers : tuple of Interferer
        Stationary tones.
    seed : int
        Seed (>= 0) of every random stream: noise, wander, initial phases.
    gain : float
        Factor applied to the sum of everything (see :func:`scale_to_peak`).
    clip : bool
        Clip the scaled output to [-1, 1] (for a clipped-signal test case);
        otherwise values are returned as they are.

    Notes
    -----
    The SNR is defined as ``SNR_dB = 10 log10(P_tone / P_noise)``, where
    ``P_tone = sum_k(a_k**2 / 2) / d**2`` is the mean power of the received
    direct-path tones of the reference vehicle at closest approach (all its
    tones, amplitude ``a_k`` at 1 m, closest distance ``d``; as if its
    tones sound then; ground reflection, tyre noise and wander not counted)
    and ``P_noise`` is the variance of the added background noise over the
    whole band of the recording. The noise is scaled so that its expected
    (ensemble) variance equals ``P_tone / 10**(SNR_dB/10)``; the variance
    realised in one finite recording differs by the sampling fluctuation
    of a random signal (for 30 s of road noise at 16 kHz, about 1 %).
    Interferers and tyre noise are not part of the noise in this ratio.
    The gain changes neither.

    Examples
    --------
    >>> sc = Scene((), duration_s=0.5, sample_rate=8000, snr_db=None)
    >>> frame_count(sc)
    4000
    """

    vehicles: tuple[Vehicle, ...]
    duration_s: float
    sample_rate: int
    temperature_c: float = 20.0
    mic_height_m: float = 1.2
    ground_reflection: float = 0.0
    noise: str = "road"
    snr_db: float | None = 20.0
    noise_level: float | None = None
    interferers: tuple[Interferer, ...] = ()
    seed: int = 0
    gain: float = 1.0
    clip: bool = False

    def __post_init__(self):
        w = "Scene"
        object.__setattr__(self, "vehicles", tuple(self.vehicles))
        object.__setattr__(self, "interferers", tuple(self.interferers))
        for v in self.vehicles:
            if not isinstance(v, Vehicle):
                raise ConfigError(f"vehicles must be Vehicle objects, got {v!r}", where=f"{w}.vehicles")
        for i in self.interferers:
            if not isinstance(i, Interferer):
                raise ConfigError(f"interferers must be Interferer objects, got {i!r}",
                                  where=f"{w}.interferers")
        _finite(self.duration_s, f"{w}.duration_s", 0.0, strict=True)
        if isinstance(self.sample_rate, bool) or not isinstance(self.sample_rate, (int, np.integer)):
            raise ConfigError(f"must be an integer, got {self.sample_rate!r}", where=f"{w}.sample_rate")
        lo, hi = SAMPLE_RATE_RANGE
        if not lo <= self.sample_rate <= hi:
            raise ConfigError(f"must be in {lo}..{hi} Hz, got {self.sample_rate}", where=f"{w}.sample_rate")
        t = _finite(self.temperature_c, f"{w}.temperature_c")
        if not -60.0 <= t <= 60.0:
            raise ConfigError(f"must be in -60..60 C, got {t:g}", where=f"{w}.temperature_c")
        _finite(self.mic_height_m, f"{w}.mic_height_m", 0.0)
        g = _finite(self.ground_reflection, f"{w}.ground_reflection")
        if not -1.0 <= g <= 1.0:
            raise ConfigError(f"must be in [-1, 1], got {g:g}", where=f"{w}.ground_reflection")
        if self.noise not in NOISE_KINDS:
            raise ConfigError(f"must be one of {', '.join(NOISE_KINDS)}, got {self.noise!r}",
                              where=f"{w}.noise")
        if self.snr_db is not None and self.noise_level is not None:
            raise ConfigError("give snr_db or noise_level, not both", where=w)
        if self.snr_db is not None:
            _finite(self.snr_db, f"{w}.snr_db")
            if not self.vehicles or not self.vehicles[0].tones or \
                    sum(tone.amplitude for tone in self.vehicles[0].tones) == 0.0:
                raise ConfigError("snr_db needs a first vehicle with tones; use noise_level instead",
                                  where=f"{w}.snr_db")
        if self.noise_level is not None:
            _finite(self.noise_level, f"{w}.noise_level", 0.0)
        if isinstance(self.seed, bool) or not isinstance(self.seed, (int, np.integer)) or self.seed < 0:
            raise ConfigError(f"must be an integer >= 0, got {self.seed!r}", where=f"{w}.seed")
        _finite(self.gain, f"{w}.gain")
        c = speed_of_sound_iso(t)
        nyquist = self.sample_rate / 2.0
        for k, v in enumerate(self.vehicles):
            where = f"{w}.vehicles[{k}]"
            if v.speed_mps >= c:
                raise ConfigError(f"speed {v.speed_mps:g} m/s is not below the speed of sound "
                                  f"{c:.1f} m/s", where=where)
            if v.closest_m < abs(v.source_height_m - self.mic_height_m):
                raise ConfigError(f"closest_m {v.closest_m:g} m is less than the height difference "
                                  f"{abs(v.source_height_m - self.mic_height_m):g} m", where=where)
            for tone in v.tones:
                top = tone.freq_hz * (1.0 + 4.0 * v.wander_rms) / (1.0 - v.speed_mps / c)
                if top >= nyquist:
                    raise ConfigError(f"tone {tone.freq_hz:g} Hz reaches {top:.0f} Hz when approaching, "
                                      f"not below the Nyquist frequency {nyquist:g} Hz", where=where)
            if v.tyre_noise > 0 and v.tyre_cutoff_hz >= nyquist:
                raise ConfigError(f"tyre_cutoff_hz must be below {nyquist:g} Hz", where=where)
        for k, i in enumerate(self.interferers):
            if i.freq_hz * (1.0 + 4.0 * i.wobble_rms) >= nyquist:
                raise ConfigError(f"{i.freq_hz:g} Hz is not below the Nyquist frequency {nyquist:g} Hz",
                                  where=f"{w}.interferers[{k}]")
            if i.kind == "fan" and i.off_s - i.on_s < i.spin_s:
                raise ConfigError("a fan must run at least spin_s between on_s and off_s",
                                  where=f"{w}.interferers[{k}]")


# --------------------------------------------------------------------------
# Physics


def speed_of_sound_iso(temperature_c):
    """Speed of sound in air from temperature, ideal-gas form of ISO 9613-1.

    Kept inside the simulator on purpose, separate from the analysis.

    Parameters
    ----------
    temperature_c : float or array_like
        Air temperature, degrees C.

    Returns
    -------
    float or ndarray
        ``c = 343.2 * sqrt(T / 293.15 K)`` m/s with ``T = temperature_c +
        273.15``.

    References
    ----------
    .. [1] ISO 9613-1:1993, speed of sound in air, c = 343.2 (T/T0)^(1/2)
       m/s, T0 = 293.15 K.

    Examples
    --------
    >>> speed_of_sound_iso(20.0)
    343.2
    >>> round(speed_of_sound_iso(0.0), 2)
    331.29
    """
    t_k = np.asarray(temperature_c, dtype=float) + _ZERO_C_K
    c = _ISO_C_REF * np.sqrt(t_k / _ISO_T_REF_K)
    return float(c) if c.ndim == 0 else c


def harmonic_tones(f1_hz, amplitudes):
    """Tones at the harmonics of a fundamental (engine orders).

    Parameters
    ----------
    f1_hz : float
        Fundamental frequency, Hz.
    amplitudes : sequence of float
        Amplitude at 1 m of harmonic 1, 2, 3, ...; the fundamental may be
        weaker than a higher harmonic, and a 0 leaves a harmonic out.

    Returns
    -------
    tuple of Tone

    Examples
    --------
    >>> harmonic_tones(50.0, [0.2, 1.0, 0.0, 0.5])
    (Tone(freq_hz=50.0, amplitude=0.2), Tone(freq_hz=100.0, amplitude=1.0), Tone(freq_hz=200.0, amplitude=0.5))
    """
    f1 = _finite(f1_hz, "harmonic_tones.f1_hz", 0.0, strict=True)
    return tuple(Tone(f1 * (k + 1), float(a)) for k, a in enumerate(amplitudes) if a != 0)


def _solve_offset(s, speed, dist, c):
    """Emission offset ``u = tau - t0`` for reception offsets ``s = t - t0``.

    Newton iteration of ``g(u) = u + sqrt(v^2 u^2 + d^2)/c - s = 0``,
    vectorised, each sample stopped once its own step is below 1e-12 s (so
    the result of a sample never depends on its neighbours). ``g`` is
    increasing (``v < c``) and convex, so Newton converges monotonically from
    the start value ``u = s - r(s)/c``.
    """
    s = np.asarray(s, dtype=float)
    flat = s.ravel()
    v2 = speed * speed
    d2 = dist * dist
    u = flat - np.sqrt(v2 * flat * flat + d2) / c
    idx = np.arange(flat.size)
    for _ in range(_NEWTON_MAX_ITER):
        uu = u[idx]
        r = np.sqrt(v2 * uu * uu + d2)
        step = (uu + r / c - flat[idx]) / (1.0 + v2 * uu / (c * r))
        u[idx] = uu - step
        idx = idx[np.abs(step) >= _NEWTON_TOL_S]
        if idx.size == 0:
            break
    else:  # pragma: no cover - cannot happen for v < c
        raise RuntimeError("retarded-time iteration did not converge")
    return u.reshape(s.shape)


def emission_time(t, speed_mps, closest_m, pass_time_s, c):
    """Emission time of the sound heard at ``t``, by Newton iteration.

    Solves ``t = tau + r(tau)/c`` with ``r(tau) = sqrt((v (tau - t0))^2 +
    d^2)`` for every element of ``t`` (never by the closed form of the
    quadratic), to better than 1e-12 s.

    Parameters
    ----------
    t : array_like
        Reception times, s.
    speed_mps, closest_m, pass_time_s : float
        Speed ``v``, closest distance ``d`` and closest-approach emission
        time ``t0`` of the path.
    c : float
        Speed of sound, m/s (``v < c``).

    Returns
    -------
    ndarray
        Emission times ``tau``, s.

    Examples
    --------
    >>> tau = emission_time([0.0, 10.0], 20.0, 10.0, 0.0, 340.0)
    >>> r = np.hypot(20.0 * tau, 10.0)
    >>> bool(np.allclose(tau + r / 340.0, [0.0, 10.0], rtol=0, atol=1e-12))
    True
    """
    v = _finite(speed_mps, "speed_mps", 0.0)
    d = _finite(closest_m, "closest_m", 0.0, strict=True)
    t0 = _finite(pass_time_s, "pass_time_s")
    c = _finite(c, "c", 0.0, strict=True)
    if v >= c:
        raise ConfigError(f"speed {v:g} m/s is not below the speed of sound {c:g} m/s", where="speed_mps")
    t = np.asarray(t, dtype=float)
    return _solve_offset(t - t0, v, d, c) + t0


# --------------------------------------------------------------------------
# Random streams


def _rng(seed, stream, index, chunk=0):
    return np.random.default_rng(np.random.SeedSequence([seed, stream, index, chunk + _CHUNK_OFFSET]))


def _raised_cosine(p):
    """0 to 1 along ``p`` in [0, 1] (clipped), smooth at both ends."""
    return 0.5 - 0.5 * np.cos(np.pi * np.clip(p, 0.0, 1.0))


def _bspline_weights(phi):
    """Cubic B-spline [dB] and its running integral at ``phi + 1, phi,
    phi - 1, phi - 2`` for ``phi`` in [0, 1).

    ``beta`` is the centred cubic B-spline (support [-2, 2]):
    ``2/3 - x^2 + |x|^3/2`` for ``|x| <= 1`` and ``(2 - |x|)^3/6`` for
    ``1 <= |x| <= 2``; ``B(x)`` its integral from -2 (0 to 1). Returns
    ``(beta values, B values)``, each a list of four arrays, in the order
    of the knots ``J-1, J, J+1, J+2`` for ``u/h = J + phi``.
    """
    p = phi
    q = 1.0 - phi
    p2, q2 = p * p, q * q
    p3, q3 = p2 * p, q2 * q
    beta = [q3 / 6.0, 2.0 / 3.0 - p2 + 0.5 * p3, 2.0 / 3.0 - q2 + 0.5 * q3, p3 / 6.0]
    y = phi - 1.0  # in [-1, 0)
    y2 = y * y
    cdf = [1.0 - q2 * q2 / 24.0,
           0.5 + 2.0 * p / 3.0 - p3 / 3.0 + p2 * p2 / 8.0,
           0.5 + 2.0 * y / 3.0 - y2 * y / 3.0 - y2 * y2 / 8.0,
           p2 * p2 / 24.0]
    return beta, cdf


class _Wander:
    """Smooth random relative frequency deviation ``w(u)`` and its integral.

    ``w(u) = sum_j a_j beta(u/h - j)`` with independent normal knots
    ``a_j`` and the cubic B-spline ``beta``: a low-pass random process whose
    power spectrum is ``sinc(f h)^8`` (half power at ``f h = 0.2275``), of
    RMS ``sigma sqrt(151/315)`` on average over ``u``. Its integral
    ``W(u) = h [P(J-2) + sum_{j=J-1}^{J+2} a_j B(u/h - j)]`` (``B`` the
    B-spline's integral, ``P`` the running sum of the knots, ``J =
    floor(u/h)``) is exact and local, so any stretch of it can be evaluated
    without the others, up to one constant (absorbed in the random initial
    phase). Knots are drawn per chunk of 1024 from ``(seed, stream, index,
    chunk)``; chunk sums are added from knot 0 outwards in a fixed order.
    """

    def __init__(self, seed, stream, index, rms, bandwidth_hz):
        self.key = (seed, stream, index)
        self.h = _BSPLINE_HALF_POWER / bandwidth_hz
        self.sigma = rms / math.sqrt(_BSPLINE_SQ_MEAN)
        self._chunks = {}
        self._base = {0: 0.0}

    def _chunk(self, c):
        if c not in self._chunks:
            if len(self._chunks) > 8:
                self._chunks.clear()
            knots = self.sigma * _rng(*self.key, c).standard_normal(_KNOTS_PER_CHUNK)
            self._chunks[c] = (knots, np.cumsum(knots))
        return self._chunks[c]

    def _start(self, c):
        """Sum of all knots from 0 up to (not including) chunk ``c`` (signed)."""
        step = 1 if c > 0 else -1
        k = c
        while k not in self._base:  # nearest known start on the side of 0
            k -= step
        while k != c:
            if step > 0:
                self._base[k + 1] = self._base[k] + self._chunk(k)[1][-1]
            else:
                self._base[k - 1] = self._base[k] - self._chunk(k - 1)[1][-1]
            k += step
        return self._base[c]

    def _tables(self, j0, j1):
        """Knots and inclusive running sums for knot indices j0..j1."""
        k = _KNOTS_PER_CHUNK
        knots, sums = [], []
        for c in range(j0 // k, j1 // k + 1):
            a, cs = self._chunk(c)
            lo, hi = max(j0 - c * k, 0), min(j1 - c * k, k - 1) + 1
            knots.append(a[lo:hi])
            sums.append(self._start(c) + cs[lo:hi])
        return np.concatenate(knots), np.concatenate(sums)

    def integral(self, u):
        """``W(u)``, s (the integral of ``w``, up to a constant)."""
        x = np.asarray(u, dtype=float) / self.h
        j = np.floor(x).astype(np.int64)
        j0, j1 = int(j.min()) - 2, int(j.max()) + 2
        knots, sums = self._tables(j0, j1)
        _, cdf = _bspline_weights(x - j)
        i = j - j0
        out = sums[i - 2].copy()
        for m, w in zip((-1, 0, 1, 2), cdf):
            out += knots[i + m] * w
        return self.h * out

    def rate(self, u):
        """``w(u)``, the relative frequency deviation (dimensionless)."""
        x = np.asarray(u, dtype=float) / self.h
        j = np.floor(x).astype(np.int64)
        j0, j1 = int(j.min()) - 1, int(j.max()) + 2
        knots, _ = self._tables(j0, j1)
        beta, _ = _bspline_weights(x - j)
        i = j - j0
        out = np.zeros_like(x)
        for m, w in zip((-1, 0, 1, 2), beta):
            out += knots[i + m] * w
        return out


def _noise_fir(kind, sample_rate, length, cutoff_hz=None):
    """Unit-power linear-phase FIR shaping white noise to a spectrum.

    Frequency sampling of ``sqrt(S(f))`` (zero phase), centred and
    Hann-windowed [JOS], normalised to ``sum(h**2) = 1`` so that unit-variance
    white noise in gives unit expected variance out. ``None`` for white.
    """
    if kind == "white":
        return None
    f = np.fft.rfftfreq(length, 1.0 / sample_rate)
    with np.errstate(divide="ignore", invalid="ignore"):
        if kind == "pink":
            s = 1.0 / np.maximum(f, _PINK_FLOOR_HZ)
            s[0] = 0.0
        elif kind == "road":
            q = (f / _ROAD_CORNER_HZ) ** 4
            s = np.where(f > 0, q / (1.0 + q) / np.where(f > 0, f, 1.0), 0.0)
        elif kind == "tyre":
            s = 1.0 / (1.0 + (f / cutoff_hz) ** 4)
            s[0] = 0.0
        else:  # pragma: no cover - validated before
            raise ValueError(kind)
    h = np.roll(np.fft.irfft(np.sqrt(s), length), length // 2) * np.hanning(length)
    return h / math.sqrt(float(np.sum(h * h)))


class _ColoredStream:
    """Stationary Gaussian noise addressable by absolute sample index.

    White noise is drawn per aligned chunk of ``chunk`` samples from
    ``(seed, stream, index, chunk index)``; the coloured output of an aligned
    chunk is the valid part of its FFT convolution with the FIR over the
    white samples it needs, so each output sample has one value, however
    the stream is read. Reading is expected to move forward (small caches).
    """

    def __init__(self, seed, stream, index, fir, chunk):
        self.key = (seed, stream, index)
        self.fir = fir
        self.chunk = chunk
        self._white = {}
        self._colored = {}
        if fir is not None:
            self.nfft = 1 << int(math.ceil(math.log2(chunk + 2 * fir.size)))
            self.fir_spec = np.fft.rfft(fir, self.nfft)

    def _white_chunk(self, c):
        if c not in self._white:
            if len(self._white) > 4:
                for old in sorted(self._white)[:-2]:
                    del self._white[old]
            self._white[c] = _rng(*self.key, c).standard_normal(self.chunk)
        return self._white[c]

    def _white_segment(self, a, b):
        n = self.chunk
        parts = [self._white_chunk(c) for c in range(a // n, (b - 1) // n + 1)]
        x = np.concatenate(parts) if len(parts) > 1 else parts[0]
        off = a - (a // n) * n
        return x[off:off + (b - a)]

    def _colored_chunk(self, c):
        if c not in self._colored:
            if len(self._colored) > 4:
                for old in sorted(self._colored)[:-2]:
                    del self._colored[old]
            n, m = self.chunk, self.fir.size
            x = self._white_segment(c * n - m + 1, (c + 1) * n)
            y = np.fft.irfft(np.fft.rfft(x, self.nfft) * self.fir_spec, self.nfft)
            self._colored[c] = y[m - 1:m - 1 + n]
        return self._colored[c]

    def segment(self, a, b):
        """Samples ``a`` (inclusive) to ``b`` (exclusive)."""
        if self.fir is None:
            return self._white_segment(a, b)
        n = self.chunk
        parts = [self._colored_chunk(c) for c in range(a // n, (b - 1) // n + 1)]
        x = np.concatenate(parts) if len(parts) > 1 else parts[0]
        off = a - (a // n) * n
        return x[off:off + (b - a)]


# --------------------------------------------------------------------------
# Rendering


def frame_count(scene):
    """Number of frames of the recording, ``round(duration_s * sample_rate)``.

    Examples
    --------
    >>> frame_count(Scene((), 1.25, 8000, snr_db=None))
    10000
    """
    return max(1, int(round(scene.duration_s * scene.sample_rate)))


def _chunk_frames(sample_rate):
    """Internal chunk: the power of two at or above half a second of samples."""
    return 1 << int(math.ceil(math.log2(sample_rate / 2.0)))


def _tone_power(vehicle):
    return sum(t.amplitude ** 2 / 2.0 for t in vehicle.tones) / vehicle.closest_m ** 2


def background_noise_rms(scene):
    """RMS (expected standard deviation) of the background noise, before gain.

    Parameters
    ----------
    scene : Scene

    Returns
    -------
    float
        ``noise_level``, or ``sqrt(P_tone / 10**(snr_db/10))`` of
        ``vehicles[0]`` (see :class:`Scene`), or 0 for no noise.

    Examples
    --------
    >>> car = Vehicle(20.0, 10.0, 5.0, (Tone(500.0, 1.0),))
    >>> round(background_noise_rms(Scene((car,), 10.0, 8000, snr_db=20.0)), 6)
    0.007071
    """
    if scene.noise_level is not None:
        return float(scene.noise_level)
    if scene.snr_db is None:
        return 0.0
    return math.sqrt(_tone_power(scene.vehicles[0]) / 10.0 ** (scene.snr_db / 10.0))


def vehicle_snr_db(scene, index):
    """SNR of ``vehicles[index]`` against the scene's background noise.

    Same definition as in :class:`Scene`, with this vehicle's tones.

    Returns
    -------
    float
        dB; ``inf`` without noise, ``-inf`` for a vehicle without tones.

    Examples
    --------
    >>> a = Vehicle(20.0, 10.0, 5.0, (Tone(500.0, 1.0),))
    >>> b = Vehicle(20.0, 20.0, 9.0, (Tone(700.0, 1.0),))
    >>> sc = Scene((a, b), 12.0, 8000, snr_db=15.0)
    >>> round(vehicle_snr_db(sc, 0), 3), round(vehicle_snr_db(sc, 1), 3)
    (15.0, 8.979)
    """
    p_noise = background_noise_rms(scene) ** 2
    p_tone = _tone_power(scene.vehicles[index])
    if p_noise == 0.0:
        return math.inf
    if p_tone == 0.0:
        return -math.inf
    return 10.0 * math.log10(p_tone / p_noise)


class _VehiclePlan:
    def __init__(self, scene, k, c, chunk):
        v = scene.vehicles[k]
        self.v = v
        self.speed = float(v.speed_mps)
        self.t0 = float(v.pass_time_s)
        hs, hm = float(v.source_height_m), float(scene.mic_height_m)
        d = float(v.closest_m)
        self.paths = [(d, 1.0)]
        if scene.ground_reflection != 0.0:
            self.paths.append((math.sqrt(d * d + 4.0 * hs * hm), float(scene.ground_reflection)))
        self.freqs = np.array([t.freq_hz for t in v.tones])
        self.amps = np.array([t.amplitude for t in v.tones])
        self.phases = _rng(scene.seed, _S_PHASE, k).uniform(0.0, 2.0 * np.pi, len(v.tones))
        self.wander = (_Wander(scene.seed, _S_WANDER, k, v.wander_rms, v.wander_bandwidth_hz)
                       if v.wander_rms > 0 else None)
        self.tyre = None
        if v.tyre_noise > 0:
            fir = _noise_fir("tyre", scene.sample_rate, chunk // 2, v.tyre_cutoff_hz)
            self.tyre = _ColoredStream(scene.seed, _S_TYRE, k, fir, chunk)
        # Reception window of the tones (for skipping silent chunks).
        far = max(dist for dist, _ in self.paths)
        self.t_first = (v.on_s + math.hypot(v.speed_mps * (v.on_s - self.t0), d) / c
                        if math.isfinite(v.on_s) else -math.inf)
        self.t_last = (v.off_s + math.hypot(v.speed_mps * (v.off_s - self.t0), far) / c
                       if math.isfinite(v.off_s) else math.inf)
        self.c = c

    def phase_cycles(self, u):
        """Common phase argument ``u + W(u)``, s."""
        return u if self.wander is None else u + self.wander.integral(u)

    def add(self, out, t, sample_rate):
        v = self.v
        tones_on = (len(v.tones) > 0 and t[-1] >= self.t_first and t[0] <= self.t_last
                    and float(self.amps.sum()) > 0)
        if not tones_on and self.tyre is None:
            return
        s = t - self.t0
        solved = []
        for dist, coef in self.paths:
            u = _solve_offset(s, self.speed, dist, self.c)
            solved.append((u, np.sqrt((self.speed * u) ** 2 + dist * dist), coef))
        if self.tyre is not None:
            lo = min(float(u.min()) for u, _, _ in solved) + self.t0
            hi = max(float(u.max()) for u, _, _ in solved) + self.t0
            k0 = int(math.floor(lo * sample_rate)) - 1
            k1 = int(math.floor(hi * sample_rate)) + 3
            seg = v.tyre_noise * self.tyre.segment(k0, k1)
        for u, r, coef in solved:
            sig = np.zeros_like(t)
            if tones_on:
                tau = u + self.t0
                env = _raised_cosine((tau - v.on_s) / v.ramp_s) * _raised_cosine((v.off_s - tau) / v.ramp_s) \
                    if v.ramp_s > 0 else ((tau >= v.on_s) & (tau < v.off_s)).astype(float)
                if np.any(env > 0):
                    base = self.phase_cycles(u)
                    for f, a, ph in zip(self.freqs, self.amps, self.phases):
                        cyc = f * base
                        cyc -= np.floor(cyc)
                        sig += a * np.cos(2.0 * np.pi * cyc + ph)
                    sig *= env
            if self.tyre is not None:
                # 4-point Lagrange (cubic) interpolation on the emission grid.
                kf = (u + self.t0) * sample_rate
                ki = np.floor(kf)
                x = kf - ki
                i = ki.astype(np.int64) - k0
                sig += (-x * (x - 1.0) * (x - 2.0) / 6.0 * seg[i - 1]
                        + (x + 1.0) * (x - 1.0) * (x - 2.0) / 2.0 * seg[i]
                        - (x + 1.0) * x * (x - 2.0) / 2.0 * seg[i + 1]
                        + (x + 1.0) * x * (x - 1.0) / 6.0 * seg[i + 2])
            out += coef * sig / r


class _InterfererPlan:
    def __init__(self, scene, k):
        i = scene.interferers[k]
        self.i = i
        self.phase = float(_rng(scene.seed, _S_IPHASE, k).uniform(0.0, 2.0 * np.pi))
        self.wobble = (_Wander(scene.seed, _S_WOBBLE, k, i.wobble_rms, i.wobble_bandwidth_hz)
                       if i.wobble_rms > 0 else None)

    def add(self, out, t):
        i = self.i
        if i.kind == "steady":
            if t[-1] < i.on_s or t[0] > i.off_s:
                return
            amp = (_raised_cosine((t - i.on_s) / i.ramp_s) * _raised_cosine((i.off_s - t) / i.ramp_s)
                   if i.ramp_s > 0 else ((t >= i.on_s) & (t < i.off_s)).astype(float))
            arg = t.copy()
        else:
            if t[-1] < i.on_s or t[0] > i.off_s + i.spin_s:
                return
            # Progress p of spin-up (from on_s) and spin-down (from off_s);
            # frequency factor 1 - (1 - 0.3)[(1 - p_up) + (1 - p_down)],
            # integrated in closed form; amplitude p_up * p_down.
            x_up = np.clip((t - i.on_s) / i.spin_s, 0.0, 1.0)
            x_dn = np.clip((t - i.off_s) / i.spin_s, 0.0, 1.0)
            p_up = _raised_cosine(x_up)
            p_dn = 1.0 - _raised_cosine(x_dn)
            amp = p_up * p_dn
            deficit = i.spin_s * ((x_up / 2.0 + np.sin(np.pi * x_up) / (2.0 * np.pi))
                                  + (x_dn / 2.0 - np.sin(np.pi * x_dn) / (2.0 * np.pi)))
            arg = t - (1.0 - _FAN_IDLE_FRACTION) * deficit
        if self.wobble is not None:
            arg = arg + self.wobble.integral(t)
        cyc = i.freq_hz * arg
        cyc -= np.floor(cyc)
        out += i.amplitude * amp * np.cos(2.0 * np.pi * cyc + self.phase)


def _chunks(scene):
    """Yield the output in internal chunks aligned to the sample index."""
    fs = scene.sample_rate
    c = speed_of_sound_iso(scene.temperature_c)
    chunk = _chunk_frames(fs)
    vehicles = [_VehiclePlan(scene, k, c, chunk) for k in range(len(scene.vehicles))]
    interferers = [_InterfererPlan(scene, k) for k in range(len(scene.interferers))]
    noise_rms = background_noise_rms(scene)
    noise = (_ColoredStream(scene.seed, _S_NOISE, 0, _noise_fir(scene.noise, fs, chunk // 2), chunk)
             if noise_rms > 0 else None)
    total = frame_count(scene)
    for n0 in range(0, total, chunk):
        n1 = min(n0 + chunk, total)
        t = np.arange(n0, n1, dtype=float) / fs
        out = np.zeros(n1 - n0)
        for vp in vehicles:
            vp.add(out, t, fs)
        for ip in interferers:
            ip.add(out, t)
        if noise is not None:
            out += noise_rms * noise.segment(n0, n1)
        out *= scene.gain
        if scene.clip:
            np.clip(out, -1.0, 1.0, out=out)
        yield out


def render_blocks(scene, block_frames=4096) -> Iterator[np.ndarray]:
    """Render a scene block by block, in memory independent of its length.

    Parameters
    ----------
    scene : Scene
    block_frames : int
        Frames per yielded block (the last one may be shorter).

    Yields
    ------
    ndarray
        float64 mono blocks; concatenated they equal :func:`render` exactly.

    Raises
    ------
    ConfigError
        ``block_frames`` < 1.

    Examples
    --------
    >>> sc = Scene((Vehicle(20.0, 10.0, 1.0, (Tone(500.0),)),), 1.0, 8000, seed=3)
    >>> blocks = list(render_blocks(sc, 3000))
    >>> [b.size for b in blocks]
    [3000, 3000, 2000]
    >>> bool(np.array_equal(np.concatenate(blocks), render(sc)))
    True
    """
    if isinstance(block_frames, bool) or not isinstance(block_frames, (int, np.integer)) or block_frames < 1:
        raise ConfigError(f"must be an integer >= 1, got {block_frames!r}", where="block_frames")
    return _reblock(_chunks(scene), int(block_frames))


def _reblock(chunks, size):
    pending = np.zeros(0)
    for x in chunks:
        pending = np.concatenate((pending, x)) if pending.size else x
        start = 0
        while pending.size - start >= size:
            yield pending[start:start + size].copy()
            start += size
        pending = pending[start:]
    if pending.size:
        yield pending.copy()


def render(scene):
    """Render a whole scene.

    Parameters
    ----------
    scene : Scene

    Returns
    -------
    ndarray
        float64 mono samples, ``frame_count(scene)`` of them.

    Examples
    --------
    >>> horn = Vehicle(30.0, 15.0, 2.0, (Tone(311.0), Tone(370.0), Tone(470.0)))
    >>> x = render(Scene((horn,), 4.0, 8000, snr_db=None))
    >>> x.shape, x.dtype.name
    ((32000,), 'float64')
    """
    parts = list(_chunks(scene))
    return np.concatenate(parts) if len(parts) > 1 else parts[0]


def scale_to_peak(scene, peak):
    """The scene with the gain that makes its largest absolute sample ``peak``.

    Renders the scene once, block by block, with unit gain and no clipping.

    Parameters
    ----------
    scene : Scene
    peak : float
        Wanted peak, > 0.

    Returns
    -------
    Scene
        A copy with ``gain`` set (``clip`` kept).

    Raises
    ------
    ConfigError
        ``peak`` not positive, or a scene that is silent.

    Examples
    --------
    >>> sc = scale_to_peak(Scene((Vehicle(20.0, 10.0, 1.0, (Tone(500.0),)),), 2.0, 8000), 0.5)
    >>> round(float(np.max(np.abs(render(sc)))), 12)
    0.5
    """
    peak = _finite(peak, "peak", 0.0, strict=True)
    unit = replace(scene, gain=1.0, clip=False)
    top = max(float(np.max(np.abs(x))) for x in _chunks(unit))
    if top == 0.0:
        raise ConfigError("the scene is silent; nothing to scale", where="peak")
    return replace(scene, gain=peak / top)


def received_frequency_numeric(scene, index, t, tone=0, step_s=1e-3):
    """Frequency heard on the direct path, by differentiating the phase.

    The phase of tone ``tone`` of ``vehicles[index]`` reaching the
    microphone at ``t`` is ``2 pi f_k (u + W(u))`` with ``u = tau(t) - t0``
    from the Newton retarded time (pitch wander included); its derivative is
    taken by a central difference over ``t +- step_s``. No closed-form
    Doppler formula is used: this is the truth the analysis is compared with.

    Parameters
    ----------
    scene : Scene
    index : int
        Vehicle index.
    t : array_like
        Reception times, s.
    tone : int
        Tone index in the vehicle's ``tones``.
    step_s : float
        Half-width of the central difference, s (truncation error of order
        ``step_s**2``; the default gives < 1e-6 relative for road vehicles).

    Returns
    -------
    ndarray
        Instantaneous received frequency, Hz.

    Examples
    --------
    >>> car = Vehicle(0.0, 10.0, 0.0, (Tone(500.0),))
    >>> sc = Scene((car,), 1.0, 8000, snr_db=None)
    >>> np.round(received_frequency_numeric(sc, 0, [0.1, 0.5]), 6).tolist()
    [500.0, 500.0]
    """
    v = scene.vehicles[index]
    f = v.tones[tone].freq_hz
    plan = _VehiclePlan(scene, index, speed_of_sound_iso(scene.temperature_c), _chunk_frames(scene.sample_rate))
    t = np.asarray(t, dtype=float)
    h = _finite(step_s, "step_s", 0.0, strict=True)
    d = v.closest_m
    hi = plan.phase_cycles(_solve_offset(t + h - plan.t0, plan.speed, d, plan.c))
    lo = plan.phase_cycles(_solve_offset(t - h - plan.t0, plan.speed, d, plan.c))
    return f * (hi - lo) / (2.0 * h)
