"""``passby calibrate``: the level offset from a recording of a sound calibrator.

Record the calibrator's tone through the station's own microphone and
input (same gain settings), then::

    passby calibrate cal.wav --reference-db 94 --config site.toml

prints the offset and writes it to ``[level] offset_db`` of the
configuration, so that the station's LAFmax values are in dB re 20 uPa.
"""

from __future__ import annotations

import math

LEVEL_NOTICE = ("Note: a microphone chain not certified to IEC 61672-1 gives "
                "indicative levels only.")


def add_parser(sub):
    p = sub.add_parser(
        "calibrate", help="level offset from a sound calibrator recording",
        description="Measure the level offset of the microphone chain from a WAV "
                    "recording of an acoustic calibrator (for example 94 dB at 1 kHz) "
                    "and optionally write it to the station configuration. "
                    + LEVEL_NOTICE)
    p.add_argument("wav", metavar="WAV", help="recording of the calibrator's tone (a few seconds)")
    p.add_argument("--reference-db", type=float, default=94.0, metavar="DB",
                   help="sound pressure level of the calibrator, dB re 20 uPa (default 94)")
    p.add_argument("--tone-hz", type=float, default=1000.0, metavar="HZ",
                   help="calibrator frequency (default 1000)")
    p.add_argument("--channel", type=int, metavar="N",
                   help="1-based channel of the WAV (default: the mean of all)")
    p.add_argument("--config", metavar="TOML",
                   help="write the offset to [level] offset_db of this configuration")
    return p


def run(args) -> int:
    from passby.errors import InputError
    from passby.level import calibration_offset
    from passby.wavio import read_wav

    ref = float(args.reference_db)
    if not (math.isfinite(ref) and 40.0 <= ref <= 160.0):
        raise InputError(f"--reference-db {args.reference_db!r} is not a calibrator level "
                         "(40 to 160 dB)", where="calibrate")
    if args.channel is not None and args.channel < 1:
        raise InputError("--channel counts from 1", where="calibrate")
    channel = None if args.channel is None else args.channel - 1
    x, fs = read_wav(args.wav, channel=channel)
    offset = calibration_offset(x, fs, reference_db=ref, tone_hz=args.tone_hz, where=args.wav)
    print(f"calibrator tone recorded at {ref - offset:.2f} dB re full scale")
    print(f"level offset: {offset:.2f} dB (calibrator {ref:g} dB re 20 uPa at {args.tone_hz:g} Hz)")
    if args.config:
        from passby.config import write_level_offset
        write_level_offset(args.config, offset)
        print(f"written to {args.config} as [level] offset_db")
    else:
        print("not written anywhere (give --config TOML to keep it)")
    print(LEVEL_NOTICE)
    return 0
