"""Spot speed study: the statistics a traffic engineer reports.

Pure functions on numpy arrays and small frozen dataclasses. Speeds are in
m/s inside (conversions by :mod:`passby.units`); the trade defines two things in its reporting unit, and those
take the unit explicitly: the *pace* (a 10 km/h or 10 mph band) and the
default permitted error of the sample size. Everything else is the same
whatever unit the report is printed in.

Definitions
-----------
* Percentiles (15th, 50th, 85th): linear interpolation between the order
  statistics ``x[0] <= ... <= x[n-1]``: with ``h = (n - 1) p`` and
  ``j = floor(h)``, ``Q(p) = x[j] + (h - j) (x[j+1] - x[j])`` (Hyndman and
  Fan's type 7 [HF]_, numpy's default method ``"linear"``).
* Sample standard deviation: ``ddof = 1``.
* Pace: the band ``[a, a + 10)`` (in the report unit) holding the most
  vehicles. The start ``a`` is searched continuously: the best band can
  always be moved up until it starts at an observed speed, so every
  observed speed is tried; among bands holding equally many, the one
  starting lowest.
* Over the limit: strictly greater than the posted limit.
* Per hour: UTC clock hours from the first to the last event, hours with
  no vehicle included.
* Minimum sample size: ``N = S^2 z^2 (2 + U^2) / (2 E^2)``, rounded up.

References
----------
.. [ITE] Institute of Transportation Engineers, *Manual of Transportation
   Engineering Studies*, chapter "Spot Speed Studies" (sample size formula
   with U = 1.04 for the 85th percentile and z = 1.96 for 95 % confidence).
.. [CTRE] Center for Transportation Research and Education, Iowa State
   University, *Handbook of Simplified Practice for Traffic Studies* (2002):
   at least 50, preferably 100 vehicles in a spot speed study.
.. [HF] R. J. Hyndman and Y. Fan, "Sample quantiles in statistical
   packages", The American Statistician 50(4), 361-365 (1996), type 7.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from passby.errors import InputError
from passby.units import from_unit, to_unit

#: The units a study can be reported in (the pace is 10 of them).
STUDY_UNITS = ("kmh", "mph")

#: Width of the pace band, in the report unit (10 km/h or 10 mph) [ITE]_.
PACE_WIDTH = 10.0

#: z for 95 % confidence and U for the 85th percentile [ITE]_.
Z_95 = 1.96
U_85 = 1.04

#: Default permitted error E of the mean speed for the sample size, m/s:
#: +-2 km/h or +-1.5 mph (common practice, no source).
DEFAULT_PERMITTED_ERROR_MPS = {"kmh": from_unit(2.0, "kmh"), "mph": from_unit(1.5, "mph")}

#: Rule of thumb for a spot speed study: at least 50, preferably 100
#: vehicles [CTRE]_.
RULE_OF_THUMB_MIN = 50
RULE_OF_THUMB_PREFERRED = 100


def _unit(unit):
    if unit not in STUDY_UNITS:
        raise InputError(f"unknown speed unit {unit!r} (use 'kmh' or 'mph')")
    return unit


def _speeds(speeds_mps):
    v = np.asarray(speeds_mps, dtype=float).ravel()
    if not np.all(np.isfinite(v)):
        raise InputError("speeds must be finite numbers (leave rejected events out)")
    if np.any(v < 0):
        raise InputError("speeds must not be negative")
    return v


@dataclass(frozen=True)
class Pace:
    """The 10-unit band holding the most vehicles (in the report unit).

    Attributes
    ----------
    unit : str
        ``"kmh"`` or ``"mph"``: the unit ``low`` and ``high`` are in.
    low, high : float
        The band ``[low, high)``, ``high = low + 10``.
    count : int
        Vehicles in the band.
    share : float
        ``count`` over all vehicles, 0..1.
    """

    unit: str
    low: float
    high: float
    count: int
    share: float


def pace(speeds_mps, unit="kmh", width=PACE_WIDTH):
    """The pace: the band ``[a, a + width)`` in ``unit`` holding the most vehicles.

    Parameters
    ----------
    speeds_mps : array_like
        Speeds, m/s.
    unit : {"kmh", "mph"}
        The unit the band is defined in.
    width : float
        Band width in ``unit`` (10, [ITE]_).

    Returns
    -------
    Pace or None
        None for no speeds.

    Notes
    -----
    Every observed speed is tried as the band start (see the module
    notes); ties go to the lowest start.

    Examples
    --------
    >>> v = from_unit(np.array([41.0, 47.5, 49.9, 50.0, 52.0, 58.0, 75.0]), "kmh")
    >>> p = pace(v, "kmh")
    >>> round(p.low, 6), round(p.high, 6), p.count, round(p.share, 3)
    (41.0, 51.0, 4, 0.571)
    """
    # Rounded to 1e-9 unit so that a speed given as 60 km/h and converted
    # to m/s and back still lies outside [50, 60).
    s = np.sort(np.round(to_unit(_speeds(speeds_mps), _unit(unit)), 9))
    if s.size == 0:
        return None
    width = float(width)
    if not (math.isfinite(width) and width > 0):
        raise InputError(f"pace width must be positive, not {width!r}")
    first = np.searchsorted(s, s, side="left")
    counts = np.searchsorted(s, s + width, side="left") - first
    i = int(np.argmax(counts))  # the first maximum: the lowest start
    return Pace(unit=unit, low=float(s[i]), high=float(s[i] + width),
                count=int(counts[i]), share=float(counts[i] / s.size))


def required_sample_size(std, permitted_error, z=Z_95, u=U_85):
    """Sample size for a spot speed study, before rounding.

    ``N = S^2 z^2 (2 + U^2) / (2 E^2)``

    Parameters
    ----------
    std : float
        Estimated standard deviation of the speeds, S.
    permitted_error : float
        Permitted error of the mean, E, in the same unit as S.
    z : float
        Standard normal deviate for the confidence (1.96: 95 %).
    u : float
        Constant for the percentile estimated (1.04: 85th percentile).

    Returns
    -------
    float

    References
    ----------
    [ITE]_, spot speed studies, sample size.

    Examples
    --------
    >>> round(required_sample_size(6.7, 3.0), 2)
    29.52
    """
    std, err = float(std), float(permitted_error)
    if not (math.isfinite(err) and err > 0):
        raise InputError(f"permitted error must be positive, not {permitted_error!r}")
    if not (math.isfinite(std) and std >= 0):
        raise InputError(f"standard deviation must be a number >= 0, not {std!r}")
    return std * std * z * z * (2.0 + u * u) / (2.0 * err * err)


def min_sample_size(std, permitted_error, z=Z_95, u=U_85):
    """Minimum sample size for a spot speed study: :func:`required_sample_size` rounded up.

    Examples
    --------
    >>> min_sample_size(6.7, 3.0)  # S = 6.7 mph, E = 3.0 mph
    30
    """
    n = required_sample_size(std, permitted_error, z, u)
    return max(1, int(math.ceil(n - 1e-9)))


@dataclass(frozen=True)
class HourCount:
    """Vehicles in one UTC clock hour.

    Attributes
    ----------
    hour_utc : str
        Start of the hour, ISO 8601 UTC (``2031-05-04T07:00:00.000Z``).
    count : int
        Vehicles with a speed (in the statistics).
    rejected : int
        Events without a usable speed.
    """

    hour_utc: str
    count: int
    rejected: int = 0


def counts_per_hour(times_utc, rejected_times_utc=()):
    """Counts per UTC clock hour, every hour from the first to the last event.

    Parameters
    ----------
    times_utc : sequence of str
        ISO 8601 times of the vehicles in the statistics.
    rejected_times_utc : sequence of str
        ISO 8601 times of the rejected events.

    Returns
    -------
    tuple of HourCount

    Examples
    --------
    >>> h = counts_per_hour(["2031-05-04T07:59:59Z", "2031-05-04T09:00:00Z"])
    >>> [(c.hour_utc[11:16], c.count) for c in h]
    [('07:00', 1), ('08:00', 0), ('09:00', 1)]
    """
    from passby.store import parse_utc, utc_iso

    def hours(times):
        return [int(math.floor(parse_utc(t) / 3600.0)) for t in times]

    good, bad = hours(times_utc), hours(rejected_times_utc)
    if not good and not bad:
        return ()
    first, last = min(good + bad), max(good + bad)
    n = last - first + 1
    count = np.bincount(np.asarray(good, dtype=np.int64) - first, minlength=n)
    rejected = np.bincount(np.asarray(bad, dtype=np.int64) - first, minlength=n)
    return tuple(HourCount(utc_iso((first + k) * 3600.0), int(count[k]), int(rejected[k]))
                 for k in range(n))


@dataclass(frozen=True)
class SpeedStudy:
    """Results of a spot speed study (speeds in m/s; the pace in ``unit``).

    Attributes
    ----------
    unit : str
        The report unit the pace and the default permitted error are in.
    count : int
        Vehicles with a speed.
    rejected_count : int
        Events without a usable speed (not in the statistics).
    mean_mps, std_mps : float
        Mean and sample standard deviation (ddof = 1; NaN below 2 speeds).
    min_mps, max_mps : float
    p15_mps, p50_mps, p85_mps : float
        15th, 50th (median) and 85th percentile speeds (type 7, see the
        module notes). NaN for no speeds.
    pace : Pace or None
    posted_limit_mps : float or None
    over_limit_count : int or None
        Vehicles strictly faster than the posted limit.
    over_limit_share : float or None
        Their share of ``count`` (None without a limit or without speeds).
    permitted_error_mps : float
        E of the sample size.
    min_sample_size : int or None
        From the sample's own standard deviation (None below 2 speeds).
    per_hour : tuple of HourCount
    """

    unit: str
    count: int
    rejected_count: int
    mean_mps: float
    std_mps: float
    min_mps: float
    max_mps: float
    p15_mps: float
    p50_mps: float
    p85_mps: float
    pace: Pace | None
    posted_limit_mps: float | None
    over_limit_count: int | None
    over_limit_share: float | None
    permitted_error_mps: float
    min_sample_size: int | None
    per_hour: tuple = ()

    @property
    def sample_needed(self) -> int:
        """Vehicles the study should have: the larger of N and the rule of thumb (50)."""
        return max(self.min_sample_size or 0, RULE_OF_THUMB_MIN)

    @property
    def sample_adequate(self) -> bool:
        """Whether ``count`` reaches :attr:`sample_needed`."""
        return self.min_sample_size is not None and self.count >= self.sample_needed


def speed_study(speeds_mps, *, unit="kmh", posted_limit_mps=None, permitted_error_mps=None,
                rejected_count=0, times_utc=None, rejected_times_utc=()):
    """Spot speed statistics of a sample of speeds.

    Parameters
    ----------
    speeds_mps : array_like
        Speeds of the vehicles in the study, m/s (finite; leave rejected
        events out and count them in ``rejected_count``).
    unit : {"kmh", "mph"}
        Report unit: sets the pace band (10 units) and the default
        permitted error.
    posted_limit_mps : float, optional
        Posted speed limit, m/s.
    permitted_error_mps : float, optional
        Permitted error E of the sample size, m/s (default
        :data:`DEFAULT_PERMITTED_ERROR_MPS` of the unit).
    rejected_count : int
        Events without a usable speed.
    times_utc : sequence of str, optional
        ISO 8601 UTC time of each speed, for the counts per hour.
    rejected_times_utc : sequence of str
        Times of the rejected events, for the counts per hour.

    Returns
    -------
    SpeedStudy

    Examples
    --------
    >>> v = from_unit(np.array([48, 52, 55, 47, 61, 50, 53, 45, 58, 51]), "kmh")
    >>> s = speed_study(v, posted_limit_mps=from_unit(50, "kmh"), rejected_count=2)
    >>> round(to_unit(s.p85_mps, "kmh"), 2), s.over_limit_count, s.count
    (56.95, 6, 10)
    """
    unit = _unit(unit)
    v = _speeds(speeds_mps)
    n = int(v.size)
    nan = float("nan")
    if permitted_error_mps is None:
        permitted_error_mps = DEFAULT_PERMITTED_ERROR_MPS[unit]
    permitted_error_mps = float(permitted_error_mps)
    if not (math.isfinite(permitted_error_mps) and permitted_error_mps > 0):
        raise InputError(f"permitted error must be positive, not {permitted_error_mps!r}")
    if times_utc is not None and len(times_utc) != n:
        raise InputError(f"{len(times_utc)} times for {n} speeds")
    if n:
        # Hyndman & Fan type 7 = numpy's "linear" method [HF]_.
        p15, p50, p85 = (float(q) for q in np.percentile(v, [15, 50, 85], method="linear"))
        mean, vmin, vmax = float(np.mean(v)), float(np.min(v)), float(np.max(v))
    else:
        p15 = p50 = p85 = mean = vmin = vmax = nan
    std = float(np.std(v, ddof=1)) if n >= 2 else nan
    over_count = over_share = None
    if posted_limit_mps is not None:
        limit = float(posted_limit_mps)
        if not (math.isfinite(limit) and limit > 0):
            raise InputError(f"posted limit must be positive, not {posted_limit_mps!r}")
        posted_limit_mps = limit
        over_count = int(np.count_nonzero(v > limit))
        over_share = over_count / n if n else None
    per_hour = counts_per_hour(times_utc or (), rejected_times_utc) if (
        times_utc is not None or rejected_times_utc) else ()
    return SpeedStudy(
        unit=unit, count=n, rejected_count=int(rejected_count),
        mean_mps=mean, std_mps=std, min_mps=vmin, max_mps=vmax,
        p15_mps=p15, p50_mps=p50, p85_mps=p85,
        pace=pace(v, unit),
        posted_limit_mps=posted_limit_mps,
        over_limit_count=over_count, over_limit_share=over_share,
        permitted_error_mps=permitted_error_mps,
        min_sample_size=min_sample_size(std, permitted_error_mps) if n >= 2 else None,
        per_hour=per_hour,
    )


def is_accepted(event) -> bool:
    """Whether a :class:`~passby.events.PassEvent` has a usable speed.

    Accepted: quality ``"good"`` or ``"fair"`` and a finite speed.
    """
    return event.quality != "rejected" and math.isfinite(event.speed_mps)


def study_from_log(logged_events, **kwargs):
    """:func:`speed_study` of logged events (:class:`passby.store.LoggedEvent`).

    Accepted events (:func:`is_accepted`) enter the statistics; the others
    are counted in ``rejected_count``; both enter the counts per hour.
    Keyword arguments go to :func:`speed_study`.

    Returns
    -------
    (SpeedStudy, ndarray)
        The study and the accepted speeds, m/s, in log order.
    """
    good = [e for e in logged_events if is_accepted(e.event)]
    bad = [e for e in logged_events if not is_accepted(e.event)]
    speeds = np.array([e.event.speed_mps for e in good], dtype=float)
    study = speed_study(speeds, rejected_count=len(bad),
                        times_utc=[e.time_utc for e in good],
                        rejected_times_utc=[e.time_utc for e in bad], **kwargs)
    return study, speeds


@dataclass(frozen=True)
class ToneCheck:
    """Tones and level of one event against the bands the user gave.

    Attributes
    ----------
    tones_hz : tuple of float
        Rest frequency of every tone.
    tones_outside : tuple of float
        The tones outside the tone band (empty without a band).
    laf_max_db : float or None
        LAFmax as measured at the microphone.
    level_calibrated : bool
        False: ``laf_max_db`` is dB re full scale (plus an assumed offset)
        and only comparable with itself.
    reference_distance_m : float or None
    level_at_reference_db : float or None
        LAFmax moved by spherical spreading from the fitted closest
        distance to the reference distance (None when either is missing).
    level_checked_db : float or None
        The level compared with the level band: the one at the reference
        distance when a reference distance is given, else LAFmax.
    level_outside : bool or None
        Whether it lies outside the level band (None: no band or no level).
    """

    tones_hz: tuple
    tones_outside: tuple
    laf_max_db: float | None
    level_calibrated: bool
    reference_distance_m: float | None
    level_at_reference_db: float | None
    level_checked_db: float | None
    level_outside: bool | None

    @property
    def flagged(self) -> bool:
        """Whether a tone or the level lies outside its band."""
        return bool(self.tones_outside) or bool(self.level_outside)


def _band(band, what):
    if band is None:
        return None
    lo, hi = (float(b) for b in band)
    if not (math.isfinite(lo) and math.isfinite(hi) and lo < hi):
        raise InputError(f"{what} must be LO:HI with LO < HI, not {band!r}")
    return lo, hi


def check_tones(event, *, tone_band_hz=None, level_band_db=None, reference_distance_m=None):
    """Check the tones and the level of a pass-by against bands.

    Parameters
    ----------
    event : PassEvent
    tone_band_hz : (float, float), optional
        Accepted rest frequencies, Hz, inclusive.
    level_band_db : (float, float), optional
        Accepted level, dB, inclusive (see ``level_checked_db``).
    reference_distance_m : float, optional
        Distance to report the level at (spherical spreading,
        :func:`passby.level.level_at_distance`).

    Returns
    -------
    ToneCheck

    Examples
    --------
    >>> from passby.events import PassEvent
    >>> e = PassEvent(pass_time_s=3.0, speed_mps=25.0, speed_std_mps=0.3,
    ...               tones_hz=(311.0, 370.0), closest_approach_m=10.0,
    ...               closest_approach_std_m=0.5, speed_of_sound_mps=343.2,
    ...               temperature_c=20.0, quality="good", laf_max_db=100.0,
    ...               level_calibrated=True)
    >>> c = check_tones(e, tone_band_hz=(300, 360), level_band_db=(96, 110),
    ...                 reference_distance_m=20.0)
    >>> c.tones_outside, round(c.level_at_reference_db, 2), c.level_outside
    ((370.0,), 93.98, True)
    """
    tone_band = _band(tone_band_hz, "tone band")
    level_band = _band(level_band_db, "level band")
    tones = tuple(float(f) for f in event.tones_hz)
    outside = () if tone_band is None else tuple(
        f for f in tones if not (tone_band[0] <= f <= tone_band[1]))
    laf = event.laf_max_db
    laf = None if laf is None or not math.isfinite(laf) else float(laf)
    at_ref = None
    if reference_distance_m is not None:
        reference_distance_m = float(reference_distance_m)
        d = event.closest_approach_m
        if laf is not None and math.isfinite(d) and d > 0:
            from passby.level import level_at_distance
            at_ref = level_at_distance(laf, d, reference_distance_m)
    checked = at_ref if reference_distance_m is not None else laf
    level_outside = None
    if level_band is not None and checked is not None:
        level_outside = not (level_band[0] <= checked <= level_band[1])
    return ToneCheck(tones_hz=tones, tones_outside=outside, laf_max_db=laf,
                     level_calibrated=bool(event.level_calibrated),
                     reference_distance_m=reference_distance_m,
                     level_at_reference_db=at_ref, level_checked_db=checked,
                     level_outside=level_outside)
