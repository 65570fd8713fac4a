"""The analysis as a function, for engineers who script their studies.

Examples
--------
>>> import numpy as np
>>> from passby import analyze
>>> result = analyze(np.zeros(16000 * 5), sample_rate=16000, temperature_c=12.0)
>>> result.duration_s, result.events
(5.0, ())
"""

from __future__ import annotations

import os
from typing import Callable, Iterable

import numpy as np

from passby.errors import InputError
from passby.events import FileResult
from passby.pipeline import Pipeline
from passby.settings import AnalysisSettings
from passby.wavio import MAX_SAMPLE_RATE, MIN_SAMPLE_RATE, WavReader

#: Samples per block fed to the pipeline, as a duration.
BLOCK_S = 1.0


def run_blocks(blocks: Iterable[np.ndarray], sample_rate: int, settings: AnalysisSettings,
               progress: Callable[[float], None] | None = None) -> tuple:
    """Feed blocks to a :class:`~passby.pipeline.Pipeline`; return its events.

    Parameters
    ----------
    blocks : iterable of 1-D arrays
    sample_rate : int
    settings : AnalysisSettings
    progress : callable, optional
        Called with the seconds of audio analysed so far after each block.

    Returns
    -------
    (events, seconds) : tuple of PassEvent, float
    """
    pipe = Pipeline(sample_rate, settings)
    events = []
    for block in blocks:
        events += pipe.push(block)
        if progress is not None:
            progress(pipe.samples_in / sample_rate)
    events += pipe.finish()
    return tuple(events), pipe.samples_in / sample_rate


def analyze(source, *, temperature_c: float = 20.0, humidity_pct: float | None = None,
            sample_rate: int | None = None, channel: int | None = None,
            settings: AnalysisSettings | None = None,
            progress: Callable[[float], None] | None = None) -> FileResult:
    """Find every pass-by in a recording and measure it.

    Parameters
    ----------
    source : str, os.PathLike or ndarray
        A WAV file, or samples (1-D, or 2-D as frames x channels) scaled to
        about [-1, 1].
    temperature_c : float
        Air temperature, degrees Celsius (sets the speed of sound).
    humidity_pct : float, optional
        Relative humidity; when given the speed of sound follows Cramer (1993).
    sample_rate : int
        Required with an array; ignored for a file.
    channel : int, optional
        0-based channel to analyse; the default is the mean of all channels.
    settings : AnalysisSettings, optional
        All other settings; ``temperature_c`` and ``humidity_pct`` override
        its fields when ``settings`` is not given.
    progress : callable, optional
        Called with the seconds analysed so far.

    Returns
    -------
    FileResult
        With one :class:`~passby.events.PassEvent` per vehicle, in time order.

    Raises
    ------
    InputError
        The file or array cannot be analysed (the message says why).
    """
    if settings is None:
        settings = AnalysisSettings(temperature_c=temperature_c, humidity_pct=humidity_pct)
    if isinstance(source, (str, os.PathLike)):
        return _analyze_file(os.fspath(source), channel, settings, progress)
    return _analyze_array(source, sample_rate, channel, settings, progress)


def _analyze_file(path, channel, settings, progress):
    with WavReader(path) as reader:
        info = reader.info
        if channel is not None and not 0 <= channel < info.channels:
            raise InputError(f"channel {channel + 1} asked for, the file has {info.channels}", where=path)
        block = max(1, int(BLOCK_S * info.sample_rate))
        events, seconds = run_blocks(reader.blocks(block, channel), info.sample_rate, settings, progress)
    warnings = []
    if info.truncated:
        warnings.append(f"cut short: the header promises {info.declared_frames / info.sample_rate:.1f} s, "
                        f"{seconds:.1f} s were there and were analysed"
                        if not info.open_ended else
                        "the header was never completed (recording stopped abnormally?); "
                        f"analysed the {seconds:.1f} s present")
    return FileResult(path, info.sample_rate, seconds, events, tuple(warnings))


def _analyze_array(x, sample_rate, channel, settings, progress):
    where = "<array>"
    if sample_rate is None:
        raise InputError("sample_rate is required with an array", where=where)
    if not MIN_SAMPLE_RATE <= int(sample_rate) <= MAX_SAMPLE_RATE:
        raise InputError(f"sample rate {sample_rate} Hz is outside {MIN_SAMPLE_RATE}..{MAX_SAMPLE_RATE} Hz",
                         where=where)
    x = np.asarray(x, dtype=float)
    if x.ndim == 2:
        if channel is not None:
            if not 0 <= channel < x.shape[1]:
                raise InputError(f"channel {channel + 1} asked for, the array has {x.shape[1]}", where=where)
            x = x[:, channel]
        else:
            x = x.mean(axis=1)
    elif x.ndim != 1:
        raise InputError(f"samples must be 1-D or 2-D (frames x channels), not {x.ndim}-D", where=where)
    if x.size == 0:
        raise InputError("no audio samples", where=where)
    bad = np.flatnonzero(~np.isfinite(x))
    if bad.size:
        raise InputError(f"non-finite sample at {bad[0] / sample_rate:.3f} s", where=where)
    fs = int(sample_rate)
    block = max(1, int(BLOCK_S * fs))
    blocks = (x[i:i + block] for i in range(0, x.size, block))
    events, seconds = run_blocks(blocks, fs, settings, progress)
    return FileResult(where, fs, seconds, events, ())
