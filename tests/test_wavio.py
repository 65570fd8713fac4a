"""Tests of passby.wavio: the WAV reader and writer.

The reference library is scipy.io.wavfile: files we write are read back with
``scipy.io.wavfile.read`` and files it writes are read with ours. Hand-built
headers follow the RIFF/WAVE layout of IBM/Microsoft, "Multimedia
Programming Interface and Data Specifications 1.0" (1991) and Microsoft's
WAVEFORMATEXTENSIBLE documentation.
"""

import os
import stat
import struct
import tracemalloc

import numpy as np
import pytest
import scipy.io.wavfile as wavfile
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from passby import wavio
from passby.errors import InputError, PassbyError
from passby.wavio import WavInfo, WavReader, probe_wav, read_wav, write_wav

# --- hand-built files (RIFF/WAVE spec 1.0, 1991; WAVEFORMATEXTENSIBLE docs) ---

# Bytes 2..15 of KSDATAFORMAT_SUBTYPE_PCM / _IEEE_FLOAT
# {0000xxxx-0000-0010-8000-00AA00389B71}, little-endian GUID layout (ksmedia.h).
GUID_TAIL = b"\x00\x00\x00\x00\x10\x00\x80\x00\x00\xaa\x00\x38\x9b\x71"


def chunk(cid, payload, size=None):
    """A RIFF chunk with its pad byte after an odd-sized payload (spec 1.0)."""
    size = len(payload) if size is None else size
    return cid + struct.pack("<I", size) + payload + (b"\x00" if len(payload) % 2 else b"")


def riff(*chunks, magic=b"RIFF", form=b"WAVE"):
    body = form + b"".join(chunks)
    return magic + struct.pack("<I", len(body)) + body


def fmt_chunk(tag=1, channels=1, rate=8000, bits=16, block_align=None):
    if block_align is None:
        block_align = channels * (bits // 8)
    payload = struct.pack("<HHIIHH", tag, channels, rate, rate * block_align, block_align, bits)
    return chunk(b"fmt ", payload)


def ext_fmt_chunk(subtag, channels, rate, bits, valid_bits=None, mask=0, size=40):
    block_align = channels * (bits // 8)
    payload = struct.pack(
        "<HHIIHHHHI",
        0xFFFE,
        channels,
        rate,
        rate * block_align,
        block_align,
        bits,
        22,  # cbSize of WAVEFORMATEXTENSIBLE
        bits if valid_bits is None else valid_bits,
        mask,
    )
    payload += struct.pack("<H", subtag) + GUID_TAIL
    return chunk(b"fmt ", payload[:size])


def pcm16(values):
    return np.asarray(values, dtype="<i2").tobytes()


def reference_float(ref, encoding):
    """scipy.io.wavfile.read output -> floats in [-1, 1).

    scipy's documented conventions (wavfile.read Notes): 8-bit is uint8 with
    zero at 128, 16-bit int16, 24-bit int32 *left-justified*, 32-bit int32,
    float as stored.
    """
    if encoding == "pcm8":
        return (ref.astype(np.float64) - 128.0) / 128.0
    if encoding == "pcm16":
        return ref / 2.0**15
    if encoding in ("pcm24", "pcm32"):
        return ref / 2.0**31
    return ref.astype(np.float64)


ENCODING_NAMES = ["pcm8", "pcm16", "pcm24", "pcm32", "float32", "float64"]
LSB = {"pcm8": 2.0**-7, "pcm16": 2.0**-15, "pcm24": 2.0**-23, "pcm32": 2.0**-31}


def sample_data(rng, frames, channels):
    x = rng.uniform(-1.0, 1.0, size=(frames, channels))
    x[:6, 0] = [-1.0, 1.0, 0.0, 0.5, -0.5, 1.0 - 2.0**-20]  # edges of the range
    return x


# --- round trips against scipy -------------------------------------------------


@pytest.mark.parametrize("channels", [1, 2])
@pytest.mark.parametrize("encoding", ENCODING_NAMES)
def test_written_file_matches_scipy_reader(tmp_path, encoding, channels):
    rng = np.random.default_rng(1)
    x = sample_data(rng, 1001, channels)  # odd frame count: pad byte for pcm8/pcm24 mono
    path = tmp_path / "rt.wav"
    write_wav(path, x[:, 0] if channels == 1 else x, 22050, encoding=encoding)

    # scipy.io.wavfile.read is the reference reader.
    rate, ref = wavfile.read(path)
    ref = reference_float(ref, encoding).reshape(len(x), channels)
    assert rate == 22050
    for k in range(channels):
        ours, our_rate = read_wav(path, channel=k)
        assert our_rate == 22050
        np.testing.assert_array_equal(ours, ref[:, k])
    info = probe_wav(path)
    assert (info.channels, info.frames, info.truncated) == (channels, 1001, False)
    assert os.path.getsize(path) % 2 == 0  # RIFF chunks are word-aligned (spec 1.0)

    # Against the original values: integers round to the nearest code
    # (within half an LSB) after clipping to [-1, 1 - 1 LSB], which moves
    # +1.0 by one LSB; exact for float64, float32 rounding for float32.
    if encoding in LSB:
        lsb = LSB[encoding]
        assert np.max(np.abs(ref - np.clip(x, -1.0, 1.0 - lsb))) <= lsb / 2
        assert np.max(np.abs(ref - x)) <= lsb
    elif encoding == "float32":
        np.testing.assert_array_equal(ref, x.astype(np.float32).astype(np.float64))
    else:
        np.testing.assert_array_equal(ref, x)


@pytest.mark.parametrize(
    "dtype, scale, offset",
    [
        (np.uint8, 128.0, 128.0),
        (np.int16, 2.0**15, 0.0),
        (np.int32, 2.0**31, 0.0),
        (np.float32, 1.0, 0.0),
        (np.float64, 1.0, 0.0),
    ],
)
def test_reads_files_written_by_scipy(tmp_path, dtype, scale, offset):
    # scipy.io.wavfile.write is the reference writer (it has no 24-bit writer).
    rng = np.random.default_rng(2)
    if np.issubdtype(dtype, np.integer):
        info = np.iinfo(dtype)
        ref = rng.integers(info.min, info.max, size=(777, 3), endpoint=True).astype(dtype)
    else:
        ref = rng.uniform(-1, 1, size=(777, 3)).astype(dtype)
    path = tmp_path / "scipy.wav"
    wavfile.write(path, 48000, ref)
    expected = (ref.astype(np.float64) - offset) / scale
    info = probe_wav(path)
    assert (info.sample_rate, info.channels, info.frames) == (48000, 3, 777)
    assert info.bits == np.dtype(dtype).itemsize * 8
    assert info.encoding == ("float" if dtype in (np.float32, np.float64) else "pcm")
    for k in range(3):
        np.testing.assert_array_equal(read_wav(path, channel=k)[0], expected[:, k])
    np.testing.assert_allclose(read_wav(path)[0], expected.mean(axis=1), rtol=0, atol=1e-15)


def test_24bit_sign_extension_known_values(tmp_path):
    # Two's complement little-endian 24-bit codes (spec 1.0, "Data Format of
    # the Samples"): 0x7FFFFF, 0x800000, 0x000001, 0xFFFFFF, 0x400000.
    codes = bytes.fromhex("ffff7f 000080 010000 ffffff 000040")
    path = tmp_path / "s24.wav"
    path.write_bytes(riff(fmt_chunk(bits=24), chunk(b"data", codes)))
    x, _ = read_wav(path)
    expected = np.array([8388607, -8388608, 1, -1, 4194304]) / 2.0**23
    np.testing.assert_array_equal(x, expected)
    # scipy.io.wavfile.read (reference) agrees, left-justified in int32.
    np.testing.assert_array_equal(wavfile.read(path)[1] / 2.0**31, expected)


def test_8bit_unsigned_zero_is_128(tmp_path):
    # 8-bit PCM is unsigned with silence at 128 (spec 1.0).
    path = tmp_path / "u8.wav"
    path.write_bytes(riff(fmt_chunk(bits=8), chunk(b"data", bytes([0, 64, 128, 192, 255]))))
    np.testing.assert_array_equal(read_wav(path)[0], [-1.0, -0.5, 0.0, 0.5, 127 / 128])


def test_writer_clips_out_of_range_values(tmp_path):
    x = np.array([1.5, 1.0, -1.0, -2.0, 0.0])
    expected = {  # integer codes per scipy.io.wavfile.read's conventions (reference)
        "pcm8": [255, 255, 0, 0, 128],
        "pcm16": [32767, 32767, -32768, -32768, 0],
        "pcm24": [0x7FFFFF << 8, 0x7FFFFF << 8, -(2**31), -(2**31), 0],
        "pcm32": [2**31 - 1, 2**31 - 1, -(2**31), -(2**31), 0],
    }
    for encoding, codes in expected.items():
        path = tmp_path / f"{encoding}.wav"
        write_wav(path, x, 8000, encoding=encoding)
        np.testing.assert_array_equal(wavfile.read(path)[1], codes)


def test_float_header_has_cbsize_and_fact_chunk(tmp_path):
    # Non-PCM formats carry cbSize and a fact chunk with the frame count (spec 1.0).
    path = tmp_path / "f.wav"
    write_wav(path, np.zeros((11, 2)), 8000, encoding="float32")
    raw = path.read_bytes()
    assert raw[12:16] == b"fmt " and struct.unpack_from("<I", raw, 16)[0] == 18
    assert struct.unpack_from("<HHIIHHH", raw, 20) == (3, 2, 8000, 64000, 8, 32, 0)
    assert raw[38:42] == b"fact" and struct.unpack_from("<II", raw, 42) == (4, 11)
    assert struct.unpack_from("<I", raw, 4)[0] == len(raw) - 8  # RIFF size field


# --- channels and blocks --------------------------------------------------------


def test_channel_selection_and_mix(tmp_path):
    ref = np.array([[100, -200, 3000], [-32768, 32767, 0], [1, 2, 3]], dtype=np.int16)
    path = tmp_path / "three.wav"
    wavfile.write(path, 16000, ref)  # reference writer
    for k in range(3):
        np.testing.assert_array_equal(read_wav(path, channel=k)[0], ref[:, k] / 32768.0)
    np.testing.assert_allclose(read_wav(path)[0], ref.mean(axis=1) / 32768.0, rtol=0, atol=1e-15)
    for bad in (3, -1, 99):
        with pytest.raises(InputError, match=r"channel .* out of range.*3 channel"):
            read_wav(path, channel=bad)
        with WavReader(path) as r, pytest.raises(InputError, match="out of range"):
            r.blocks(10, channel=bad)


@pytest.mark.parametrize("block_frames", [1, 7, 333, 4097, 10007, 1_000_000])
def test_blocks_concatenate_to_whole_file(tmp_path, block_frames):
    rng = np.random.default_rng(3)
    path = tmp_path / "b.wav"
    write_wav(path, rng.uniform(-1, 1, (10007, 2)), 44100, encoding="pcm24")
    whole, _ = read_wav(path, channel=1)
    with WavReader(path) as r:
        blocks = list(r.blocks(block_frames, channel=1))
        again = np.concatenate(list(r.blocks(block_frames, channel=1)))  # restartable
    assert all(len(b) == block_frames for b in blocks[:-1])
    assert 1 <= len(blocks[-1]) <= block_frames
    assert all(b.dtype == np.float64 and b.ndim == 1 for b in blocks)
    np.testing.assert_array_equal(np.concatenate(blocks), whole)
    np.testing.assert_array_equal(again, whole)
    assert len(whole) == 10007


@pytest.mark.parametrize("bad", [0, -5, 2.5])
def test_block_size_must_be_positive(tmp_path, bad):
    path = tmp_path / "a.wav"
    write_wav(path, np.zeros(10), 8000)
    with WavReader(path) as r, pytest.raises(ValueError):
        r.blocks(bad)


def test_reading_in_blocks_does_not_materialise_the_file(tmp_path):
    # 60 s at 48 kHz, 16-bit mono: 5.76 MB on disk, 23 MB as float64.
    frames, block = 48000 * 60, 4096
    path = tmp_path / "long.wav"
    fmt = fmt_chunk(rate=48000)
    with open(path, "wb") as f:
        f.write(b"RIFF" + struct.pack("<I", 4 + len(fmt) + 8 + frames * 2) + b"WAVE" + fmt)
        f.write(b"data" + struct.pack("<I", frames * 2))
        piece = pcm16(np.arange(48000) % 2000 - 1000)
        for _ in range(60):
            f.write(piece)
    tracemalloc.start()
    try:
        total = 0
        with WavReader(path) as r:
            assert r.info.frames == frames
            for b in r.blocks(block):
                assert len(b) <= block
                total += len(b)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert total == frames
    assert peak < 1_000_000  # a few blocks (each 4096 * 8 B = 33 kB), not 5.8 MB


# --- header variants ------------------------------------------------------------


def test_extensible_header_pcm24_and_float(tmp_path):
    rng = np.random.default_rng(4)
    codes = rng.integers(-(2**23), 2**23, size=(50, 2))
    raw24 = codes.astype("<i4").reshape(-1, 1).view(np.uint8)[:, :3].tobytes()
    path = tmp_path / "ext24.wav"
    path.write_bytes(riff(ext_fmt_chunk(1, 2, 96000, 24, mask=0x3), chunk(b"data", raw24)))
    info = probe_wav(path)
    assert (info.sample_rate, info.channels, info.bits, info.encoding) == (96000, 2, 24, "pcm")
    np.testing.assert_array_equal(read_wav(path, channel=1)[0], codes[:, 1] / 2.0**23)
    # scipy.io.wavfile.read (reference) reads the same extensible file alike.
    np.testing.assert_array_equal(wavfile.read(path)[1] / 2.0**31, codes / 2.0**23)

    vals = rng.uniform(-1, 1, 40).astype("<f4")
    path = tmp_path / "extf.wav"
    path.write_bytes(
        riff(ext_fmt_chunk(3, 1, 8000, 32), chunk(b"fact", struct.pack("<I", 40)),
             chunk(b"data", vals.tobytes()))
    )
    assert probe_wav(path).encoding == "float"
    np.testing.assert_array_equal(read_wav(path)[0], vals.astype(np.float64))


def test_extensible_20_bit_in_24_bit_container(tmp_path):
    # wValidBitsPerSample = 20: samples are left-justified in the 24-bit
    # container (WAVEFORMATEXTENSIBLE docs), so container scaling is right.
    codes = np.array([0x7FFFF, -0x80000, 1]) << 4
    raw = codes.astype("<i4").reshape(-1, 1).view(np.uint8)[:, :3].tobytes()
    path = tmp_path / "ext20.wav"
    path.write_bytes(riff(ext_fmt_chunk(1, 1, 8000, 24, valid_bits=20), chunk(b"data", raw)))
    np.testing.assert_array_equal(read_wav(path)[0], np.array([0x7FFFF, -0x80000, 1]) / 2.0**19)


@pytest.mark.filterwarnings("ignore::scipy.io.wavfile.WavFileWarning")  # scipy skips "cue "
def test_odd_sized_unknown_chunks_are_skipped_with_pad_byte(tmp_path):
    samples = [1000, -1000, 32767, -32768, 0]
    path = tmp_path / "odd.wav"
    path.write_bytes(
        riff(
            chunk(b"JUNK", b"x"),  # size 1 + pad byte
            fmt_chunk(),
            chunk(b"LIST", b"INFOISFT\x03\x00\x00\x00ab\x00"),  # 15 bytes + pad
            chunk(b"fact", struct.pack("<I", 5)),
            chunk(b"data", pcm16(samples)),
            chunk(b"cue ", b"abc"),  # trailing odd chunk
        )
    )
    np.testing.assert_array_equal(read_wav(path)[0], np.array(samples) / 32768.0)
    # scipy.io.wavfile.read (reference) sees the same samples.
    np.testing.assert_array_equal(wavfile.read(path)[1], samples)


def test_data_chunk_before_fmt_chunk(tmp_path):
    path = tmp_path / "late_fmt.wav"
    path.write_bytes(riff(chunk(b"data", pcm16([5, 6, 7])), fmt_chunk(rate=11025)))
    x, rate = read_wav(path)
    assert rate == 11025
    np.testing.assert_array_equal(x, np.array([5, 6, 7]) / 32768.0)


def test_odd_data_size_drops_trailing_partial_frame(tmp_path):
    # 16-bit stereo (4-byte frames), data chunk of 4001 bytes.
    payload = pcm16(np.arange(2000) - 1000) + b"\x01"
    path = tmp_path / "partial.wav"
    path.write_bytes(riff(fmt_chunk(channels=2), chunk(b"data", payload)))
    info = probe_wav(path)
    assert (info.frames, info.declared_frames, info.truncated) == (1000, 1000, False)
    np.testing.assert_array_equal(read_wav(path, channel=0)[0], (np.arange(0, 2000, 2) - 1000) / 32768.0)


# --- cut-short and unfinalised files -------------------------------------------


def test_truncated_file_reads_whole_frames(tmp_path):
    rng = np.random.default_rng(5)
    path = tmp_path / "cut.wav"
    write_wav(path, rng.uniform(-1, 1, (1000, 2)), 8000)
    full, _ = read_wav(path, channel=1)
    raw = path.read_bytes()
    path.write_bytes(raw[:-5])  # power cut: 3995 of 4000 data bytes left
    info = probe_wav(path)
    assert info.truncated and not info.open_ended
    assert (info.frames, info.declared_frames) == (998, 1000)
    assert info.duration_s == 998 / 8000
    np.testing.assert_array_equal(read_wav(path, channel=1)[0], full[:998])


@pytest.mark.parametrize("size_field", [0, 0xFFFFFFFF])
def test_unfinalised_data_size_reads_to_end_of_file(tmp_path, size_field):
    samples = np.arange(-50, 51) * 300
    path = tmp_path / "open.wav"
    raw = riff(fmt_chunk(), chunk(b"data", pcm16(samples)))
    i = raw.index(b"data")
    path.write_bytes(raw[: i + 4] + struct.pack("<I", size_field) + raw[i + 8 :] + b"\x07")
    info = probe_wav(path)
    assert info.open_ended and info.truncated
    assert info.frames == 101  # the extra odd byte is a partial frame, dropped
    assert info.declared_frames == size_field // 2
    np.testing.assert_array_equal(read_wav(path)[0], samples / 32768.0)


# --- bad input -----------------------------------------------------------------

_RNG_BYTES = np.random.default_rng(6).integers(0, 256, 1000, dtype=np.uint8).tobytes()
_D = chunk(b"data", pcm16([1, 2, 3, 4]))

BAD_FILES = {
    "empty": (b"", r": empty file$"),
    "random": (b"\x00" + _RNG_BYTES, r": not a WAV file \(no RIFF/WAVE header\)$"),
    "mp3": (b"ID3\x03\x00\x00\x00" + bytes(100), r"no RIFF/WAVE header"),
    "short": (b"RIFF\x00\x00", r"no RIFF/WAVE header"),
    "avi": (riff(form=b"AVI "), r"no RIFF/WAVE header"),
    "rf64": (riff(fmt_chunk(), _D, magic=b"RF64"), r"RF64"),
    "rifx": (riff(fmt_chunk(), _D, magic=b"RIFX"), r"RIFX"),
    "no_chunks": (riff(), r"not a WAV file"),
    "no_data": (riff(fmt_chunk()), r": no audio samples"),
    "no_fmt": (riff(_D), r"no fmt chunk"),
    "zero_samples": (riff(fmt_chunk(), chunk(b"data", b"")), r": no audio samples$"),
    "half_frame": (riff(fmt_chunk(), chunk(b"data", b"\x01")), r": no audio samples$"),
    "cut_after_data_header": (riff(fmt_chunk(), _D)[:44], r": no audio samples$"),
    "cut_in_data_header": (riff(fmt_chunk(), _D)[:40], r": no audio samples \(no data chunk\)$"),
    "rate_0": (riff(fmt_chunk(rate=0), _D), r": sample rate 0 Hz is outside 8000\.\.192000 Hz$"),
    "rate_low": (riff(fmt_chunk(rate=7999), _D), r"sample rate 7999 Hz is outside"),
    "rate_high": (riff(fmt_chunk(rate=192001), _D), r"sample rate 192001 Hz is outside"),
    "channels_0": (riff(fmt_chunk(channels=0, block_align=2), _D), r"zero channels"),
    "adpcm": (riff(fmt_chunk(tag=2), _D), r": unsupported encoding: format tag 0x0002 \(ADPCM\)$"),
    "alaw": (riff(fmt_chunk(tag=6, bits=8), _D), r"format tag 0x0006 \(A-law\)"),
    "mulaw": (riff(fmt_chunk(tag=7, bits=8), _D), r"format tag 0x0007 \(mu-law\)"),
    "mp3_tag": (riff(fmt_chunk(tag=0x55), _D), r"0x0055 \(MPEG Layer 3\)"),
    "odd_tag": (riff(fmt_chunk(tag=0x1234), _D), r": unsupported encoding: format tag 0x1234$"),
    "pcm12": (riff(fmt_chunk(bits=12, block_align=2), _D), r": unsupported encoding: 12-bit PCM$"),
    "float16": (riff(fmt_chunk(tag=3, bits=16), _D), r"unsupported encoding: 16-bit float"),
    "align": (riff(fmt_chunk(channels=2, block_align=3), _D), r"block align 3 bytes .* 2 channel"),
    "fmt_short": (riff(chunk(b"fmt ", b"\x01\x00\x01\x00"), _D), r"fmt chunk too short"),
    "ext_short": (riff(ext_fmt_chunk(1, 1, 8000, 16, size=30), _D), r"extensible fmt chunk too short"),
    "ext_alaw": (riff(ext_fmt_chunk(6, 1, 8000, 8), _D), r"format tag 0x0006 \(A-law\)"),
    "ext_rate": (riff(ext_fmt_chunk(1, 1, 400000, 16), _D), r"sample rate 400000 Hz"),
    "open_data_first": (riff(chunk(b"data", b"", size=0xFFFFFFFF)), r"no fmt chunk before"),
}


@pytest.mark.parametrize("name", list(BAD_FILES))
def test_bad_files_raise_input_error(tmp_path, name):
    content, pattern = BAD_FILES[name]
    path = tmp_path / f"{name}.wav"
    path.write_bytes(content)
    for call in (probe_wav, read_wav, lambda p: list(WavReader(p).blocks(3))):
        with pytest.raises(InputError, match=pattern) as err:
            call(path)
        assert err.value.where == str(path)
        assert "\n" not in str(err.value)


def test_missing_file_directory_and_bad_name(tmp_path):
    with pytest.raises(InputError, match="file not found") as err:
        probe_wav(tmp_path / "nope.wav")
    assert err.value.where == str(tmp_path / "nope.wav")
    with pytest.raises(InputError, match="is a directory"):
        read_wav(tmp_path)
    with pytest.raises(InputError, match="not a valid file name"):
        probe_wav(str(tmp_path / "a\x00b.wav"))


def test_unreadable_file(tmp_path, monkeypatch):
    path = tmp_path / "locked.wav"
    write_wav(path, np.zeros(10), 8000)

    def denied(*args, **kwargs):
        raise PermissionError(13, "Permission denied")

    # chmod 000 does not stop root, so the open itself is made to fail.
    monkeypatch.setattr(wavio, "open", denied, raising=False)
    with pytest.raises(InputError, match="cannot read: Permission denied"):
        probe_wav(path)


def test_nan_names_its_time_and_is_found_per_block(tmp_path):
    x = np.zeros(100_000, dtype=np.float32)
    x[98_760] = np.nan  # 98760 / 8000 Hz = 12.345 s
    path = tmp_path / "nan.wav"
    write_wav(path, np.zeros(100_000), 8000, encoding="float32")
    raw = bytearray(path.read_bytes())
    raw[-x.nbytes :] = x.tobytes()
    path.write_bytes(bytes(raw))
    assert probe_wav(path).frames == 100_000  # the header alone is fine
    with pytest.raises(InputError, match=r": non-finite sample \(NaN\) at 12\.345 s$"):
        read_wav(path)
    seen = 0
    with WavReader(path) as r, pytest.raises(InputError, match="12.345 s"):
        for b in r.blocks(1000):
            seen += len(b)
    assert seen == 98_000  # the 98 clean blocks came through before the error


def test_infinite_samples_in_multichannel_float(tmp_path):
    x = np.zeros((20_000, 2))
    x[16_008, 1] = np.inf  # 16008 / 8000 Hz = 2.001 s
    x[17_000, 1] = -np.inf
    body = x.astype("<f8").tobytes()
    path = tmp_path / "inf.wav"
    path.write_bytes(riff(fmt_chunk(tag=3, channels=2, bits=64), chunk(b"data", body)))
    with pytest.raises(InputError, match=r"non-finite sample \(\+inf\) at 2\.001 s"):
        read_wav(path)
    with pytest.raises(InputError, match=r"\(\+inf\) at 2\.001 s"):
        read_wav(path, channel=1)
    # Only the channels used are checked: channel 0 is clean.
    np.testing.assert_array_equal(read_wav(path, channel=0)[0], np.zeros(20_000))
    x[16_008, 1] = 0.0
    path.write_bytes(riff(fmt_chunk(tag=3, channels=2, bits=64),
                          chunk(b"data", x.astype("<f8").tobytes())))
    with pytest.raises(InputError, match=r"\(-inf\) at 2\.125 s"):
        read_wav(path)


# --- property tests: nothing but InputError ------------------------------------

_PROPERTY = settings(
    max_examples=200,
    derandomize=True,
    database=None,
    deadline=None,
    suppress_health_check=[HealthCheck.function_scoped_fixture],
)


def _read_or_input_error(path):
    """Read ``path`` fully; return the samples, or None on InputError."""
    try:
        info = probe_wav(path)
        x, rate = read_wav(path)
    except InputError as exc:
        assert exc.where == str(path) and "\n" not in exc.message
        return None
    assert len(x) == info.frames > 0 and rate == info.sample_rate
    assert wavio.MIN_SAMPLE_RATE <= rate <= wavio.MAX_SAMPLE_RATE
    return x


@_PROPERTY
@given(blob=st.binary(max_size=400))
def test_random_bytes_raise_only_input_error(tmp_path, blob):
    path = tmp_path / "fuzz.wav"
    path.write_bytes(blob)
    _read_or_input_error(path)


@_PROPERTY
@given(body=st.binary(max_size=400))
def test_random_chunks_after_riff_header_raise_only_input_error(tmp_path, body):
    path = tmp_path / "fuzz.wav"
    path.write_bytes(b"RIFF" + struct.pack("<I", len(body) + 4) + b"WAVE" + body)
    _read_or_input_error(path)


_VALID = riff(
    ext_fmt_chunk(1, 2, 8000, 24),
    chunk(b"LIST", b"INFOabc"),
    chunk(b"data", bytes(range(60))),
)


@_PROPERTY
@given(
    edits=st.lists(st.tuples(st.integers(0, len(_VALID) - 1), st.integers(0, 255)), max_size=6),
    cut=st.integers(0, len(_VALID)),
)
def test_corrupted_valid_file_raises_only_input_error(tmp_path, edits, cut):
    raw = bytearray(_VALID)
    for i, v in edits:
        raw[i] = v
    path = tmp_path / "fuzz.wav"
    path.write_bytes(bytes(raw[:cut]))
    _read_or_input_error(path)


@_PROPERTY
@given(
    tag=st.sampled_from([0, 1, 2, 3, 6, 7, 0x55, 0xFFFE]),
    channels=st.integers(0, 9),
    rate=st.sampled_from([0, 1, 7999, 8000, 44100, 192000, 192001, 2**32 - 1]),
    bits=st.integers(0, 72),
    align=st.integers(0, 80),
    payload=st.binary(max_size=64),
)
def test_random_fmt_fields_raise_only_input_error(tmp_path, tag, channels, rate, bits, align, payload):
    fmt = struct.pack("<HHIIHH", tag, channels, rate, 0, align, bits) + payload
    path = tmp_path / "fuzz.wav"
    path.write_bytes(riff(chunk(b"fmt ", fmt), chunk(b"data", bytes(48))))
    x = _read_or_input_error(path)
    if x is not None:  # accepted: only a header that satisfies every rule
        assert tag in (1, 3, 0xFFFE) and align == channels * (bits // 8) > 0


# --- the writer -----------------------------------------------------------------


def test_write_replaces_atomically_and_leaves_no_temp_file(tmp_path, monkeypatch):
    path = tmp_path / "a.wav"
    write_wav(path, np.full(100, 0.25), 8000)
    assert sorted(os.listdir(tmp_path)) == ["a.wav"]
    assert stat.S_IMODE(os.stat(path).st_mode) == 0o644
    os.chmod(path, 0o640)
    write_wav(path, np.full(50, -0.25), 8000)
    assert sorted(os.listdir(tmp_path)) == ["a.wav"]
    assert stat.S_IMODE(os.stat(path).st_mode) == 0o640  # a replaced file keeps its mode
    good = path.read_bytes()
    np.testing.assert_array_equal(read_wav(path)[0], np.full(50, -0.25))

    def fail(*args):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(os, "replace", fail)
    with pytest.raises(PassbyError, match="cannot write: No space left on device"):
        write_wav(path, np.zeros(10), 8000)
    monkeypatch.undo()
    assert path.read_bytes() == good  # the old file is untouched
    assert sorted(os.listdir(tmp_path)) == ["a.wav"]


def test_write_rejects_bad_data(tmp_path):
    path = tmp_path / "w.wav"
    write_wav(path, np.zeros(4), 8000)
    good = path.read_bytes()
    with pytest.raises(InputError, match=r"non-finite sample at 0\.000 s"):
        write_wav(path, [0.0, np.nan], 8000)
    with pytest.raises(InputError, match="sample rate 7999 Hz is outside"):
        write_wav(path, np.zeros(4), 7999)
    with pytest.raises(InputError, match="no audio samples"):
        write_wav(path, np.zeros(0), 8000)
    with pytest.raises(ValueError, match="unknown encoding"):
        write_wav(path, np.zeros(4), 8000, encoding="alaw")
    with pytest.raises(ValueError, match="1-D or 2-D"):
        write_wav(path, np.zeros((2, 2, 2)), 8000)
    assert path.read_bytes() == good
    assert sorted(os.listdir(tmp_path)) == ["w.wav"]
    with pytest.raises(PassbyError, match="cannot write"):
        write_wav(tmp_path / "missing" / "w.wav", np.zeros(4), 8000)


def test_wavinfo_duration():
    info = WavInfo("x.wav", 48000, 1, 16, "pcm", 72000, 72000, False)
    assert info.duration_s == 1.5
