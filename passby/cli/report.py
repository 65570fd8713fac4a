"""``passby report``: the spot speed study of a station's log.

Reads the log (read-only: a station may go on writing), selects events by
time and station, and prints the study -- mean, standard deviation, 15th,
50th and 85th percentile speeds, pace, share over the posted limit,
minimum sample size, counts per hour -- as text, JSON or CSV, optionally
with a figure and, for horns and tones, a per-event table of rest
frequencies and LAFmax.
"""

from __future__ import annotations

import argparse
import csv
import io
import json
import math
import sys

from passby.errors import InputError

NOTICE = ("Results are for engineering studies, not for enforcement unless the "
          "local authority approves the method.")
LEVEL_NOTICE = ("Levels from a microphone chain not certified to IEC 61672-1 are "
                "indicative only; uncalibrated levels are dB re full scale.")


def _band(text):
    """``LO:HI`` as a pair of floats (for argparse)."""
    try:
        lo, hi = (float(p) for p in str(text).split(":"))
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected LO:HI (two numbers), not {text!r}") from None
    if not (math.isfinite(lo) and math.isfinite(hi) and lo < hi):
        raise argparse.ArgumentTypeError(f"expected LO:HI with LO < HI, not {text!r}")
    return lo, hi


def _positive(text):
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a number: {text!r}") from None
    if not (math.isfinite(value) and value > 0):
        raise argparse.ArgumentTypeError(f"must be a positive number, not {text!r}")
    return value


def add_parser(sub):
    p = sub.add_parser(
        "report", help="spot speed study of a station's log",
        description="Spot speed study of the events in a station's log: mean, "
                    "standard deviation, 15th/50th/85th percentile speeds, pace, "
                    "share over the posted limit, minimum sample size and counts "
                    "per hour. " + NOTICE)
    p.add_argument("log", nargs="?", metavar="LOG",
                   help="the station's log (default: [station] log of --config)")
    p.add_argument("--since", metavar="ISO", help="first time to include (ISO 8601, UTC unless it says)")
    p.add_argument("--until", metavar="ISO", help="end of the period, excluded (ISO 8601)")
    p.add_argument("--station", metavar="ID", help="only this station's events")
    p.add_argument("--units", choices=("kmh", "mph"), default="kmh",
                   help="report unit (default kmh); sets the pace band of 10 units")
    p.add_argument("--limit", type=_positive, metavar="SPEED",
                   help="posted speed limit in the report unit "
                        "(default: [station] posted_limit_kmh of --config)")
    p.add_argument("--config", metavar="TOML", help="station configuration file")
    p.add_argument("--error", type=_positive, metavar="E",
                   help="permitted error of the mean speed for the minimum sample "
                        "size, in the report unit (default 2 km/h or 1.5 mph)")
    out = p.add_mutually_exclusive_group()
    out.add_argument("--json", action="store_true", help="print JSON")
    out.add_argument("--csv", action="store_true",
                     help="print CSV: the counts per hour (with --tones: one row per event)")
    p.add_argument("--plot", metavar="OUT.png", help="also draw the study to a PNG (needs matplotlib)")
    p.add_argument("--tones", action="store_true",
                   help="also list each event's tones and LAFmax")
    p.add_argument("--level-band", type=_band, metavar="LO:HI",
                   help="with --tones: flag levels outside LO..HI dB")
    p.add_argument("--tone-band", type=_band, metavar="LO:HI",
                   help="with --tones: flag tones outside LO..HI Hz")
    p.add_argument("--reference-distance", type=_positive, metavar="M",
                   help="with --tones: also give the level at M metres (spherical "
                        "spreading from the fitted closest distance); --level-band "
                        "then applies to it")
    return p


# --------------------------------------------------------------------------
# Pure formatting


def _num(x, digits=3):
    if x is None:
        return None
    x = float(x)
    return round(x, digits) if math.isfinite(x) else None


def summary_dict(study, speeds_mps, selection=None) -> dict:
    """The study as JSON-ready values: ``*_kmh`` fields, plus ``*_mph`` for an mph report."""
    from passby.study import pace
    from passby.units import LABELS as UNIT_LABELS, to_unit

    def speed(v, unit):
        return None if v is None else _num(to_unit(v, unit))

    def pace_dict(p):
        return None if p is None else {"low": _num(p.low), "high": _num(p.high),
                                       "count": p.count, "share": _num(p.share, 4)}

    d = {
        "unit": study.unit,
        "unit_label": UNIT_LABELS[study.unit],
        "count": study.count,
        "rejected_count": study.rejected_count,
    }
    units = ["kmh"] + (["mph"] if study.unit == "mph" else [])
    for unit in units:
        for name in ("mean", "std", "min", "max", "p15", "p50", "p85"):
            d[f"{name}_{unit}"] = speed(getattr(study, f"{name}_mps"), unit)
        band = study.pace if study.pace is not None and study.pace.unit == unit \
            else pace(speeds_mps, unit)
        d[f"pace_{unit}"] = pace_dict(band)
        d[f"posted_limit_{unit}"] = speed(study.posted_limit_mps, unit)
        d[f"permitted_error_{unit}"] = speed(study.permitted_error_mps, unit)
    d["pace_share"] = None if study.pace is None else _num(study.pace.share, 4)
    d["over_limit_count"] = study.over_limit_count
    d["over_limit_share"] = _num(study.over_limit_share, 4)
    d["min_sample_size"] = study.min_sample_size
    d["sample_needed"] = study.sample_needed
    d["sample_adequate"] = study.sample_adequate
    d["per_hour"] = [{"hour_utc": h.hour_utc, "count": h.count, "rejected": h.rejected}
                     for h in study.per_hour]
    if selection:
        d.update(selection)
    d["notice"] = NOTICE
    return d


def tone_rows(logged, checks, unit) -> list:
    """One JSON-ready dict per event of the tone table."""
    from passby.units import to_unit

    rows = []
    for le, c in zip(logged, checks):
        rows.append({
            "id": le.id,
            "time_utc": le.time_utc,
            "station_id": le.station_id,
            f"speed_{unit}": _num(to_unit(le.event.speed_mps, unit)),
            "closest_approach_m": _num(le.event.closest_approach_m),
            "tones_hz": [_num(f, 2) for f in c.tones_hz],
            "laf_max_db": _num(c.laf_max_db, 2),
            "level_calibrated": c.level_calibrated,
            "reference_distance_m": c.reference_distance_m,
            "level_at_reference_db": _num(c.level_at_reference_db, 2),
            "tones_outside": [_num(f, 2) for f in c.tones_outside],
            "level_outside": c.level_outside,
            "flagged": c.flagged,
        })
    return rows


def _fmt(x, spec=".1f", none="-"):
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return none
    return format(x, spec)


def format_text(study, summary, tone_table=None, tone_bands=None) -> str:
    """The study as text for a person."""
    u = summary["unit"]
    lab = summary["unit_label"]
    lines = []
    head = "Spot speed study"
    if summary.get("station"):
        head += f", station {summary['station']}"
    if summary.get("first_utc"):
        head += f", {summary['first_utc'][:19]}Z to {summary['last_utc'][:19]}Z"
    lines.append(head)
    stations = summary.get("stations") or []
    if len(stations) > 1 and not summary.get("station"):
        lines.append(f"warning: the selection mixes {len(stations)} stations "
                     f"({', '.join(stations)}); choose one with --station")
    if not study.count and not study.rejected_count:
        lines.append("no events in the log for this selection")
    lines.append("")
    rows = [
        ("Vehicles with a speed", f"{study.count}"
         + (f"   ({study.rejected_count} rejected event"
            f"{'' if study.rejected_count == 1 else 's'}, not in the statistics)"
            if study.rejected_count else "")),
        ("Mean speed", f"{_fmt(summary[f'mean_{u}'])} {lab}"),
        ("Standard deviation", f"{_fmt(summary[f'std_{u}'])} {lab}"),
        ("15th percentile speed", f"{_fmt(summary[f'p15_{u}'])} {lab}"),
        ("50th percentile (median)", f"{_fmt(summary[f'p50_{u}'])} {lab}"),
        ("85th percentile speed", f"{_fmt(summary[f'p85_{u}'])} {lab}"),
        ("Slowest / fastest", f"{_fmt(summary[f'min_{u}'])} / {_fmt(summary[f'max_{u}'])} {lab}"),
    ]
    p = summary[f"pace_{u}"]
    if p:
        rows.append((f"Pace (10 {lab})", f"{p['low']:.1f} to {p['high']:.1f} {lab}: "
                     f"{p['count']} vehicles ({100 * p['share']:.0f} %)"))
    limit = summary[f"posted_limit_{u}"]
    if limit is not None:
        share = summary["over_limit_share"]
        rows.append(("Over the posted limit", f"{_fmt(limit, 'g')} {lab}: "
                     f"{study.over_limit_count} vehicles"
                     + (f" ({100 * share:.1f} %)" if share is not None else "")))
    else:
        rows.append(("Over the posted limit", "no limit given (--limit or --config)"))
    err = summary[f"permitted_error_{u}"]
    if study.min_sample_size is not None:
        rows.append(("Minimum sample size", f"{study.min_sample_size} vehicles for "
                     f"+-{_fmt(err, 'g')} {lab} at 95 % (85th percentile); "
                     "at least 50, preferably 100"))
    width = max(len(r[0]) for r in rows)
    lines += [f"{name:<{width}}  {value}" for name, value in rows]
    if not study.sample_adequate:
        lines.append("")
        if study.count < 2:
            lines.append("warning: too few vehicles for a spot speed study "
                         "(at least 50, preferably 100)")
        else:
            lines.append(f"warning: sample too small: {study.count} vehicles, "
                         f"{study.sample_needed} needed; the percentiles are uncertain")
    if study.per_hour:
        lines.append("")
        lines.append("Vehicles per hour (UTC)")
        for h in study.per_hour:
            extra = f"   ({h.rejected} rejected)" if h.rejected else ""
            lines.append(f"  {h.hour_utc[:10]} {h.hour_utc[11:16]}  {h.count:5d}{extra}")
    if tone_table is not None:
        lines.append("")
        lines += _tone_text(tone_table, u, lab, tone_bands or {})
    lines.append("")
    lines.append(NOTICE)
    return "\n".join(lines) + "\n"


def _tone_text(rows, u, lab, bands):
    ref = bands.get("reference_distance_m")
    out = ["Tones and levels per event"]
    if not rows:
        return out + ["  (no event with a speed)"]
    header = ["id", "time (UTC)", f"speed {lab}", "tones Hz", "LAFmax dB"]
    if ref is not None:
        header.append(f"at {ref:g} m dB")
    header.append("flags")
    table = [header]
    for r in rows:
        level = _fmt(r["laf_max_db"])
        if r["laf_max_db"] is not None and not r["level_calibrated"]:
            level += " (uncal.)"
        line = [str(r["id"]), r["time_utc"][:19] + "Z", _fmt(r[f"speed_{u}"]),
                ", ".join(f"{f:.1f}" for f in r["tones_hz"]) or "-", level]
        if ref is not None:
            line.append(_fmt(r["level_at_reference_db"]))
        flags = []
        if r["tones_outside"]:
            lo, hi = bands["tone_band_hz"]
            flags.append("tone " + ", ".join(f"{f:.1f}" for f in r["tones_outside"])
                         + f" outside {lo:g}-{hi:g} Hz")
        if r["level_outside"]:
            lo, hi = bands["level_band_db"]
            flags.append(f"level outside {lo:g}-{hi:g} dB")
        line.append("; ".join(flags) or "-")
        table.append(line)
    widths = [max(len(row[i]) for row in table) for i in range(len(header))]
    for row in table:
        out.append("  " + "  ".join(c.ljust(w) for c, w in zip(row, widths)).rstrip())
    if any(r["laf_max_db"] is not None for r in rows):
        out.append(LEVEL_NOTICE)
    return out


def format_csv(summary) -> str:
    """The counts per hour: one row per UTC hour, empty hours included."""
    rows = [{"station": summary.get("station") or "", "hour_utc": h["hour_utc"],
             "count": h["count"], "rejected": h["rejected"]} for h in summary["per_hour"]]
    return _csv(rows, ["station", "hour_utc", "count", "rejected"])


def format_tone_csv(rows, u) -> str:
    """One row per event of the tone table (a header only when there is none)."""
    fields = ["id", "time_utc", "station_id", f"speed_{u}", "closest_approach_m", "tones_hz",
              "laf_max_db", "level_calibrated", "reference_distance_m",
              "level_at_reference_db", "tones_outside_hz", "level_outside", "flagged"]
    flat = []
    for r in rows:
        d = {k: r.get(k) for k in fields}
        d["tones_hz"] = " ".join(f"{f:.2f}" for f in r["tones_hz"])
        d["tones_outside_hz"] = " ".join(f"{f:.2f}" for f in r["tones_outside"])
        flat.append(d)
    return _csv(flat, fields)


def _csv(rows, fields=None) -> str:
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=fields or list(rows[0]), lineterminator="\n")
    w.writeheader()
    for r in rows:
        w.writerow({k: "" if v is None else v for k, v in r.items()})
    return buf.getvalue()


# --------------------------------------------------------------------------
# The shell


def run(args) -> int:
    from passby.store import EventLog, parse_utc, utc_iso
    from passby.study import check_tones, is_accepted, study_from_log
    from passby.units import from_unit

    unit = args.units
    cfg = None
    if args.config:
        from passby.config import load_config
        cfg = load_config(args.config)
    log_path = args.log or (cfg.log if cfg is not None else None)
    if not log_path:
        raise InputError("no log given (LOG, or [station] log in --config)", where="report")
    since = None if args.since is None else parse_utc(args.since, where="--since")
    until = None if args.until is None else parse_utc(args.until, where="--until")
    if since is not None and until is not None and until <= since:
        raise InputError("--until must be later than --since", where="report")
    if args.limit is not None:
        limit_mps = from_unit(args.limit, unit)
    elif cfg is not None and cfg.posted_limit_kmh is not None:
        limit_mps = from_unit(cfg.posted_limit_kmh, "kmh")
    else:
        limit_mps = None
    error_mps = None if args.error is None else from_unit(args.error, unit)
    if not args.tones and (args.level_band or args.tone_band or args.reference_distance):
        raise InputError("--level-band, --tone-band and --reference-distance go with --tones",
                         where="report")

    with EventLog(log_path, readonly=True) as log:
        logged = log.events(since=since, until=until, station_id=args.station)
    study, speeds = study_from_log(logged, unit=unit, posted_limit_mps=limit_mps,
                                   permitted_error_mps=error_mps)
    stations = sorted({e.station_id for e in logged})
    selection = {
        "log": str(log_path),
        "station": args.station or (stations[0] if len(stations) == 1 else None),
        "stations": stations,
        "since": None if since is None else utc_iso(since),
        "until": None if until is None else utc_iso(until),
        "first_utc": logged[0].time_utc if logged else None,
        "last_utc": logged[-1].time_utc if logged else None,
    }
    summary = summary_dict(study, speeds, selection)

    table = bands = None
    if args.tones:
        good = [e for e in logged if is_accepted(e.event)]
        checks = [check_tones(e.event, tone_band_hz=args.tone_band,
                              level_band_db=args.level_band,
                              reference_distance_m=args.reference_distance) for e in good]
        table = tone_rows(good, checks, unit)
        bands = {"tone_band_hz": args.tone_band, "level_band_db": args.level_band,
                 "reference_distance_m": args.reference_distance}

    if args.plot:
        from passby.plots import study_figure
        study_figure(study, speeds, args.plot)

    if args.json:
        if table is not None:
            summary["tones"] = {"bands": bands, "events": table, "level_notice": LEVEL_NOTICE}
        json.dump(summary, sys.stdout, indent=2, allow_nan=False)
        sys.stdout.write("\n")
    elif args.csv:
        sys.stdout.write(format_tone_csv(table, unit) if table is not None else format_csv(summary))
    else:
        sys.stdout.write(format_text(study, summary, table, bands))
        if args.plot:
            sys.stdout.write(f"figure written to {args.plot}\n")
    return 0
