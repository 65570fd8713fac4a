"""Reading and writing WAV audio: one small RIFF parser for the whole product.

The reader streams: it parses the RIFF chunk list once, then hands out the
samples block by block with ``f.read`` and :func:`numpy.frombuffer`, so the
memory it needs does not grow with the length of the recording (a logger
file of several days is read in the same few hundred kilobytes as a short
clip). It decodes integer PCM of 8 (unsigned), 16, 24 and 32 bits and IEEE
float of 32 and 64 bits, plain or in a ``WAVE_FORMAT_EXTENSIBLE`` header,
any number of channels, 8 kHz to 192 kHz.

Everything a file can get wrong raises :class:`passby.errors.InputError`
with a one-line message and ``where`` set to the path; nothing else
escapes for a bad file.

A recording that was cut short (the data chunk declares more bytes than the
file holds, as happens when a logger loses power) is read up to its last
whole frame and reported with ``truncated=True``. A data chunk whose size
field is the placeholder 0 or 0xFFFFFFFF while samples follow (a writer that
never went back to finalise its header) is read to the end of the file and
is also reported with ``truncated=True``: the length the writer meant is
unknown, and on an unattended logger an unfinished header nearly always
means the recording stopped abnormally, so the caller should warn. Such
files also carry ``open_ended=True``. A trailing partial frame is dropped in
every case. The size field of the RIFF header itself is not trusted (many
recorders leave it wrong); the real size of the file is used instead.

The writer writes a plain PCM (format tag 1) or IEEE float (format tag 3,
with the ``fact`` chunk the specification asks for) file, through a
temporary file in the same directory that is synced and then renamed over
the final name, so a power cut leaves either the old file or the complete
new one, never half a file.

References
----------
.. [1] IBM Corporation and Microsoft Corporation, "Multimedia Programming
   Interface and Data Specifications 1.0", August 1991: RIFF chunks, pad
   byte after odd-sized chunks, the ``WAVE`` form, ``fmt `` / ``fact`` /
   ``data`` chunks, unsigned 8-bit and signed little-endian wider PCM.
.. [2] Microsoft Corporation, "WAVEFORMATEXTENSIBLE structure" (mmreg.h /
   ksmedia.h documentation) and "Multiple Channel Audio Data and WAVE
   Files": format tag 0xFFFE, ``cbSize`` = 22, ``wValidBitsPerSample``,
   ``dwChannelMask`` and the ``SubFormat`` GUID whose first two bytes are
   the format tag (``KSDATAFORMAT_SUBTYPE_PCM``, ``..._IEEE_FLOAT``).
.. [3] Microsoft Corporation, mmreg.h format tag registry: 0x0002 Microsoft
   ADPCM, 0x0006 A-law, 0x0007 mu-law, 0x0011 IMA ADPCM, 0x0031 GSM 6.10,
   0x0050 MPEG, 0x0055 MPEG Layer 3.

Examples
--------
>>> import os, tempfile
>>> import numpy as np
>>> with tempfile.TemporaryDirectory() as d:
...     path = os.path.join(d, "tone.wav")
...     t = np.arange(800) / 8000.0
...     write_wav(path, 0.5 * np.sin(2 * np.pi * 440.0 * t), 8000)
...     info = probe_wav(path)
...     x, rate = read_wav(path)
>>> info.sample_rate, info.channels, info.bits, info.encoding, info.frames
(8000, 1, 16, 'pcm', 800)
>>> info.duration_s, info.truncated
(0.1, False)
>>> rate, x.shape, bool(np.max(np.abs(x)) <= 0.5)
(8000, (800,), True)
"""

from __future__ import annotations

import os
import stat
import struct
import tempfile
from dataclasses import dataclass
from typing import Iterator

import numpy as np

from passby.errors import InputError, PassbyError

__all__ = [
    "MIN_SAMPLE_RATE",
    "MAX_SAMPLE_RATE",
    "ENCODINGS",
    "WavInfo",
    "WavReader",
    "probe_wav",
    "read_wav",
    "write_wav",
]

#: Lowest and highest sampling rate accepted, Hz (a product limit: telephone
#: band to high-resolution recorders; common practice, no source).
MIN_SAMPLE_RATE = 8000
MAX_SAMPLE_RATE = 192000

#: Encodings :func:`write_wav` can write: name -> (format tag, bits).
ENCODINGS = {
    "pcm8": (1, 8),
    "pcm16": (1, 16),
    "pcm24": (1, 24),
    "pcm32": (1, 32),
    "float32": (3, 32),
    "float64": (3, 64),
}

_TAG_PCM = 0x0001
_TAG_FLOAT = 0x0003
_TAG_EXTENSIBLE = 0xFFFE

# Names of format tags we cannot decode, so the message can say what the
# file is (mmreg.h registry, ref. [3]).
_TAG_NAMES = {
    0x0000: "unknown",
    0x0002: "ADPCM",
    0x0006: "A-law",
    0x0007: "mu-law",
    0x0011: "IMA ADPCM",
    0x0031: "GSM 6.10",
    0x0050: "MPEG",
    0x0055: "MPEG Layer 3",
}

# Size field values that writers use as "length not known yet".
_SIZE_PLACEHOLDERS = (0, 0xFFFFFFFF)

# Largest prefix of a fmt chunk we ever need (WAVEFORMATEXTENSIBLE is 40
# bytes); a larger chunk is skipped past, never read into memory.
_FMT_READ_MAX = 64

# Permissions of a newly written file (mkstemp would leave it owner-only).
_NEW_FILE_MODE = 0o644

# Frames per block when a whole file is read or written.
_IO_BLOCK_FRAMES = 65536


@dataclass(frozen=True)
class WavInfo:
    """What the header of a WAV file says, checked against the file's size.

    Attributes
    ----------
    path : str
        The file.
    sample_rate : int
        Sampling rate, Hz.
    channels : int
        Number of interleaved channels.
    bits : int
        Container size of one sample, bits (8, 16, 24, 32 or 64).
    encoding : str
        ``"pcm"`` (integer) or ``"float"`` (IEEE float).
    frames : int
        Whole frames actually available to read.
    declared_frames : int
        Frames the data chunk's size field declares (whole frames of it).
    truncated : bool
        The file holds fewer bytes than the data chunk declares, or the
        size field was a placeholder (see the module notes).
    open_ended : bool
        The data chunk's size was the placeholder 0 or 0xFFFFFFFF and the
        samples were taken up to the end of the file.
    """

    path: str
    sample_rate: int
    channels: int
    bits: int
    encoding: str
    frames: int
    declared_frames: int
    truncated: bool
    open_ended: bool = False

    @property
    def duration_s(self) -> float:
        """Duration of the frames available, s."""
        return self.frames / self.sample_rate


@dataclass(frozen=True)
class _Layout:
    """Where the samples are: the parsed header plus the data offset."""

    info: WavInfo
    data_offset: int
    block_align: int


def _fail(message, path):
    return InputError(message, where=path)


def _tag_text(tag):
    name = _TAG_NAMES.get(tag)
    return f"format tag 0x{tag:04X}" + (f" ({name})" if name else "")


def _parse_fmt(raw, size, path):
    """Decode a fmt chunk into (encoding, channels, rate, bits, block_align).

    ``raw`` holds the first bytes of the chunk (at most ``_FMT_READ_MAX``),
    ``size`` its declared size. Layout per ref. [1] (WAVEFORMATEX) and
    ref. [2] (WAVEFORMATEXTENSIBLE).
    """
    if size < 16 or len(raw) < 16:
        raise _fail(f"fmt chunk too short ({min(size, len(raw))} bytes, need 16)", path)
    tag, channels, rate, _byte_rate, block_align, bits = struct.unpack_from("<HHIIHH", raw)
    if tag == _TAG_EXTENSIBLE:
        if size < 40 or len(raw) < 40:
            raise _fail(
                f"extensible fmt chunk too short ({min(size, len(raw))} bytes, need 40)",
                path,
            )
        # cbSize, wValidBitsPerSample, dwChannelMask, then the SubFormat GUID;
        # its first two bytes (little-endian) are the real format tag [2].
        (tag,) = struct.unpack_from("<H", raw, 24)
    if tag == _TAG_PCM:
        encoding = "pcm"
    elif tag == _TAG_FLOAT:
        encoding = "float"
    else:
        raise _fail(f"unsupported encoding: {_tag_text(tag)}", path)
    if channels == 0:
        raise _fail("zero channels in the fmt chunk", path)
    if not MIN_SAMPLE_RATE <= rate <= MAX_SAMPLE_RATE:
        raise _fail(
            f"sample rate {rate} Hz is outside {MIN_SAMPLE_RATE}..{MAX_SAMPLE_RATE} Hz",
            path,
        )
    if encoding == "pcm" and bits not in (8, 16, 24, 32):
        raise _fail(f"unsupported encoding: {bits}-bit PCM", path)
    if encoding == "float" and bits not in (32, 64):
        raise _fail(f"unsupported encoding: {bits}-bit float", path)
    expected = channels * (bits // 8)
    if block_align != expected:
        raise _fail(
            f"block align {block_align} bytes does not match {channels} channel(s) "
            f"of {bits} bits ({expected} bytes)",
            path,
        )
    return encoding, channels, rate, bits, block_align


def _parse(f, path, file_size):
    """Walk the RIFF chunks of an open file; return a :class:`_Layout`."""
    if file_size == 0:
        raise _fail("empty file", path)
    head = f.read(12)
    if len(head) == 12 and head[8:12] == b"WAVE" and head[:4] in (b"RF64", b"BW64"):
        raise _fail("RF64 (64-bit WAV) files are not supported", path)
    if len(head) == 12 and head[:4] == b"RIFX" and head[8:12] == b"WAVE":
        raise _fail("big-endian (RIFX) WAV files are not supported", path)
    if len(head) < 12 or head[:4] != b"RIFF" or head[8:12] != b"WAVE":
        raise _fail("not a WAV file (no RIFF/WAVE header)", path)

    fmt = None
    data = None  # (offset, declared size)
    pos = 12
    while True:
        f.seek(pos)
        header = f.read(8)
        if len(header) < 8:
            break
        cid = header[:4]
        (size,) = struct.unpack_from("<I", header, 4)
        body = pos + 8
        if cid == b"fmt " and fmt is None:
            fmt = _parse_fmt(f.read(min(size, _FMT_READ_MAX)), size, path)
            if data is not None:
                break
        elif cid == b"data" and data is None:
            data = (body, size)
            if fmt is not None:
                break
            if size in _SIZE_PLACEHOLDERS:
                # Length unknown, so nothing behind it can be found.
                break
        # Every chunk is followed by a pad byte when its size is odd [1].
        pos = body + size + (size & 1)

    if fmt is None:
        if data is None:
            raise _fail("not a WAV file (no fmt chunk and no data chunk)", path)
        raise _fail("no fmt chunk before the audio data", path)
    if data is None:
        raise _fail("no audio samples (no data chunk)", path)

    encoding, channels, rate, bits, block_align = fmt
    offset, size = data
    available = max(file_size - offset, 0)
    open_ended = size in _SIZE_PLACEHOLDERS and available > 0
    if open_ended:
        nbytes, truncated = available, True
    elif size > available:
        nbytes, truncated = available, True
    else:
        nbytes, truncated = size, False
    frames = nbytes // block_align
    if frames == 0:
        raise _fail("no audio samples", path)
    info = WavInfo(
        path=path,
        sample_rate=rate,
        channels=channels,
        bits=bits,
        encoding=encoding,
        frames=frames,
        declared_frames=size // block_align,
        truncated=truncated,
        open_ended=open_ended,
    )
    return _Layout(info=info, data_offset=offset, block_align=block_align)


def _open(path):
    """Open ``path`` for reading; every failure becomes an InputError."""
    try:
        st = os.stat(path)
    except FileNotFoundError:
        raise _fail("file not found", path) from None
    except ValueError:  # e.g. an embedded NUL character
        raise _fail("not a valid file name", path) from None
    except OSError as exc:
        raise _fail(f"cannot read: {exc.strerror or exc}", path) from None
    if stat.S_ISDIR(st.st_mode):
        raise _fail("is a directory, not a WAV file", path)
    if not stat.S_ISREG(st.st_mode):
        raise _fail("not a regular file", path)
    try:
        return open(path, "rb")
    except OSError as exc:
        raise _fail(f"cannot read: {exc.strerror or exc}", path) from None


def _decode(raw, bits, encoding):
    """Little-endian sample bytes -> array of the file's sample values.

    24-bit samples are widened to int32 by placing the three bytes above a
    zero byte and shifting right arithmetically, which sign-extends them
    (two's complement, ref. [1]).
    """
    if encoding == "float":
        return np.frombuffer(raw, dtype="<f4" if bits == 32 else "<f8")
    if bits == 8:
        return np.frombuffer(raw, dtype=np.uint8)
    if bits == 16:
        return np.frombuffer(raw, dtype="<i2")
    if bits == 32:
        return np.frombuffer(raw, dtype="<i4")
    b = np.frombuffer(raw, dtype=np.uint8).reshape(-1, 3)
    wide = np.zeros((b.shape[0], 4), dtype=np.uint8)
    wide[:, 1:] = b
    return wide.view("<i4").reshape(-1) >> 8


def _scale(bits, encoding):
    """(offset, factor) so that ``(x - offset) * factor`` lies in [-1, 1).

    Signed PCM is divided by 2**(bits-1); unsigned 8-bit PCM has its zero at
    128 [1]. Float samples are taken as they are.
    """
    if encoding == "float":
        return 0.0, 1.0
    if bits == 8:
        return 128.0, 1.0 / 128.0
    return 0.0, 1.0 / float(2 ** (bits - 1))


class WavReader:
    """A WAV file open for streaming, block by block.

    Parameters
    ----------
    path : str or os.PathLike
        The file.

    Attributes
    ----------
    info : WavInfo
        The checked header.

    Raises
    ------
    InputError
        The file is missing, unreadable or not a WAV file this module can
        decode (see :func:`probe_wav`).

    Notes
    -----
    Use it as a context manager; :meth:`blocks` may be called more than
    once (each call starts at the first frame again).

    References
    ----------
    .. [1] IBM and Microsoft, "Multimedia Programming Interface and Data
       Specifications 1.0", 1991 (RIFF and WAVE).
    .. [2] Microsoft, "WAVEFORMATEXTENSIBLE structure" documentation.

    Examples
    --------
    >>> import os, tempfile
    >>> import numpy as np
    >>> with tempfile.TemporaryDirectory() as d:
    ...     path = os.path.join(d, "two.wav")
    ...     write_wav(path, np.array([[0.5, -0.5]] * 10), 8000)
    ...     with WavReader(path) as r:
    ...         sizes = [len(b) for b in r.blocks(4, channel=0)]
    ...         left = next(r.blocks(100, channel=0))
    ...         mix = next(r.blocks(100))
    >>> sizes
    [4, 4, 2]
    >>> float(left[0]), float(mix[0])
    (0.5, 0.0)
    """

    def __init__(self, path):
        self.path = os.fspath(path)
        if isinstance(self.path, bytes):
            self.path = os.fsdecode(self.path)
        self._f = _open(self.path)
        try:
            self._f.seek(0, os.SEEK_END)
            file_size = self._f.tell()
            self._f.seek(0)
            layout = _parse(self._f, self.path, file_size)
        except OSError as exc:
            self._f.close()
            raise _fail(f"cannot read: {exc.strerror or exc}", self.path) from None
        except BaseException:
            self._f.close()
            raise
        self.info = layout.info
        self._offset = layout.data_offset
        self._align = layout.block_align

    def close(self) -> None:
        """Close the file (idempotent)."""
        self._f.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False

    def _check_channel(self, channel):
        if channel is None:
            return None
        n = self.info.channels
        if isinstance(channel, bool) or not isinstance(channel, (int, np.integer)):
            raise _fail(f"channel must be a whole number, not {channel!r}", self.path)
        if not 0 <= channel < n:
            raise _fail(
                f"channel {channel} is out of range: the file has {n} channel(s), "
                f"numbered 0..{n - 1}",
                self.path,
            )
        return int(channel)

    def blocks(self, block_frames: int, channel: int | None = None) -> Iterator[np.ndarray]:
        """Yield the samples as consecutive float64 blocks.

        Parameters
        ----------
        block_frames : int
            Frames per block (positive); the last block may be shorter.
        channel : int or None
            ``None`` for the mean of all channels, or a 0-based channel.

        Yields
        ------
        numpy.ndarray
            1-D float64 block, integer PCM scaled to [-1, 1).

        Raises
        ------
        InputError
            ``channel`` out of range (raised by the call itself), or, while
            iterating, a non-finite float sample (the message gives its
            time) or a read error.
        ValueError
            ``block_frames`` is not a positive integer (a programming error).
        """
        if isinstance(block_frames, bool) or int(block_frames) != block_frames or block_frames < 1:
            raise ValueError(f"block_frames must be a positive integer, not {block_frames!r}")
        channel = self._check_channel(channel)
        return self._iter_blocks(int(block_frames), channel)

    def _iter_blocks(self, block_frames, channel):
        info = self.info
        offset, factor = _scale(info.bits, info.encoding)
        is_float = info.encoding == "float"
        done = 0
        while done < info.frames:
            n = min(block_frames, info.frames - done)
            try:
                self._f.seek(self._offset + done * self._align)
                raw = self._f.read(n * self._align)
            except OSError as exc:
                raise _fail(f"read error: {exc.strerror or exc}", self.path) from None
            n = len(raw) // self._align  # the file may have shrunk meanwhile
            if n == 0:
                return
            x = _decode(raw[: n * self._align], info.bits, info.encoding)
            x = x.reshape(n, info.channels)
            x = x[:, channel] if channel is not None else x
            if is_float:
                self._check_finite(x, done)
            if x.ndim == 2:
                block = x.mean(axis=1, dtype=np.float64)
            else:
                block = x.astype(np.float64)
            if offset:
                block -= offset
            if factor != 1.0:
                block *= factor
            yield block
            done += n

    def _check_finite(self, x, first_frame):
        finite = np.isfinite(x)
        if finite.all():
            return
        bad = np.flatnonzero(~finite.reshape(len(x), -1).all(axis=1))[0]
        row = np.atleast_1d(x[bad])
        value = row[~np.isfinite(row)][0]
        kind = "NaN" if np.isnan(value) else ("+inf" if value > 0 else "-inf")
        t = (first_frame + int(bad)) / self.info.sample_rate
        raise _fail(f"non-finite sample ({kind}) at {t:.3f} s", self.path)


def probe_wav(path) -> WavInfo:
    """Read and check the header of a WAV file, without reading the samples.

    Parameters
    ----------
    path : str or os.PathLike

    Returns
    -------
    WavInfo

    Raises
    ------
    InputError
        Missing, unreadable or empty file; not a RIFF/WAVE file; RF64; no
        fmt or data chunk; no audio samples; sample rate outside 8..192 kHz;
        zero channels; an encoding it cannot decode (named); a block align
        that does not match channels and bits. Non-finite float samples are
        only found when the samples are read.

    References
    ----------
    .. [1] IBM and Microsoft, "Multimedia Programming Interface and Data
       Specifications 1.0", 1991.
    .. [2] Microsoft, "WAVEFORMATEXTENSIBLE structure" documentation.

    Examples
    --------
    >>> import os, tempfile
    >>> import numpy as np
    >>> with tempfile.TemporaryDirectory() as d:
    ...     path = os.path.join(d, "f.wav")
    ...     write_wav(path, np.zeros((16000, 2)), 16000, encoding="float32")
    ...     info = probe_wav(path)
    >>> info.channels, info.bits, info.encoding, info.duration_s
    (2, 32, 'float', 1.0)
    """
    with WavReader(path) as r:
        return r.info


def read_wav(path, channel: int | None = None) -> tuple[np.ndarray, int]:
    """Read a whole WAV file as one mono float64 array.

    Parameters
    ----------
    path : str or os.PathLike
    channel : int or None
        ``None`` for the mean of all channels, or a 0-based channel.

    Returns
    -------
    samples : numpy.ndarray
        1-D float64, integer PCM scaled to [-1, 1).
    sample_rate : int
        Hz.

    Raises
    ------
    InputError
        As :func:`probe_wav`, plus a channel out of range or a non-finite
        float sample.

    Notes
    -----
    The result is allocated once at its final size and filled block by
    block, so the peak memory is the result plus one block. Use
    :class:`WavReader` for recordings too long to hold.

    References
    ----------
    .. [1] IBM and Microsoft, "Multimedia Programming Interface and Data
       Specifications 1.0", 1991.

    Examples
    --------
    >>> import os, tempfile
    >>> import numpy as np
    >>> with tempfile.TemporaryDirectory() as d:
    ...     path = os.path.join(d, "s.wav")
    ...     write_wav(path, np.array([0.0, 0.25, -0.25, -1.0]), 8000, "pcm8")
    ...     x, rate = read_wav(path)
    >>> rate, x.tolist()
    (8000, [0.0, 0.25, -0.25, -1.0])
    """
    with WavReader(path) as r:
        out = np.empty(r.info.frames, dtype=np.float64)
        n = 0
        for block in r.blocks(_IO_BLOCK_FRAMES, channel=channel):
            out[n : n + len(block)] = block
            n += len(block)
        return out[:n], r.info.sample_rate


def _encode(x, tag, bits):
    """Float frames (n, channels) in [-1, 1] -> little-endian sample bytes.

    Integers are rounded to nearest and clipped to the range of the type;
    8-bit is offset by 128 (unsigned, ref. [1]); 24-bit keeps the three low
    bytes of the little-endian int32.
    """
    if tag == _TAG_FLOAT:
        return np.ascontiguousarray(x, dtype="<f4" if bits == 32 else "<f8").tobytes()
    full = float(2 ** (bits - 1))
    q = np.clip(np.rint(x * full), -full, full - 1.0)
    if bits == 8:
        return (q + 128.0).astype(np.uint8).tobytes()
    if bits == 16:
        return q.astype("<i2").tobytes()
    if bits == 32:
        return q.astype("<i4").tobytes()
    return q.astype("<i4").reshape(-1, 1).view(np.uint8)[:, :3].tobytes()


def _fsync_dir(directory):
    """Make a rename durable (POSIX); a no-op where directories can't be opened."""
    try:
        fd = os.open(directory, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def write_wav(path, data, sample_rate: int, encoding: str = "pcm16") -> None:
    """Write samples to a WAV file, atomically.

    Parameters
    ----------
    path : str or os.PathLike
        Destination; replaced if it exists.
    data : array_like
        1-D (mono) or 2-D ``(frames, channels)`` floats, nominally in
        [-1, 1]. Integer encodings clip values outside the range to the
        largest code (1.0 becomes ``2**(bits-1) - 1``).
    sample_rate : int
        Hz, 8000..192000.
    encoding : str
        One of ``"pcm8"``, ``"pcm16"``, ``"pcm24"``, ``"pcm32"``,
        ``"float32"``, ``"float64"``.

    Raises
    ------
    InputError
        No samples, a non-finite sample, a sample rate out of range, or more
        data than a RIFF file can hold (4 GiB).
    PassbyError
        The file cannot be written (permission, missing directory, full
        disk); the destination is then left as it was.
    ValueError
        An unknown ``encoding`` or ``data`` that is not 1-D or 2-D (a
        programming error).

    Notes
    -----
    The header is plain WAVE_FORMAT_PCM (tag 1) or WAVE_FORMAT_IEEE_FLOAT
    (tag 3, with ``cbSize`` = 0 and a ``fact`` chunk), which the widest
    range of readers accepts; WAVE_FORMAT_EXTENSIBLE is read but not
    written. The bytes go to a temporary file in the destination directory,
    which is flushed and synced before :func:`os.replace` moves it over the
    final name, and the directory is synced after, so a power cut leaves
    either the old file or the whole new one.

    References
    ----------
    .. [1] IBM and Microsoft, "Multimedia Programming Interface and Data
       Specifications 1.0", 1991 (RIFF chunks, pad byte, ``fact`` chunk).
    .. [2] Microsoft, "WAVEFORMATEXTENSIBLE structure" documentation.

    Examples
    --------
    >>> import os, tempfile
    >>> import numpy as np
    >>> with tempfile.TemporaryDirectory() as d:
    ...     path = os.path.join(d, "c.wav")
    ...     write_wav(path, np.array([1.5, -1.5]), 8000, encoding="pcm16")
    ...     x, _ = read_wav(path)
    >>> x.tolist() == [32767 / 32768, -1.0]
    True
    """
    path = os.fspath(path)
    if isinstance(path, bytes):
        path = os.fsdecode(path)
    if encoding not in ENCODINGS:
        raise ValueError(f"unknown encoding {encoding!r}; use one of {', '.join(ENCODINGS)}")
    tag, bits = ENCODINGS[encoding]
    x = np.asarray(data, dtype=np.float64)
    if x.ndim == 1:
        x = x.reshape(-1, 1)
    elif x.ndim != 2:
        raise ValueError(f"data must be 1-D or 2-D (frames, channels), not {x.ndim}-D")
    frames, channels = x.shape
    if frames == 0 or channels == 0:
        raise _fail("no audio samples to write", path)
    if isinstance(sample_rate, bool) or int(sample_rate) != sample_rate:
        raise _fail(f"sample rate {sample_rate!r} is not a whole number of Hz", path)
    sample_rate = int(sample_rate)
    if not MIN_SAMPLE_RATE <= sample_rate <= MAX_SAMPLE_RATE:
        raise _fail(
            f"sample rate {sample_rate} Hz is outside {MIN_SAMPLE_RATE}..{MAX_SAMPLE_RATE} Hz",
            path,
        )
    if channels > 0xFFFF // (bits // 8):
        raise _fail(f"too many channels for a WAV file ({channels})", path)
    finite = np.isfinite(x)
    if not finite.all():
        bad = int(np.flatnonzero(~finite.all(axis=1))[0])
        raise _fail(f"non-finite sample at {bad / sample_rate:.3f} s; nothing written", path)

    block_align = channels * (bits // 8)
    nbytes = frames * block_align
    pad = nbytes & 1
    fmt = struct.pack(
        "<HHIIHH", tag, channels, sample_rate, sample_rate * block_align, block_align, bits
    )
    chunks = b""
    if tag == _TAG_FLOAT:
        fmt += struct.pack("<H", 0)  # cbSize for a non-PCM format [1]
        chunks = b"fact" + struct.pack("<II", 4, frames)
    chunks = b"fmt " + struct.pack("<I", len(fmt)) + fmt + chunks
    riff_size = 4 + len(chunks) + 8 + nbytes + pad
    if riff_size > 0xFFFFFFFF:
        raise _fail("too much audio for one WAV file (the RIFF limit is 4 GiB)", path)
    header = b"RIFF" + struct.pack("<I", riff_size) + b"WAVE" + chunks
    header += b"data" + struct.pack("<I", nbytes)

    directory = os.path.dirname(os.path.abspath(path))
    tmp = None
    try:
        try:
            mode = stat.S_IMODE(os.stat(path).st_mode)  # keep a replaced file's mode
        except OSError:
            mode = _NEW_FILE_MODE
        fd, tmp = tempfile.mkstemp(
            dir=directory, prefix="." + os.path.basename(path) + ".", suffix=".part"
        )
        with os.fdopen(fd, "wb") as f:
            if hasattr(os, "fchmod"):
                os.fchmod(f.fileno(), mode)
            f.write(header)
            for start in range(0, frames, _IO_BLOCK_FRAMES):
                f.write(_encode(x[start : start + _IO_BLOCK_FRAMES], tag, bits))
            if pad:
                f.write(b"\x00")
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
        tmp = None
    except OSError as exc:
        raise PassbyError(f"cannot write: {exc.strerror or exc}", where=path) from None
    finally:
        if tmp is not None:
            try:
                os.unlink(tmp)
            except OSError:
                pass
    _fsync_dir(directory)
