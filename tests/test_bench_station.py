"""The station benchmark script: its yardsticks, its scene, and a smoke run.

No timing is asserted here (speed goals belong to the benchmark itself);
the smoke run only has to produce every table with numbers in it.
"""

import doctest
import importlib.util
import pathlib
import re
import subprocess
import sys
import tempfile

import numpy as np
import pytest

from passby.simulation import vehicle_snr_db

ROOT = pathlib.Path(__file__).resolve().parents[1]
SCRIPT = ROOT / "tools" / "bench_station.py"


@pytest.fixture(scope="module")
def bench():
    spec = importlib.util.spec_from_file_location("passby_bench_station", SCRIPT)
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module
    spec.loader.exec_module(module)
    return module


def test_doctests_of_the_script(bench):
    result = doctest.testmod(bench)
    assert result.attempted >= 4 and result.failed == 0


def test_tolerance_follows_the_radar_rule(bench):
    # OIML R 91 (1990): +-1 km/h up to 100 km/h, +-1 % above (from memory).
    assert bench.tolerance_kmh(30.0) == 1.0
    assert bench.tolerance_kmh(100.0) == 1.0
    assert bench.tolerance_kmh(140.0) == pytest.approx(1.4)
    assert bench.tolerance_kmh(140.0, 3.0) == pytest.approx(4.2)


def test_error_statistics_worked_by_hand(bench):
    # |e| = 2, 1, 0, 1, 3.5 sorted 0, 1, 1, 2, 3.5: median 1; 95th percentile by
    # linear interpolation (Hyndman and Fan 1996, type 7): h = 4 * 0.95 = 3.8,
    # 2 + 0.8 * (3.5 - 2) = 3.2. Within +-1 km/h (all below 100 km/h): 3 of 5;
    # within +-3 km/h: 4 of 5 (3.5 is outside).
    st = bench.speed_error_stats([-2.0, -1.0, 0.0, 1.0, 3.5], [50.0] * 5)
    assert st["n"] == 5
    assert st["med"] == pytest.approx(1.0)
    assert st["p95"] == pytest.approx(3.2)
    assert st["max"] == pytest.approx(3.5)
    assert st["bias"] == pytest.approx(0.3)
    assert st["in1"] == pytest.approx(60.0)
    assert st["in3"] == pytest.approx(80.0)


def test_matching_and_comparison(bench):
    truth = [dict(pass_time_s=t, speed_mps=20.0, kind="car", heard_from_s=t - 10.0, heard_to_s=t + 10.0)
             for t in (20.0, 60.0, 100.0)]
    ev = [dict(pass_time_s=t, speed_mps=20.0 + dv, quality=q, start_s=t - 5.0, end_s=t + 5.0,
               closest_m=6.0, emitted_hz=120.0)
          for t, dv, q in ((20.3, 0.1, "good"), (20.6, 0.0, "fair"), (59.1, 0.0, "rejected"),
                           (140.0, 0.0, "good"))]
    # 59.1 s is 0.9 s from the vehicle at 60 s: it belongs to it. The fan runs
    # 130-135 s and spins down for FAN_SPIN_S (3 s) more; the event at 140 s,
    # whose tracks cover 135-145 s, overlaps that and no vehicle: the fan's.
    s = bench.score(ev, truth, [(130.0, 135.0)])
    assert s["per_vehicle"] == [[0, 1], [2], []]
    assert s["once"] == [1] and s["dups"] == [0] and s["missing"] == [2]
    assert s["only_rejected"] == [1]
    assert s["spurious"] == [3] and s["spurious_by"]["fan"] == [3]
    assert s["spurious_accepted"] == [3]              # graded good: it would enter a study
    assert s["fan_edges"] == (0, 1)                   # its tracks start as the fan stops
    # The best event of vehicle 0 is the nearer in time (20.3 s): +0.1 m/s.
    assert s["stats"]["all"]["n"] == 1
    assert s["stats"]["all"]["max"] == pytest.approx(0.1 * 3.6)
    c = bench.compare_runs(ev, ev[:3])
    assert (c["n_a"], c["n_b"], c["unpaired_a"], c["unpaired_b"]) == (4, 3, 1, 0)
    assert c["d_speed_kmh"] == 0.0 and c["quality_differs"] == 0


def test_scene_holds_what_it_says(bench):
    scene, truth, fans, quiet, fan_hz = bench.site_scene(900.0, 5)
    assert len(truth) == len(scene.vehicles) >= 10
    kinds = {v["kind"] for v in truth}
    assert kinds == {"car", "train"}
    for k, v in enumerate(truth):
        # The simulator's own SNR definition (passby.simulation.Scene) must give the drawn SNR.
        assert vehicle_snr_db(scene, k) == pytest.approx(v["snr_db"], abs=1e-9)
        assert 5.0 <= v["snr_db"] <= 25.0
        kmh = v["speed_mps"] * 3.6
        if v["kind"] == "car":
            assert 30.0 <= kmh <= 110.0 and 3.0 <= v["closest_m"] <= 15.0
            f1 = v["tones_hz"][0]
            assert 40.0 <= f1 <= 90.0 and v["tones_hz"][1] == pytest.approx(2.0 * f1)
        else:
            assert 60.0 <= kmh <= 140.0 and 10.0 <= v["closest_m"] <= 30.0
            assert 3 <= len(v["tones_hz"]) <= 5 and all(250.0 <= f <= 700.0 for f in v["tones_hz"])
        # No vehicle is heard in a quiet span.
        assert not any(a < v["heard_to_s"] and v["heard_from_s"] < b for a, b in quiet)
    gaps = np.diff([v["pass_time_s"] for v in truth])
    assert gaps.min() >= 20.0
    assert [i.kind for i in scene.interferers] == ["fan"] * len(fans) and len(fans) >= 1
    assert 120.0 <= fan_hz <= 200.0
    # Seeded: the same scene twice.
    again = bench.site_scene(900.0, 5)[0]
    assert again == scene


def _cells(text, label):
    """The cells of the table row whose first cell starts with ``label``."""
    for line in text.splitlines():
        if line.startswith("| " + label):
            return [c.strip() for c in line.strip("|").split("|")]
    raise AssertionError(f"no row {label!r}")


def _number(cell):
    m = re.search(r"-?\d+(\.\d+)?", cell)
    assert m, cell
    return float(m.group(0))


def test_smoke_run_writes_every_table(bench, tmp_path):
    out = tmp_path / "results.md"
    done = subprocess.run([sys.executable, str(SCRIPT), "--smoke", "--no-readme", "--out", str(out)],
                          cwd=ROOT, capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr[-3000:]
    text = out.read_text()
    for head in ("**Replay as fast as it goes**", "**The log against the truth**", "**Speed errors**",
                 "**Station against `passby.api.analyze`**", "**Live mode**", "**Reports**", "Machine:"):
        assert head in text
    # No machine paths in a file meant to be committed.
    assert tempfile.gettempdir() not in text and str(tmp_path) not in text and str(ROOT) not in text
    rtf = _number(_cells(text, "real-time factor (audio s / wall s)")[1])
    assert rtf > 0
    mb = _number(_cells(text, "peak memory, 75 s")[1])
    assert 5.0 < mb < 10000.0
    scene, truth = bench.site_scene(bench.SMOKE["main_s"], 2031)[:2]
    once = _cells(text, "vehicles with exactly one event")[1]
    assert once.endswith(f"of {len(truth)}")
    station, analyzed = (int(x) for x in _cells(text, "events: station / analyze()")[1].split(" / "))
    assert station >= 0 and analyzed >= 0
    assert _number(_cells(text, "CPU seconds per second of audio, whole run")[1]) > 0
    assert _number(_cells(text, "`passby report LOG --plot OUT.png`, end to end")[1]) > 0
    assert _number(_cells(text, "figure function alone")[1]) > 0
    assert _number(_cells(text, "`passby export LOG --csv`")[1]) > 0
    for line in text.splitlines():
        if line.startswith("| ") and line.count("|") == 5 and not line.startswith(("| measure", "| ---")):
            assert line.strip().strip("|").split("|")[-1].strip() in ("pass", "FAIL", "n/a", ""), line
