"""Stand-ins for the station's tests: a pipeline and a sound card.

``FakePipeline`` keeps the Pipeline interface and emits one event every
``period_s`` seconds of stream time, so the station shell (queue, losses,
time base, log, clips, signals) can be tested before and independently of
the real analysis. ``FakeSoundDevice`` looks like the parts of the
``sounddevice`` module the station uses and drives its callback with
scripted blocks, deterministically, from the consuming thread.

Run as a script it is ``passby`` with the fake pipeline in place of the real
one (for the subprocess tests): ``python tests/station_fakes.py station ...``;
``FAKE_PERIOD_S`` sets the event period.
"""

from __future__ import annotations

import os
import sys
import types

import numpy as np

from passby.events import PassEvent
from passby.physics import speed_of_sound


class FakePipeline:
    """One event every ``period_s`` s of stream time (samples plus gaps).

    The event at ``t0 = k * period_s`` is returned once the stream has
    reached ``t0 + 0.5`` s, with ``start_s = t0 - 1``, ``end_s = t0 + 0.5``,
    a speed of ``10 + k`` m/s and the temperature of the settings it holds
    at that moment. :meth:`finish` returns one last event at the end.
    """

    instances = []

    def __init__(self, sample_rate, settings=None, period_s=None):
        from passby.settings import AnalysisSettings

        self.sample_rate = int(sample_rate)
        self.settings = settings or AnalysisSettings()
        self.period_s = float(period_s or os.environ.get("FAKE_PERIOD_S", 2.0))
        self.n = 0
        self.pushed = 0
        self.push_calls = 0
        self.gaps = []  # (sample offset, samples, blocks)
        self.k = 1
        self.finished = False
        FakePipeline.instances.append(self)

    def _event(self, t0, quality="good", reason=None):
        c = float(speed_of_sound(self.settings.temperature_c))
        start, end = t0 - 1.0, t0 + 0.5
        dropped = sum(b for off, n, b in self.gaps
                      if off / self.sample_rate <= end and (off + n) / self.sample_rate >= start)
        return PassEvent(
            pass_time_s=t0, speed_mps=10.0 + self.k, speed_std_mps=0.1,
            tones_hz=(400.0 + self.k, 800.0), closest_approach_m=5.0,
            closest_approach_std_m=0.2, speed_of_sound_mps=c,
            temperature_c=self.settings.temperature_c, quality=quality, reason=reason,
            residual_hz=0.5, start_s=start, end_s=end, n_frames=42,
            dropped_blocks=dropped)

    def _due(self):
        out = []
        while self.n / self.sample_rate >= self.k * self.period_s + 0.5:
            out.append(self._event(self.k * self.period_s))
            self.k += 1
        return out

    def push(self, block):
        block = np.asarray(block)
        assert block.ndim == 1 and block.dtype == np.float64
        self.push_calls += 1
        self.n += len(block)
        self.pushed += len(block)
        return self._due()

    def push_gap(self, n_samples, blocks=1):
        self.gaps.append((self.n, int(n_samples), int(blocks)))
        self.n += int(n_samples)
        return self._due()

    def finish(self):
        self.finished = True
        e = self._event(self.n / self.sample_rate, quality="fair", reason="end of stream")
        return [e]


# --------------------------------------------------------------------------


class FakePortAudioError(Exception):
    pass


def block(frames=4800, value=0.0, overflow=False, adc=None, channels=1):
    """A scripted callback call."""
    return {"frames": frames, "value": value, "overflow": overflow, "adc": adc,
            "channels": channels}


class FakeStream:
    def __init__(self, device, phases, on_exhausted, vanish, callback, channels, samplerate):
        self.device = device
        self.phases = list(phases)
        self.on_exhausted = on_exhausted
        self.vanish = vanish
        self.callback = callback
        self.channels = channels
        self.samplerate = samplerate
        self.closed = False
        self.started = False

    def _deliver(self, phase):
        for spec in phase:
            if callable(spec):
                spec()
                continue
            n = spec["frames"]
            data = np.full((n, self.channels), spec["value"], dtype=np.float32)
            # channel k (0-based) carries value + k so the chosen one can be checked
            data += np.arange(self.channels, dtype=np.float32)[None, :]
            status = types.SimpleNamespace(input_overflow=spec["overflow"])
            t = types.SimpleNamespace(inputBufferAdcTime=spec["adc"] or 0.0,
                                      currentTime=0.0)
            self.callback(data, n, t, status)

    def start(self):
        self.started = True
        if self.phases:
            self._deliver(self.phases.pop(0))

    @property
    def active(self):
        if self.closed:
            return False
        if self.phases:
            self._deliver(self.phases.pop(0))
            return True
        if self.on_exhausted is not None:
            self.on_exhausted()
        return not self.vanish

    def stop(self):
        pass

    def close(self):
        self.closed = True


class FakeSoundDevice:
    """The parts of ``sounddevice`` the station uses.

    Parameters
    ----------
    script : list
        One entry per attempt to open the stream: an exception instance
        (the open fails with it) or a dict ``{"phases": [[block, ...], ...],
        "vanish": True}``; phase 0 is delivered by ``start()``, each later
        phase when the station polls an empty queue (``active``), and once
        they are spent the stream stops (``vanish``) or stays silent.
    """

    PortAudioError = FakePortAudioError

    def __init__(self, script, rate=48000, channels=2, name="Fake USB microphone",
                 on_exhausted=None):
        self.script = list(script)
        self.rate = rate
        self.channels = channels
        self.name = name
        self.on_exhausted = on_exhausted
        self.opened = []

    def query_devices(self, device=None, kind=None):
        info = {"name": self.name, "index": 0, "hostapi": 0,
                "max_input_channels": self.channels, "max_output_channels": 0,
                "default_samplerate": float(self.rate)}
        if device is None and kind is None:
            return [info]
        return info

    def InputStream(self, device=None, channels=1, samplerate=None, blocksize=None,
                    dtype=None, callback=None):
        if not self.script:
            raise FakePortAudioError("Error querying device -1")
        entry = self.script.pop(0)
        if isinstance(entry, BaseException):
            raise entry
        self.opened.append({"device": device, "channels": channels,
                            "samplerate": samplerate, "blocksize": blocksize,
                            "dtype": dtype})
        return FakeStream(device, entry["phases"], self.on_exhausted,
                          entry.get("vanish", True), callback, channels,
                          samplerate or self.rate)


def main(argv=None):
    import passby.pipeline

    passby.pipeline.Pipeline = FakePipeline
    from passby.cli import main as cli_main

    return cli_main(argv)


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
