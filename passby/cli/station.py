"""``passby station``: log pass-bys from a microphone (or a replay), unattended.

Runs until SIGTERM or SIGINT (then finishes the open event, closes the log
and exits 0), or until a replayed file ends. See :mod:`passby.station`.
"""

from __future__ import annotations

import signal

from passby.config import device_option
from passby.errors import ConfigError


def add_parser(sub):
    p = sub.add_parser(
        "station",
        help="log pass-bys from a microphone, unattended, into a log database",
        description="Analyse live input (or replay a WAV file through the same path) "
                    "and write every pass-by to an SQLite log. Options override the "
                    "configuration file. Stops cleanly on SIGTERM or SIGINT.",
    )
    p.add_argument("--log", metavar="PATH", help="event log (SQLite; created if missing)")
    p.add_argument("--config", metavar="TOML", help="station configuration file")
    p.add_argument("--temperature", metavar="C", type=float,
                   help="air temperature, degrees C (overrides the file's [air] keys)")
    p.add_argument("--device", metavar="D", type=device_option,
                   help="input device: index or part of its name (see 'passby devices')")
    p.add_argument("--rate", metavar="R", type=int, help="sampling rate, Hz")
    p.add_argument("--channel", metavar="N", type=int, help="input channel, from 1")
    p.add_argument("--replay", metavar="WAV", help="replay a WAV file instead of live input")
    p.add_argument("--realtime", action="store_true",
                   help="with --replay: at the recording's pace (default: as fast as possible)")
    p.add_argument("--clips", metavar="DIR", help="keep each event's audio as a WAV here")
    p.add_argument("--clip-quota-mb", metavar="N", type=float,
                   help="disk quota of the clips, MB (oldest deleted first)")
    p.add_argument("--station-id", metavar="ID", help="station name written in every event")
    return p


def run(args) -> int:
    from passby.config import load_config
    from passby.station import Station, configure_logging, station_options

    if args.realtime and not args.replay:
        raise ConfigError("only goes with --replay", where="--realtime")
    cfg = load_config(args.config) if args.config else None
    opts = station_options(
        cfg, log=args.log, temperature_c=args.temperature, device=args.device,
        rate=args.rate, channel=args.channel, replay=args.replay, realtime=args.realtime,
        clips=args.clips, clip_quota_mb=args.clip_quota_mb, station_id=args.station_id)
    configure_logging()
    station = Station(opts)

    def on_signal(signum, frame):
        station.stop()

    previous = {s: signal.signal(s, on_signal) for s in (signal.SIGTERM, signal.SIGINT)}
    try:
        return station.run()
    finally:
        for s, handler in previous.items():
            signal.signal(s, handler)
