"""``passby plot``: a recording's spectrogram with its tracked tones and fitted curves.

Either a WAV file (analysed here) or a logged event's clip::

    passby plot pass.wav --temperature 12 --out pass.png
    passby plot --log road.db --event 42 --out event42.png
"""

from __future__ import annotations

import math
import os


def add_parser(sub):
    p = sub.add_parser(
        "plot", help="draw a recording's spectrogram and fitted Doppler curves (PNG)",
        description="Analyse a WAV recording (or a logged event's clip) and draw its "
                    "spectrogram with the tracked tones and the fitted Doppler curve of "
                    "each pass-by. Needs matplotlib (pip install 'passby[plots]').")
    p.add_argument("wav", nargs="?", metavar="WAV", help="recording to analyse and draw")
    p.add_argument("--log", metavar="LOG", help="a station's log, with --event")
    p.add_argument("--event", type=int, metavar="N", help="id of the logged event whose clip to draw")
    p.add_argument("--temperature", type=float, metavar="C",
                   help="air temperature, degrees C (default 20; with --event the event's)")
    p.add_argument("--humidity", type=float, metavar="PCT",
                   help="relative humidity, percent (with --event the event's)")
    p.add_argument("--channel", type=int, metavar="N",
                   help="1-based channel of the WAV (default: the mean of all)")
    p.add_argument("--config", metavar="TOML",
                   help="take the detection settings from this station configuration")
    p.add_argument("--units", choices=("kmh", "mph"), default="kmh", help="speed unit (default kmh)")
    p.add_argument("--out", metavar="PNG", help="the figure (default: the recording's name with .png)")
    return p


def _logged_clip(args):
    """(clip path, logged event) of ``--log LOG --event N``."""
    from passby.errors import InputError, LogError
    from passby.store import EventLog

    with EventLog(args.log, readonly=True) as log:
        found = [e for e in log.events() if e.id == args.event]
    if not found:
        raise LogError(f"no event {args.event} in the log", where=args.log)
    logged = found[0]
    if not logged.clip_path:
        raise InputError(f"event {args.event} has no audio clip (clips not kept)", where=args.log)
    clip = logged.clip_path
    if not os.path.isabs(clip):
        clip = os.path.join(os.path.dirname(os.path.abspath(args.log)), clip)
    if not os.path.exists(clip):
        raise InputError(f"the clip of event {args.event} is gone (deleted by the clip quota?)",
                         where=clip)
    return clip, logged


def analyse_with_tracks(x, fs, settings):
    """Events of the samples and, per event, the tracked points ``(times_s, freqs_hz)``.

    Runs the same :class:`~passby.pipeline.Pipeline` as ``passby analyze``,
    in blocks of the same length, and keeps the tracks behind each event.
    """
    from passby.api import BLOCK_S
    from passby.pipeline import Pipeline

    pipe = Pipeline(fs, settings)
    block = max(1, int(BLOCK_S * fs))
    events = []
    for i in range(0, x.size, block):
        events += pipe.push(x[i:i + block])
    events += pipe.finish()
    tracks = [pts for ev in events for pts in pipe.tracked_points(ev)]
    return events, tracks


def run(args) -> int:
    from passby.errors import InputError
    from passby.plots import passby_figure, require_matplotlib
    from passby.units import LABELS, to_unit
    from passby.settings import AnalysisSettings
    from passby.wavio import read_wav

    require_matplotlib()  # fail early, before the analysis, if it is missing
    if (args.wav is None) == (args.log is None):
        raise InputError("give either WAV or --log LOG --event N", where="plot")
    if args.log is not None and args.event is None:
        raise InputError("--log needs --event N (the event's id)", where="plot")
    if args.channel is not None and args.channel < 1:
        raise InputError("--channel counts from 1", where="plot")
    logged = None
    if args.log is not None:
        path, logged = _logged_clip(args)
    else:
        path = args.wav
    settings = AnalysisSettings()
    if args.config:
        from passby.config import load_config, settings_from_config
        settings = settings_from_config(load_config(args.config))
    temperature = args.temperature
    humidity = args.humidity
    if logged is not None:
        if temperature is None and math.isfinite(logged.event.temperature_c):
            temperature = logged.event.temperature_c
        if humidity is None:
            humidity = logged.event.humidity_pct
    changes = {}
    if temperature is not None:
        changes["temperature_c"] = float(temperature)
    if humidity is not None:
        changes["humidity_pct"] = float(humidity)
    settings = settings.with_(**changes) if changes else settings

    x, fs = read_wav(path, channel=None if args.channel is None else args.channel - 1)
    if x.size == 0:
        raise InputError("no audio samples", where=path)
    events, tracks = analyse_with_tracks(x, fs, settings)
    out = args.out or os.path.splitext(os.path.basename(path))[0] + ".png"
    prefix = None
    if logged is not None:
        prefix = f"event {logged.id} ({logged.station_id}, {logged.time_utc})"
    passby_figure(x, fs, events, out, tracks=tracks, unit=args.units, title_prefix=prefix)
    for e in events:
        if math.isfinite(e.speed_mps):
            print(f"pass-by at {e.pass_time_s:.2f} s: {to_unit(e.speed_mps, args.units):.1f} "
                  f"{LABELS[args.units]}, closest {e.closest_approach_m:.1f} m, "
                  f"rest {e.emitted_hz:.1f} Hz ({e.quality})")
        else:
            print(f"event from {e.start_s:.2f} s rejected: {e.reason or 'no fit'}")
    if not events:
        print("no pass-by found")
    print(f"figure written to {out}")
    return 0
