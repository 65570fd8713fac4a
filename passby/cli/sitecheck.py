"""``passby sitecheck``: is the input's level right for pass-by measurement?

Records a few seconds of background (no vehicle passing) and prints the
RMS and peak levels, clipped samples, the background by octave band and a
plain verdict (see :mod:`passby.sitecheck`).
"""

from __future__ import annotations

import numpy as np

from passby.config import device_option



def add_parser(sub):
    p = sub.add_parser(
        "sitecheck", help="check the input level and background noise at a site",
        description="Record a few seconds of the site's background (with no vehicle "
                    "passing) and judge whether the gain suits pass-by measurement.")
    p.add_argument("--config", metavar="TOML", help="station configuration ([audio] keys)")
    p.add_argument("--device", metavar="D", type=device_option,
                   help="input device: index or part of its name (see 'passby devices')")
    p.add_argument("--rate", metavar="R", type=int, help="sampling rate, Hz")
    p.add_argument("--channel", metavar="N", type=int, help="input channel, from 1")
    p.add_argument("--seconds", metavar="S", type=float, default=5.0,
                   help="how long to listen (default 5)")
    p.add_argument("--replay", metavar="WAV", help="check a WAV file instead of live input")
    return p


def _record(device, rate, channel, seconds):
    from passby.errors import DeviceError
    from passby.station import import_sounddevice

    sd = import_sounddevice()
    try:
        info = sd.query_devices(device, "input")
        rate = int(rate or round(float(info["default_samplerate"])))
        if int(info["max_input_channels"]) < channel:
            raise DeviceError(f"the device has {info['max_input_channels']} input channel(s), "
                              f"channel {channel} asked for", where=info["name"])
        x = sd.rec(int(round(seconds * rate)), samplerate=rate, channels=channel,
                   device=device, dtype="float32", blocking=True)
    except (sd.PortAudioError, ValueError) as exc:
        raise DeviceError(" ".join(str(exc).split()), where="audio input") from None
    return np.asarray(x[:, channel - 1], dtype=float), rate, str(info["name"])


def run(args) -> int:
    from passby.config import check_value, load_config
    from passby.errors import ConfigError
    from passby.sitecheck import site_check
    from passby.wavio import probe_wav, read_wav

    cfg = load_config(args.config) if args.config else None
    for option, key, value in (("--rate", "rate", args.rate), ("--channel", "channel", args.channel)):
        if value is not None:
            try:
                check_value("audio", key, value)
            except ValueError as exc:
                raise ConfigError(str(exc), where=option) from None
    if not 0.5 <= args.seconds <= 600:
        raise ConfigError("must be from 0.5 to 600 s", where="--seconds")
    channel = args.channel or (cfg.channel if cfg else 1)
    if args.replay:
        info = probe_wav(args.replay)
        x, rate = read_wav(args.replay, channel=channel - 1 if info.channels > 1 else None)
        x = x[: int(round(args.seconds * rate))]
        name = args.replay
    else:
        device = args.device if args.device is not None else (cfg.device if cfg else None)
        rate = args.rate or (cfg.rate if cfg else None)
        x, rate, name = _record(device, rate, channel, args.seconds)
    r = site_check(x, rate)
    print(f"input: {name}, {rate} Hz, channel {channel}, {r.duration_s:.1f} s")
    print(f"level: RMS {r.rms_db:.1f} dB re full scale, peak {r.peak_db:.1f} dB, "
          f"{r.clipped} clipped samples")
    print("background by octave band (IEC 61260-1 mid-band frequencies), dB re full scale:")
    for hz, db in r.bands:
        label = f"{hz} Hz" if hz < 1000 else f"{hz // 1000} kHz"
        print(f"  {label:>7}  {db:6.1f}")
    for note in r.notes:
        print(f"note: {note}")
    print(f"verdict: {r.verdict}")
    return 0
