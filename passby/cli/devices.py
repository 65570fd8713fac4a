"""``passby devices``: the audio input devices PortAudio sees."""

from __future__ import annotations

import sys


def add_parser(sub):
    return sub.add_parser(
        "devices", help="list the audio input devices",
        description="List the input devices (index, name, input channels, default rate); "
                    "the default input is marked with '*'. Use the index or part of the "
                    "name with --device.")


def run(args) -> int:
    from passby.errors import DeviceError
    from passby.station import import_sounddevice

    sd = import_sounddevice()
    try:
        devices = list(sd.query_devices())
        default_in = sd.default.device[0] if hasattr(sd, "default") else None
    except sd.PortAudioError as exc:
        raise DeviceError(f"cannot list the devices: {' '.join(str(exc).split())}",
                          where="audio input") from None
    rows = [(i, d) for i, d in enumerate(devices) if int(d.get("max_input_channels", 0)) > 0]
    if not rows:
        print("no audio input device found", file=sys.stderr)
        return 0
    print(f"{'':1} {'index':>5}  {'inputs':>6}  {'rate Hz':>8}  name")
    for i, d in rows:
        mark = "*" if i == default_in else " "
        print(f"{mark} {i:>5}  {int(d['max_input_channels']):>6}  "
              f"{float(d['default_samplerate']):>8.0f}  {d['name']}")
    return 0
