"""``passby export``: a station log's events as CSV or JSON.

Every event, in time order, with a header row (CSV) or as a list of
objects (JSON); speeds in km/h beside the SI fields. NaN and missing values
are empty cells (CSV) or ``null`` (JSON). The log can be read while a
station is writing to it.
"""

from __future__ import annotations

import csv
import io
import json
import math
import sys

#: The columns, in order.
COLUMNS = (
    "time_utc", "station_id", "speed_kmh", "speed_std_kmh", "emitted_hz", "tones_hz",
    "closest_approach_m", "closest_approach_std_m", "quality", "reason", "laf_max_db",
    "level_calibrated", "temperature_c", "humidity_pct", "speed_of_sound_mps",
    "residual_hz", "method", "dropped_blocks", "overflows", "software_version",
    "stream_offset_s", "clip_path", "id",
)


def add_parser(sub):
    p = sub.add_parser(
        "export", help="write a station log's events as CSV or JSON",
        description="Write every event of a station log, in time order, as CSV (with a "
                    "header row) or JSON, to stdout or --out FILE.")
    p.add_argument("log", metavar="LOG", help="station log (SQLite)")
    fmt = p.add_mutually_exclusive_group(required=True)
    fmt.add_argument("--csv", action="store_true", help="comma-separated values")
    fmt.add_argument("--json", action="store_true", help="JSON")
    p.add_argument("--since", metavar="ISO", help="events at or after this UTC time "
                   "(ISO 8601, e.g. 2031-05-04 or 2031-05-04T07:00Z)")
    p.add_argument("--until", metavar="ISO", help="events before this UTC time")
    p.add_argument("--station-id", metavar="ID", help="this station's events only")
    p.add_argument("--out", metavar="FILE", help="write here instead of stdout")
    return p


def _value(x):
    if isinstance(x, float) and not math.isfinite(x):
        return None
    return x


def rows(logged) -> list:
    """The export rows (dicts, in :data:`COLUMNS` order) of logged events."""
    from passby.units import to_unit

    out = []
    for le in logged:
        e = le.event
        row = {
            "time_utc": le.time_utc,
            "station_id": le.station_id,
            "speed_kmh": to_unit(e.speed_mps, "kmh"),
            "speed_std_kmh": to_unit(e.speed_std_mps, "kmh"),
            "emitted_hz": e.emitted_hz,
            "tones_hz": list(e.tones_hz),
            "closest_approach_m": e.closest_approach_m,
            "closest_approach_std_m": e.closest_approach_std_m,
            "quality": e.quality,
            "reason": e.reason,
            "laf_max_db": e.laf_max_db,
            "level_calibrated": e.level_calibrated,
            "temperature_c": e.temperature_c,
            "humidity_pct": e.humidity_pct,
            "speed_of_sound_mps": e.speed_of_sound_mps,
            "residual_hz": e.residual_hz,
            "method": e.method,
            "dropped_blocks": e.dropped_blocks,
            "overflows": le.overflows,
            "software_version": le.software_version,
            "stream_offset_s": e.pass_time_s,
            "clip_path": le.clip_path,
            "id": le.id,
        }
        out.append({k: _value(row[k]) for k in COLUMNS})
    return out


def to_csv(table) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(COLUMNS)
    for r in table:
        cells = []
        for k in COLUMNS:
            v = r[k]
            if v is None:
                cells.append("")
            elif k == "tones_hz":
                cells.append(" ".join(repr(float(f)) for f in v))
            elif isinstance(v, bool):
                cells.append("1" if v else "0")
            else:
                cells.append(v)
        w.writerow(cells)
    return buf.getvalue()


def to_json(table) -> str:
    return json.dumps({"columns": list(COLUMNS), "events": table}, indent=1,
                      allow_nan=False) + "\n"


def run(args) -> int:
    from passby.config import write_text_atomic
    from passby.store import EventLog

    with EventLog(args.log, readonly=True) as log:
        logged = log.events(since=args.since, until=args.until, station_id=args.station_id)
    table = rows(logged)
    text = to_csv(table) if args.csv else to_json(table)
    if args.out:
        write_text_atomic(args.out, text)
        print(f"{len(table)} events written to {args.out}", file=sys.stderr)
    else:
        sys.stdout.write(text)
        sys.stdout.flush()
    return 0
