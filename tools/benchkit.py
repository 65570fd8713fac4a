"""What the two benchmark scripts share (``bench.py``, ``bench_station.py``).

Single-threaded numerics for timed work, Markdown tables, the command line
as shown in a results file, writing tables between README markers, the
processor's name, and rendering a simulated scene into a 16-bit WAV.
Standard library and numpy only; nothing here imports numpy's thread pools
before the caller has set :data:`THREAD_ENV`.
"""

from __future__ import annotations

import os
import shlex
import wave

#: Environment that keeps the numerical libraries to one thread.
THREAD_ENV = {name: "1" for name in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS",
                                     "NUMEXPR_NUM_THREADS", "VECLIB_MAXIMUM_THREADS")}

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def markdown_table(header, rows) -> str:
    """A Markdown table of ``header`` and ``rows`` (cells turned into text).

    Examples
    --------
    >>> print(markdown_table(["a", "b"], [(1, 2)]))
    | a | b |
    | --- | --- |
    | 1 | 2 |
    """
    lines = ["| " + " | ".join(header) + " |", "|" + "|".join(" --- " for _ in header) + "|"]
    lines += ["| " + " | ".join(str(c) for c in row) + " |" for row in rows]
    return "\n".join(lines)


def shown_command(script: str, argv) -> str:
    """The command as typed, with paths outside the repository cut to their file name.

    Examples
    --------
    >>> shown_command("tools/bench.py", ["--jobs", "2", "/elsewhere/raw.jsonl"])
    'python tools/bench.py --jobs 2 .../raw.jsonl'
    """
    parts = ["python", script]
    for a in argv:
        if os.path.isabs(a):
            rel = os.path.relpath(a, ROOT)
            a = rel if not rel.startswith("..") else os.path.join("...", os.path.basename(a))
        parts.append(a)
    return " ".join(shlex.quote(p) for p in parts)


def replace_between_markers(text: str, path: str, begin: str, end: str) -> bool:
    """Put ``text`` between the ``begin`` and ``end`` markers of the file at ``path``.

    The file is replaced atomically, and only when it changes. Returns
    False (and leaves the file alone) when it or either marker is missing.
    """
    if not os.path.exists(path):
        return False
    with open(path, encoding="utf-8") as f:
        old = f.read()
    i, j = old.find(begin), old.find(end)
    if i < 0 or j < 0 or j < i:
        return False
    new = old[:i + len(begin)] + "\n\n" + text + "\n\n" + old[j:]
    if new != old:
        tmp = path + ".tmp"
        with open(tmp, "w", encoding="utf-8") as f:
            f.write(new)
        os.replace(tmp, path)
    return True


def cpu_model() -> str:
    """The processor's model name from ``/proc/cpuinfo``, or "unknown"."""
    try:
        with open("/proc/cpuinfo") as f:
            for line in f:
                if line.startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return "unknown"


def write_scene_wav(path, scene, gain: float = 1.0, block_frames: int = 1 << 16) -> dict:
    """Render ``scene`` block by block into a 16-bit PCM mono WAV (stdlib :mod:`wave`).

    Samples are ``gain`` times the rendered pressure, rounded to the
    nearest step of 1/32767 and clipped to the 16-bit range.

    Returns
    -------
    dict
        Frames written, peak absolute rendered sample (before ``gain``),
        rendered samples at or beyond full scale.
    """
    import numpy as np

    from passby.simulation import render_blocks

    peak, clipped, frames = 0.0, 0, 0
    with wave.open(path, "wb") as w:
        w.setnchannels(1)
        w.setsampwidth(2)
        w.setframerate(scene.sample_rate)
        for block in render_blocks(scene, block_frames):
            peak = max(peak, float(np.max(np.abs(block))))
            clipped += int(np.count_nonzero(np.abs(block) >= 1.0))
            w.writeframes(np.clip(np.rint(block * gain * 32767.0), -32768, 32767).astype("<i2").tobytes())
            frames += block.size
    return dict(frames=frames, peak=peak, clipped=clipped)
