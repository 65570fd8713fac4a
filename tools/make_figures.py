"""Make the README's figures and the demo station log from simulated traffic.

    python tools/make_figures.py

Writes, from invented scenes only:

- ``recordings_demo/tollowmere_lane_morning.sqlite``: a station log of a
  made-up weekday morning on Tollowmere Lane (07:00-10:00 UTC, 2026-05-12):
  each vehicle is simulated (passby.simulation) and analysed by the same
  pipeline as ``passby analyze``; its event is logged at the simulated
  time of passing. ``tollowmere_lane_morning_truth.csv`` lists the true values.
- ``recordings_demo/figures/study.png``: ``passby report ... --plot``.
- ``recordings_demo/figures/two_cars.png``: ``passby plot`` of a demo WAV.

Deterministic: the same seed gives the same log and figures.
"""

from __future__ import annotations

import csv
import datetime as dt
import os
import pathlib
import subprocess
import sys

import numpy as np

ROOT = pathlib.Path(__file__).resolve().parents[1]
DEMO = ROOT / "recordings_demo"
FIGURES = DEMO / "figures"
LOG = DEMO / "tollowmere_lane_morning.sqlite"
TRUTH = DEMO / "tollowmere_lane_morning_truth.csv"
START = dt.datetime(2026, 5, 12, 7, 0, 0, tzinfo=dt.timezone.utc)
HOURS = 3
TEMPERATURE_C = 11.0
STATION = "tollowmere-lane-1"
SEED = 20260512


def morning_traffic(rng):
    """Vehicles of the invented morning: times, speeds, distances, tones."""
    t, out = 0.0, []
    while True:
        t += rng.exponential(60.0) + 10.0          # about 50 vehicles an hour
        if t > HOURS * 3600.0:
            return out
        speed_kmh = float(np.clip(rng.normal(47.0, 7.5), 20.0, 85.0))
        lane = rng.integers(2)
        closest = float(rng.uniform(3.0, 4.5) if lane == 0 else rng.uniform(6.0, 8.0))
        f1 = float(rng.uniform(40.0, 85.0))
        amps = [0.3, 1.0, float(rng.uniform(0.3, 0.8)), float(rng.uniform(0.2, 0.6))]
        out.append(dict(time_s=t, speed_kmh=speed_kmh, closest_m=closest, f1_hz=f1, amps=amps,
                        snr_db=float(rng.uniform(6.0, 20.0)), seed=int(rng.integers(1 << 30))))


def build_log():
    from passby import analyze
    from passby.simulation import Scene, Vehicle, harmonic_tones, render
    from passby.store import EventLog

    rng = np.random.default_rng(SEED)
    vehicles = morning_traffic(rng)
    for p in (LOG, LOG.with_name(LOG.name + "-wal"), LOG.with_name(LOG.name + "-shm")):
        if p.exists():
            p.unlink()
    clip_s, pass_at = 16.0, 8.0
    rows = []
    with EventLog(LOG, create=True) as log:
        for i, v in enumerate(vehicles, 1):
            veh = Vehicle(v["speed_kmh"] / 3.6, v["closest_m"], pass_at,
                          harmonic_tones(v["f1_hz"], v["amps"]), wander_rms=0.001)
            scene = Scene((veh,), clip_s, 8000, temperature_c=TEMPERATURE_C, ground_reflection=0.6,
                          snr_db=v["snr_db"], seed=v["seed"])
            x = render(scene)
            result = analyze(x / np.max(np.abs(x)) * 0.7, sample_rate=8000, temperature_c=TEMPERATURE_C)
            clip_start = START + dt.timedelta(seconds=v["time_s"] - pass_at)
            for ev in result.events:
                when = clip_start + dt.timedelta(seconds=ev.pass_time_s)
                log.add(ev, when.strftime("%Y-%m-%dT%H:%M:%S.%fZ"), STATION)
            rows.append((i, (START + dt.timedelta(seconds=v["time_s"])).strftime("%Y-%m-%dT%H:%M:%S.%fZ"),
                         round(v["speed_kmh"], 2), round(v["closest_m"], 2), round(v["f1_hz"] * 2, 2),
                         len(result.events)))
            if sys.stderr.isatty():
                print(f"\rvehicle {i}/{len(vehicles)}", end="", file=sys.stderr, flush=True)
    print(f"{len(vehicles)} vehicles simulated and logged in {LOG.name}", file=sys.stderr)
    with open(TRUTH, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["vehicle", "pass_time_utc", "speed_kmh", "closest_m", "strongest_tone_hz", "events_logged"])
        w.writerows(rows)


def passby(*args):
    subprocess.run([sys.executable, "-m", "passby", *args], cwd=ROOT, check=True,
                   env=dict(os.environ, MPLBACKEND="Agg"))


def main() -> int:
    FIGURES.mkdir(parents=True, exist_ok=True)
    build_log()
    passby("report", str(LOG.relative_to(ROOT)), "--limit", "50",
           "--plot", str((FIGURES / "study.png").relative_to(ROOT)))
    passby("plot", "recordings_demo/tollowmere_lane_two_cars.wav", "--temperature", "8",
           "--out", str((FIGURES / "two_cars.png").relative_to(ROOT)))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
