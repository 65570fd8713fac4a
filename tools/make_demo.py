"""Write the demo recordings in recordings_demo/ from invented scenes.

Usage::

    python tools/make_demo.py [--out DIR]

Every scene is an invented one: "Tollowmere Lane", a made-up country road
(cars with engine harmonics), and the "Essendry Vale branch", a made-up branch
line with a level crossing (train horn chords). The recordings are rendered
by :mod:`passby.simulation` (retarded-time synthesis, ground reflection,
coloured noise) with fixed seeds, so every run writes the same files byte
for byte: the WAVs (16-bit PCM, mono), ``truth.json`` with the true values
and ``README.md`` with the same values as a table.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys
from dataclasses import dataclass

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
if ROOT not in sys.path:
    sys.path.insert(0, ROOT)

from passby.simulation import (  # noqa: E402
    Interferer,
    Scene,
    Tone,
    Vehicle,
    background_noise_rms,
    frame_count,
    harmonic_tones,
    render,
    scale_to_peak,
    speed_of_sound_iso,
    vehicle_snr_db,
)
from passby.wavio import write_wav  # noqa: E402

KMH = 3.6  # km/h per m/s (exact)
TOLLOWMERE = "Tollowmere Lane (invented country road)"
ESSENDRY = "Essendry Vale branch level crossing (invented branch line)"


@dataclass(frozen=True)
class Demo:
    file: str
    site: str
    note: str
    scene: Scene
    kinds: tuple[str, ...]  # "car" or "train", one per vehicle
    peak: float


def _kmh(kmh):
    return kmh / KMH


def demos():
    """The demo scenes, in the order of the README table."""
    out = []

    car = Vehicle(_kmh(48.0), 6.5, 12.4, harmonic_tones(47.5, [0.15, 1.0, 0.35, 0.55, 0.2, 0.3]),
                  source_height_m=0.5, wander_rms=0.003, tyre_noise=0.25)
    out.append(Demo("tollowmere_lane_car_48kmh.wav", TOLLOWMERE,
                    "one car, engine harmonics (2nd order strongest)",
                    Scene((car,), 24.0, 16000, temperature_c=8.0, mic_height_m=1.2,
                          ground_reflection=0.7, noise="road", snr_db=15.0, seed=101),
                    ("car",), 0.5))

    near = Vehicle(_kmh(40.0), 5.5, 13.0, harmonic_tones(43.0, [0.2, 1.0, 0.3, 0.5]),
                   source_height_m=0.5, wander_rms=0.003, tyre_noise=0.2)
    far = Vehicle(_kmh(72.0), 8.5, 16.5, harmonic_tones(58.0, [0.1, 0.8, 0.4, 0.6, 0.3]),
                  source_height_m=0.5, wander_rms=0.003, tyre_noise=0.3)
    out.append(Demo("tollowmere_lane_two_cars.wav", TOLLOWMERE,
                    "two cars in opposite lanes, passes 3.5 s apart",
                    Scene((near, far), 30.0, 16000, temperature_c=8.0, mic_height_m=1.2,
                          ground_reflection=0.7, noise="road", snr_db=12.0, seed=102),
                    ("car", "car"), 0.5))

    fast = Vehicle(_kmh(86.0), 7.0, 12.5, harmonic_tones(62.0, [0.3, 1.0, 0.45, 0.6, 0.25, 0.3]),
                   source_height_m=0.5, wander_rms=0.002, tyre_noise=0.35)
    hum = (Interferer(100.0, 0.02, wobble_rms=0.0002), Interferer(150.0, 0.008, wobble_rms=0.0002))
    out.append(Demo("tollowmere_lane_car_86kmh_hum.wav", TOLLOWMERE,
                    "one car beside a substation: steady 100 Hz and 150 Hz hum",
                    Scene((fast,), 24.0, 16000, temperature_c=8.0, mic_height_m=1.2,
                          ground_reflection=0.7, noise="road", snr_db=9.0, interferers=hum,
                          seed=103),
                    ("car",), 0.5))

    t0 = 15.0
    horn3 = Vehicle(_kmh(95.0), 14.0, t0, (Tone(311.0, 5.0), Tone(370.0, 4.0), Tone(494.0, 3.5)),
                    source_height_m=3.8, on_s=t0 - 9.0, off_s=t0 + 3.0, ramp_s=0.08,
                    wander_rms=0.001, tyre_noise=1.2, tyre_cutoff_hz=1500.0)
    out.append(Demo("essendry_vale_horn_95kmh.wav", ESSENDRY,
                    "train sounding a three-tone horn through the crossing",
                    Scene((horn3,), 28.0, 22050, temperature_c=8.0, mic_height_m=1.5,
                          ground_reflection=0.7, noise="road", snr_db=10.0, seed=104),
                    ("train",), 0.5))

    t0 = 16.0
    horn5 = Vehicle(_kmh(118.0), 22.0, t0,
                    (Tone(262.0, 3.0), Tone(311.0, 4.0), Tone(370.0, 3.5), Tone(440.0, 3.0),
                     Tone(523.0, 2.0)),
                    source_height_m=3.8, on_s=t0 - 10.0, off_s=t0 + 5.0, ramp_s=0.08,
                    wander_rms=0.001, tyre_noise=1.5, tyre_cutoff_hz=1500.0)
    out.append(Demo("essendry_vale_horn_118kmh.wav", ESSENDRY,
                    "fast train, five-tone horn, far track, low SNR",
                    Scene((horn5,), 28.0, 22050, temperature_c=8.0, mic_height_m=1.5,
                          ground_reflection=0.7, noise="road", snr_db=5.0, seed=105),
                    ("train",), 0.5))

    out.append(Demo("tollowmere_lane_noise_only.wav", TOLLOWMERE,
                    "road background only: no event expected",
                    Scene((), 16.0, 16000, temperature_c=8.0, noise="road", snr_db=None,
                          noise_level=0.02, seed=106),
                    (), 0.2))
    return out


def _r(x, n=6):
    return round(float(x), n)


def truth_entry(demo, gain):
    sc = demo.scene
    c = speed_of_sound_iso(sc.temperature_c)
    vehicles = []
    for k, (v, kind) in enumerate(zip(sc.vehicles, demo.kinds)):
        entry = {
            "kind": kind,
            "speed_mps": _r(v.speed_mps),
            "speed_kmh": _r(v.speed_mps * KMH, 3),
            "closest_m": _r(v.closest_m),
            "pass_time_s": _r(v.pass_time_s),
            "pass_heard_s": _r(v.pass_time_s + v.closest_m / c),
            "tones_hz": [_r(t.freq_hz) for t in v.tones],
            "tone_amplitudes_at_1m": [_r(t.amplitude) for t in v.tones],
            "snr_db": _r(vehicle_snr_db(sc, k), 3),
            "source_height_m": _r(v.source_height_m),
            "pitch_wander_rms": _r(v.wander_rms),
            "tyre_noise_rms_at_1m": _r(v.tyre_noise),
        }
        if math.isfinite(v.on_s) or math.isfinite(v.off_s):
            entry["tones_on_s"] = _r(v.on_s)
            entry["tones_off_s"] = _r(v.off_s)
        vehicles.append(entry)
    return {
        "site": demo.site,
        "description": demo.note,
        "event_expected": bool(sc.vehicles),
        "sample_rate": sc.sample_rate,
        "frames": frame_count(sc),
        "duration_s": _r(sc.duration_s),
        "encoding": "pcm16",
        "temperature_c": _r(sc.temperature_c),
        "speed_of_sound_mps": _r(c),
        "mic_height_m": _r(sc.mic_height_m),
        "ground_reflection": _r(sc.ground_reflection),
        "noise": sc.noise,
        "noise_rms_full_scale": _r(background_noise_rms(sc) * gain, 8),
        "gain": _r(gain, 9),
        "seed": sc.seed,
        "vehicles": vehicles,
        "interferers": [{"kind": i.kind, "freq_hz": _r(i.freq_hz),
                         "amplitude_full_scale": _r(i.amplitude * gain, 8)} for i in sc.interferers],
    }


def readme(truth):
    lines = [
        "# Demo recordings",
        "",
        "Simulated recordings of invented scenes, for trying passby and for",
        "checking it against known truth. Tollowmere Lane is a made-up country road",
        "and the Essendry Vale branch a made-up branch line with a level crossing; no",
        "real place, vehicle or product is depicted.",
        "",
        "Each file is mono 16-bit PCM. The true values are below and, machine",
        "readable, in `truth.json`. Give the analysis the air temperature of the",
        "file, e.g. `passby analyze recordings_demo/tollowmere_lane_car_48kmh.wav",
        "--temperature 8`; the speed of sound the simulator used is",
        "c = 343.2 sqrt(T / 293.15 K) m/s (ISO 9613-1).",
        "",
        "| file | temperature (C) | speed km/h (m/s) | closest approach (m) | pass time t0 (s) | tones (Hz) | SNR (dB) |",
        "| --- | --- | --- | --- | --- | --- | --- |",
    ]
    for name, e in truth["files"].items():
        if not e["vehicles"]:
            lines.append(f"| {name} | {e['temperature_c']:g} | no vehicle | | | | |")
        for v in e["vehicles"]:
            tones = ", ".join(f"{f:g}" for f in v["tones_hz"])
            lines.append(f"| {name} | {e['temperature_c']:g} | {v['speed_kmh']:.1f} ({v['speed_mps']:.3f}) "
                         f"| {v['closest_m']:g} | {v['pass_time_s']:g} | {tones} | {v['snr_db']:.1f} |")
    lines += [
        "",
        "What is in each file:",
        "",
    ]
    for name, e in truth["files"].items():
        extra = ""
        if e["interferers"]:
            extra = "; interferers: " + ", ".join(f"{i['kind']} {i['freq_hz']:g} Hz" for i in e["interferers"])
        lines.append(f"- `{name}` ({e['site']}, {e['sample_rate']} Hz, {e['duration_s']:g} s): "
                     f"{e['description']}{extra}.")
    lines += [
        "",
        "Definitions: the pass time t0 is the emission time of closest approach,",
        "in seconds from the start of the file; that sound is heard",
        "closest / c later (`pass_heard_s` in `truth.json`). The closest",
        "approach is the 3-D distance of the direct path. Tones are the rest",
        "(emitted) frequencies; engines have a slow random pitch wander of",
        "0.2-0.3 % RMS around them. The SNR is 10 log10(P_tone / P_noise), with",
        "P_tone the mean power of the vehicle's direct-path tones at closest",
        "approach and P_noise the variance of the background noise over the",
        "whole band; tyre (wheel) noise carried by the vehicle, the ground",
        "reflection (coefficient 0.7, image source) and interferers come on top.",
        "",
        "How they were made: `python tools/make_demo.py` renders each scene with",
        "`passby.simulation` (pressure synthesised from the retarded time of",
        "every sample, spherical spreading, ground reflection, coloured noise)",
        "with fixed seeds, scales it to a peak of 0.5 (0.2 for the noise-only",
        "file) and writes the same bytes on every run.",
        "",
    ]
    return "\n".join(lines)


def main(argv=None):
    parser = argparse.ArgumentParser(description="Write the demo recordings and their true values.")
    parser.add_argument("--out", default=os.path.join(ROOT, "recordings_demo"),
                        help="output directory (default: recordings_demo/ of the repository)")
    args = parser.parse_args(argv)
    os.makedirs(args.out, exist_ok=True)
    truth = {
        "about": "True values of the simulated demo recordings (invented scenes); "
                 "times in s from the file start, SI units, speed also in km/h.",
        "files": {},
    }
    for demo in demos():
        scene = scale_to_peak(demo.scene, demo.peak)
        x = render(scene)
        path = os.path.join(args.out, demo.file)
        write_wav(path, x, scene.sample_rate, encoding="pcm16")
        truth["files"][demo.file] = truth_entry(demo, scene.gain)
        print(f"{path}: {x.size / scene.sample_rate:g} s, {os.path.getsize(path)} bytes")
    with open(os.path.join(args.out, "truth.json"), "w", encoding="utf-8", newline="\n") as f:
        f.write(json.dumps(truth, indent=2) + "\n")
    with open(os.path.join(args.out, "README.md"), "w", encoding="utf-8", newline="\n") as f:
        f.write(readme(truth))
    return 0


if __name__ == "__main__":
    sys.exit(main())
