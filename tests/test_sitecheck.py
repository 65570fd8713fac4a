"""``passby sitecheck``: levels, octave bands and the verdict."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import signal

from passby.cli import main
from passby.sitecheck import (OCTAVE_BANDS_HZ, octave_band_edges, octave_band_levels,
                              site_check)
from passby.wavio import write_wav

FS = 48000


def sine(freq, amplitude=1.0, seconds=2.0, fs=FS):
    t = np.arange(int(seconds * fs)) / fs
    return amplitude * np.sin(2 * np.pi * freq * t)


def test_mid_band_frequencies_are_those_of_iec_61260():
    # IEC 61260-1:2014, Annex E, Table E.1 (base ten), exact mid-band
    # frequencies of the octave bands 63 Hz .. 8 kHz, rounded to 5 digits
    # (from memory; they follow from f_m = 1000 Hz * 10**(3x/10)).
    table = {63: 63.096, 125: 125.89, 250: 251.19, 500: 501.19, 1000: 1000.0,
             2000: 1995.3, 4000: 3981.1, 8000: 7943.3}
    for nominal, x in OCTAVE_BANDS_HZ:
        lo, fm, hi = octave_band_edges(x)
        assert fm == pytest.approx(table[nominal], rel=5e-5)
        # IEC 61260-1, 5.5: the edges are a factor G**(1/2) either side.
        assert hi / lo == pytest.approx(10 ** 0.3, rel=1e-12)


def test_a_tone_reads_its_level_in_its_band_and_3_db_less_at_the_edge():
    lo, fm, hi = octave_band_edges(0)
    # A sine of amplitude A has a mean square of A**2 / 2: -3.01 dB re full scale.
    at_centre = dict(octave_band_levels(sine(fm, 0.5), FS))
    assert at_centre[1000] == pytest.approx(10 * math.log10(0.125), abs=0.05)
    # Half an octave beyond the neighbours' edges a 3rd-order prototype
    # attenuates by about 19-20 dB (see the sosfreqz test below).
    assert at_centre[500] < at_centre[1000] - 15 and at_centre[2000] < at_centre[1000] - 15
    # Butterworth band-pass: -3.01 dB (half power) at each band edge.
    at_edge = dict(octave_band_levels(sine(hi, 0.5), FS))
    assert at_edge[1000] == pytest.approx(10 * math.log10(0.125) - 10 * math.log10(2), abs=0.1)


def test_band_filter_matches_scipy_frequency_response():
    # The level of a tone in a band equals the tone's level plus the filter's
    # gain there, as scipy.signal.sosfreqz computes it.
    lo, fm, hi = octave_band_edges(-2)
    sos = signal.butter(3, [lo, hi], btype="bandpass", fs=FS, output="sos")
    f = 1.3 * hi
    _, h = signal.sosfreqz(sos, worN=[f], fs=FS)
    level = dict(octave_band_levels(sine(f, 0.5, seconds=3.0), FS))[250]
    assert level == pytest.approx(10 * math.log10(0.125) + 20 * math.log10(abs(h[0])), abs=0.1)


def test_bands_above_the_rate_are_left_out():
    assert [hz for hz, _ in octave_band_levels(sine(440, 0.1, fs=16000, seconds=1), 16000)] == \
        [63, 125, 250, 500, 1000, 2000, 4000]


def test_verdicts():
    rng = np.random.default_rng(7)
    noise = rng.standard_normal(5 * FS)
    ok = site_check(3e-3 * noise, FS)
    assert ok.ok and ok.verdict == "OK for pass-by measurement" and ok.clipped == 0
    # RMS of white noise of standard deviation s is s: 20 log10(3e-3) = -50.5 dB.
    assert ok.rms_db == pytest.approx(20 * math.log10(3e-3), abs=0.1)
    clipped = np.clip(0.6 * noise, -1.0, 1.0)
    n = int(np.count_nonzero(np.abs(0.6 * noise) >= 0.999))
    r = site_check(clipped, FS)
    assert not r.ok and r.verdict == f"gain too high: {n} clipped samples" and n > 0
    r = site_check(1e-5 * noise, FS)
    assert not r.ok and r.verdict.startswith("level too low: input is near the digital noise floor")
    r = site_check(0.1 * noise, FS)  # -20 dB background, peaks near -8 dB
    assert not r.ok and r.verdict.startswith("gain too high: the background alone")
    r = site_check(sine(100, 0.95), FS)  # peak -0.45 dB
    assert not r.ok and "no headroom" in r.verdict


def test_sitecheck_command_on_a_recording(tmp_path, capsys):
    rng = np.random.default_rng(3)
    path = tmp_path / "background.wav"
    write_wav(path, 3e-3 * rng.standard_normal(3 * FS), FS)
    assert main(["sitecheck", "--replay", str(path), "--seconds", "2"]) == 0
    out = capsys.readouterr().out.splitlines()
    assert out[0] == f"input: {path}, 48000 Hz, channel 1, 2.0 s"
    assert out[-1] == "verdict: OK for pass-by measurement"
    assert [line.split()[0] + " " + line.split()[1] for line in out[3:11]] == [
        "63 Hz", "125 Hz", "250 Hz", "500 Hz", "1 kHz", "2 kHz", "4 kHz", "8 kHz"]
