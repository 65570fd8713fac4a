"""Figures for reports: a spot speed study and one recording's pass-bys.

matplotlib is an optional extra (``pip install 'passby[plots]'``). It is
imported only inside these functions and drawn off-screen (the Agg
canvas, no window, no pyplot state), so a station without a display or
without matplotlib runs everything else.
"""

from __future__ import annotations

import math

import numpy as np

from passby.errors import InputError, PassbyError
from passby.units import LABELS as UNIT_LABELS, to_unit

#: Width of a histogram bin, in the report unit (common practice, no source).
HIST_BIN = {"kmh": 2.0, "mph": 1.0}


def require_matplotlib():
    """The Figure class and the Agg canvas, or a PassbyError saying how to get them."""
    try:
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure
    except ImportError:
        raise PassbyError("plots need matplotlib: pip install 'passby[plots]'",
                          where="plot") from None
    return Figure, FigureCanvasAgg


def _new_figure(width_px, height_px, dpi):
    Figure, Canvas = require_matplotlib()
    width_px, height_px = int(width_px), int(height_px)
    if not (100 <= width_px <= 10000 and 100 <= height_px <= 10000):
        raise InputError(f"figure size {width_px}x{height_px} px is out of range (100..10000)")
    fig = Figure(figsize=(width_px / dpi, height_px / dpi), dpi=dpi)
    Canvas(fig)
    return fig


def _save(fig, out_png, dpi):
    try:
        fig.savefig(out_png, dpi=dpi, format="png")
    except OSError as exc:
        raise PassbyError(f"cannot write the figure: {exc.strerror or exc}", where=out_png) from None
    return str(out_png)


def study_figure(study, speeds_mps, out_png, *, title=None, width_px=1200, height_px=800,
                 dpi=100):
    """Draw a spot speed study: histogram, cumulative curve, P50, P85, limit, counts per hour.

    Parameters
    ----------
    study : passby.study.SpeedStudy
    speeds_mps : array_like
        The speeds the study was made of, m/s.
    out_png : str or path
        Where to write the PNG.
    title : str, optional
    width_px, height_px, dpi : int
        Size of the image in pixels and its resolution.

    Returns
    -------
    str
        ``out_png``.

    Raises
    ------
    PassbyError
        matplotlib missing, or the file cannot be written.
    """
    unit = study.unit
    label = UNIT_LABELS[unit]
    v = np.atleast_1d(to_unit(np.asarray(speeds_mps, dtype=float), unit))
    fig = _new_figure(width_px, height_px, dpi)
    has_hours = bool(study.per_hour)
    if has_hours:
        ax, ax_h = fig.subplots(2, 1, gridspec_kw={"height_ratios": [3, 2]})
    else:
        ax, ax_h = fig.subplots(1, 1), None
    if v.size:
        step = HIST_BIN[unit]
        lo = math.floor(v.min() / step) * step
        hi = (math.floor(v.max() / step) + 1) * step
        edges = np.arange(lo, hi + step / 2, step)
        ax.hist(v, bins=edges, color="#4c72b0", edgecolor="white", label="vehicles", zorder=2)
        if study.pace is not None:
            ax.axvspan(study.pace.low, study.pace.high, color="#dd8452", alpha=0.25, zorder=0,
                       label=f"pace {study.pace.low:.1f}-{study.pace.high:.1f} {label} "
                             f"({100 * study.pace.share:.0f} %)")
        cum = ax.twinx()
        s = np.sort(v)
        cum.plot(s, 100.0 * np.arange(1, s.size + 1) / s.size, color="#222222", lw=1.5,
                 drawstyle="steps-post")
        cum.set_ylim(0, 105)
        cum.set_ylabel("cumulative, %")
        marks = [(study.p50_mps, "P50", "#55a868", "--"), (study.p85_mps, "P85", "#c44e52", "--")]
        if study.posted_limit_mps is not None:
            marks.append((study.posted_limit_mps, "limit", "#8172b3", "-"))
        for value, name, color, style in marks:
            x = to_unit(value, unit)
            ax.axvline(x, color=color, ls=style, lw=2, label=f"{name} {x:.1f} {label}")
        ax.legend(loc="upper left", fontsize="small")
    else:
        ax.text(0.5, 0.5, "no vehicle with a speed", ha="center", va="center",
                transform=ax.transAxes)
    ax.set_xlabel(f"speed, {label}")
    ax.set_ylabel("vehicles")
    ax.set_title(title or f"Spot speed study: {study.count} vehicles"
                 + (f", {study.rejected_count} rejected" if study.rejected_count else ""))
    if ax_h is not None:
        hours = study.per_hour
        x = np.arange(len(hours))
        good = np.array([h.count for h in hours])
        bad = np.array([h.rejected for h in hours])
        ax_h.bar(x, good, color="#4c72b0", label="with speed")
        if bad.any():
            ax_h.bar(x, bad, bottom=good, color="#bbbbbb", label="rejected")
            ax_h.legend(loc="upper right", fontsize="small")
        every = max(1, len(hours) // 12)
        ax_h.set_xticks(x[::every])
        ax_h.set_xticklabels([h.hour_utc[5:13].replace("T", " ") + "h" for h in hours[::every]],
                             fontsize="small")
        ax_h.set_xlabel("hour (UTC, MM-DD HH)")
        ax_h.set_ylabel("vehicles per hour")
    fig.tight_layout()
    return _save(fig, out_png, dpi)


def _spectrogram(x, fs, f_max):
    """Power spectral density frames for display, dB, up to ``f_max``.

    The signal is first decimated (polyphase FIR, scipy) to a rate of at
    least 2.5 ``f_max``, so memory stays small on a small board; frames of
    about 0.1 s with 75 % overlap (at most about 1500 of them), Hann
    window, zero-padded twice for a smoother picture.
    """
    from scipy import signal

    q = max(1, int(fs // (2.5 * f_max)))
    if q > 1:
        x = signal.resample_poly(x, 1, q)
        fs = fs / q
    nper = 1 << max(5, int(round(math.log2(fs * 0.1))))
    nper = min(nper, x.size)
    hop = max(nper // 4, int(math.ceil(x.size / 1500)), 1)
    noverlap = max(0, nper - hop)
    f, t, sxx = signal.spectrogram(x, fs, window="hann", nperseg=nper, noverlap=noverlap,
                                   nfft=2 * nper, scaling="density", mode="psd")
    keep = f <= f_max
    return f[keep], t, 10.0 * np.log10(sxx[keep] + 1e-20)


def passby_figure(x, fs, events, out_png, *, tracks=None, unit="kmh", f_range_hz=None,
                  title=None, title_prefix=None, width_px=1200, height_px=700, dpi=100):
    """Draw a recording's spectrogram with the tracked tones and the fitted Doppler curves.

    Parameters
    ----------
    x : array_like
        Mono samples; time 0 is the first sample (the time base of the
        events' ``pass_time_s``).
    fs : float
        Hz.
    events : sequence of PassEvent
        Each event with a speed gets the curve
        :func:`passby.physics.received_frequency` for every one of its tones
        over its ``start_s .. end_s`` (the whole recording if unknown).
    out_png : str or path
    tracks : sequence of (times_s, freqs_hz), optional
        Tracked spectral points to draw as dots.
    unit : {"kmh", "mph"}
        Unit of the speed in the title and legend.
    f_range_hz : (float, float), optional
        Frequency axis (default: around the events' tones, else 0..4.5 kHz).
    title : str, optional
        Replaces the automatic title (speed, closest distance, rest
        frequency of a single pass-by; the number of pass-bys otherwise).
    title_prefix : str, optional
        Put before the automatic title (for example the logged event).
    width_px, height_px, dpi : int

    Returns
    -------
    str
        ``out_png``.

    Raises
    ------
    PassbyError
        matplotlib missing, or the file cannot be written.
    InputError
        No samples.
    """
    from passby.physics import received_frequency
    from passby.settings import AnalysisSettings

    x = np.asarray(x, dtype=float).ravel()
    if x.size < 16:
        raise InputError("too few samples to draw")
    fs = float(fs)
    label = UNIT_LABELS[unit]
    events = list(events)
    fitted = [e for e in events if math.isfinite(e.speed_mps) and e.tones_hz]
    if f_range_hz is None:
        if fitted:
            f_top = max(max(e.tones_hz) for e in fitted)
            f_low = min(min(e.tones_hz) for e in fitted)
            f_range_hz = (max(0.0, 0.6 * f_low), min(fs / 2, 1.5 * f_top))
        else:
            f_range_hz = (0.0, min(fs / 2, AnalysisSettings().f_max_hz))
    f_lo, f_hi = (float(v) for v in f_range_hz)
    fig = _new_figure(width_px, height_px, dpi)
    ax = fig.subplots(1, 1)
    f, t, s_db = _spectrogram(x, fs, f_hi)
    top = float(np.max(s_db))
    extent = (t[0] - (t[1] - t[0]) / 2 if t.size > 1 else 0.0,
              t[-1] + (t[1] - t[0]) / 2 if t.size > 1 else x.size / fs,
              f[0], f[-1])
    image = ax.imshow(s_db, origin="lower", aspect="auto", extent=extent, cmap="magma",
                      vmin=top - 60.0, vmax=top, interpolation="nearest")
    fig.colorbar(image, ax=ax, pad=0.01).set_label("power density, dB re full scale^2/Hz")
    for times, freqs in tracks or ():
        ax.plot(np.asarray(times, float), np.asarray(freqs, float), ".", ms=3,
                color="#00e5ff", alpha=0.8)
    if tracks:
        ax.plot([], [], ".", color="#00e5ff", label="tracked")
    duration = x.size / fs
    # Curves of accepted events in distinct bright colours; a fit that was
    # rejected is drawn grey and dashed.
    colours = ("#7CFC00", "#ffd700", "#ff69b4", "#ffffff", "#ff8c00", "#adff2f")
    for k, e in enumerate(fitted):
        ok = e.quality != "rejected"
        colour = colours[k % len(colours)] if ok else "#aaaaaa"
        a = e.start_s if math.isfinite(e.start_s) else 0.0
        b = e.end_s if math.isfinite(e.end_s) else duration
        tt = np.linspace(a, b, 400)
        speed = to_unit(e.speed_mps, unit)
        name = (f"{speed:.1f} {label}, d {e.closest_approach_m:.1f} m"
                + ("" if ok else " (rejected)"))
        for j, f0 in enumerate(e.tones_hz):
            ax.plot(tt, received_frequency(tt, f0, e.speed_mps, e.closest_approach_m,
                                           e.pass_time_s, e.speed_of_sound_mps),
                    color=colour, lw=1.5, ls="-" if ok else "--",
                    label=name if j == 0 else None)
        ax.axvline(e.pass_time_s, color=colour, ls=":", lw=1)
    ax.set_xlim(0.0, duration)
    ax.set_ylim(f_lo, f_hi)
    ax.set_xlabel("time, s")
    ax.set_ylabel("frequency, Hz")
    if title is None:
        if len(fitted) == 1:
            e = fitted[0]
            std = to_unit(e.speed_std_mps, unit) if math.isfinite(e.speed_std_mps) else float("nan")
            tones = ", ".join(f"{f:.1f}" for f in e.tones_hz[:4])
            title = (f"{to_unit(e.speed_mps, unit):.1f} ± {std:.1f} {label}, "
                     f"closest {e.closest_approach_m:.1f} m, "
                     f"rest frequency {tones} Hz ({e.quality})")
        elif fitted:
            good = sum(e.quality != "rejected" for e in fitted)
            title = f"{len(fitted)} fitted pass-bys, {good} accepted"
        else:
            title = "no pass-by with a speed"
        unfitted = len(events) - len(fitted)
        if unfitted:
            title += f"; {unfitted} event{'s' if unfitted > 1 else ''} without a fit"
        if title_prefix:
            title = f"{title_prefix}: {title}"
    ax.set_title(title)
    if fitted or tracks:
        ax.legend(loc="upper right", fontsize="small")
    fig.tight_layout()
    return _save(fig, out_png, dpi)
