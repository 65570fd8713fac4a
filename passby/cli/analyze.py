"""``passby analyze PATH...``: every pass-by in WAV recordings.

A table by default, ``--json`` for machines. A batch goes on past a bad
file, reports it on stderr and exits with status 2 at the end; a file cut
short is analysed as far as it goes, with a warning (exit status 0).
"""

from __future__ import annotations

import json
import math
import os
import sys

from passby import __version__
from passby.errors import InputError, PassbyError
from passby.physics import cramer_in_range, speed_of_sound
from passby.settings import AnalysisSettings
from passby.units import LABELS, to_unit

UNITS = ("kmh", "mph", "ms")


def add_parser(sub):
    p = sub.add_parser(
        "analyze", help="measure every pass-by in WAV recordings",
        description="Measure the speed, rest frequency, closest distance and passing time "
                    "of every vehicle heard in WAV recordings.")
    p.add_argument("paths", nargs="+", metavar="PATH", help="WAV files or folders of them")
    p.add_argument("--temperature", type=float, default=20.0, metavar="C",
                   help="air temperature in degrees Celsius (default 20)")
    p.add_argument("--humidity", type=float, default=None, metavar="PERCENT",
                   help="relative humidity; the speed of sound then follows Cramer (1993)")
    p.add_argument("--pressure", type=float, default=101.325, metavar="KPA",
                   help="static pressure in kPa, used with --humidity (default 101.325)")
    p.add_argument("--wind", type=float, default=0.0, metavar="M/S",
                   help="wind component along the direction of travel, m/s (default 0)")
    p.add_argument("--units", choices=UNITS, default="kmh", help="speed unit of the table (default kmh)")
    p.add_argument("--channel", type=int, default=None, metavar="N",
                   help="analyse channel N (1 = first); default: the mix of all channels")
    p.add_argument("--level", action="store_true",
                   help="also measure LAFmax, the A-weighted Fast maximum level of each event")
    p.add_argument("--level-offset", type=float, default=None, metavar="DB",
                   help="calibration offset from 'passby calibrate' (levels in dB re 20 uPa)")
    p.add_argument("--json", action="store_true", help="write JSON to stdout instead of a table")
    return p


def wav_paths(paths) -> list:
    """Files named, and the WAV files inside folders named (sorted, recursive)."""
    out = []
    for p in paths:
        if os.path.isdir(p):
            found = []
            for root, _dirs, files in os.walk(p):
                found += [os.path.join(root, f) for f in files if f.lower().endswith((".wav", ".wave"))]
            if not found:
                raise InputError("no WAV files in this folder", where=p)
            out += sorted(found)
        else:
            out.append(p)
    return out


def _settings(args) -> AnalysisSettings:
    try:
        return AnalysisSettings(temperature_c=args.temperature, humidity_pct=args.humidity,
                                pressure_pa=args.pressure * 1000.0, wind_mps=args.wind,
                                level=args.level or args.level_offset is not None,
                                level_offset_db=args.level_offset)
    except PassbyError as exc:
        raise PassbyError(str(exc).replace("_c=", "=").replace("_pct=", "="), where="options") from None


class _Progress:
    """Percent done on stderr, only when stderr is a terminal and the file is long."""

    def __init__(self, path, duration_s):
        self.on = sys.stderr.isatty() and duration_s > 30.0
        self.path, self.total, self.last = path, duration_s, -1

    def __call__(self, seconds):
        if not self.on:
            return
        pct = int(100 * seconds / self.total)
        if pct != self.last:
            self.last = pct
            print(f"\ranalysing {self.path}: {pct:3d} %", end="", file=sys.stderr, flush=True)

    def done(self):
        if self.on:
            print("\r\033[K", end="", file=sys.stderr, flush=True)


def run(args) -> int:
    from passby.api import analyze

    settings = _settings(args)
    c = speed_of_sound(settings.temperature_c, settings.humidity_pct, settings.pressure_pa)
    channel = None
    if args.channel is not None:
        if args.channel < 1:
            raise PassbyError(f"--channel {args.channel}: channels are numbered from 1", where="options")
        channel = args.channel - 1
    if settings.humidity_pct is not None and not cramer_in_range(settings.temperature_c, settings.pressure_pa):
        print("passby: warning: temperature or pressure outside the range of Cramer's formula "
              "(0-30 C, 75-102 kPa); the speed of sound is extrapolated", file=sys.stderr)
    results, failed = [], 0
    for path in wav_paths(args.paths):
        from passby.wavio import probe_wav
        try:
            progress = _Progress(path, probe_wav(path).duration_s)
            try:
                result = analyze(path, channel=channel, settings=settings, progress=progress)
            finally:
                progress.done()
        except InputError as exc:
            failed += 1
            print(f"passby: error: {exc}", file=sys.stderr)
            results.append({"path": path, "error": exc.message})
            continue
        for w in result.warnings:
            print(f"passby: warning: {path}: {w}", file=sys.stderr)
        results.append(result)
        if not args.json:
            print(format_table(result, args.units, c, settings))
    if args.json:
        doc = {
            "software_version": __version__,
            "temperature_c": settings.temperature_c,
            "humidity_pct": settings.humidity_pct,
            "speed_of_sound_mps": c,
            "files": [r if isinstance(r, dict) else _file_json(r, args.units) for r in results],
        }
        json.dump(doc, sys.stdout, indent=2, allow_nan=False)
        print()
    return 2 if failed else 0


def _clean(value):
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, list):
        return [_clean(v) for v in value]
    return value


def _file_json(result, unit) -> dict:
    d = result.to_dict()
    for ev in d["events"]:
        if unit == "mph":
            ev["speed_mph"] = to_unit(ev["speed_mps"], "mph")
            ev["speed_std_mph"] = to_unit(ev["speed_std_mps"], "mph")
        for k in list(ev):
            ev[k] = _clean(ev[k])
    return d


def _fmt(x, spec, width):
    return f"{x:{width}{spec}}" if isinstance(x, (int, float)) and math.isfinite(x) else f"{'-':>{width}}"


def format_table(result, unit: str, c: float, settings: AnalysisSettings) -> str:
    """The readable table of one file's events."""
    air = f"{settings.temperature_c:g} C"
    if settings.humidity_pct is not None:
        air += f", {settings.humidity_pct:g} % RH"
    head = (f"{result.path}: {result.duration_s:.1f} s at {result.sample_rate_hz} Hz, "
            f"speed of sound {c:.1f} m/s ({air})")
    if not result.events:
        return head + "\n  no pass-by found\n"
    label = LABELS[unit]
    level = any(e.laf_max_db is not None for e in result.events)
    cols = (f"  {'#':>2} {'pass at s':>9} {'speed ' + label:>11} {'+-':>5} {'tone Hz':>8} "
            f"{'dist m':>6} {'quality':<8}")
    if level:
        cols += f" {'LAFmax':>7}"
    lines = [head, cols + " note"]
    for i, e in enumerate(result.events, 1):
        row = (f"  {i:>2} {_fmt(e.pass_time_s, '.2f', 9)} {_fmt(to_unit(e.speed_mps, unit), '.1f', 11)} "
               f"{_fmt(to_unit(e.speed_std_mps, unit), '.1f', 5)} {_fmt(e.emitted_hz, '.1f', 8)} "
               f"{_fmt(e.closest_approach_m, '.1f', 6)} {e.quality:<8}")
        if level:
            lv = _fmt(e.laf_max_db, ".1f", 7) if e.laf_max_db is not None else f"{'-':>7}"
            row += f" {lv}"
        note = e.reason or ""
        if len(e.tones_hz) > 1 and e.quality != "rejected":
            note = ("tones " + ", ".join(f"{f:.1f}" for f in e.tones_hz) + " Hz; " + note).rstrip("; ")
        if level and not e.level_calibrated and e.laf_max_db is not None:
            note = (note + "; level uncalibrated (dB re full scale)").lstrip("; ")
        lines.append(row + " " + note)
    return "\n".join(lines) + "\n"
