"""Tests for audiodsm.io: reading every supported format, validation, atomic writing.

Test files are generated here. The reference for the sample scaling is an independent writer:
Python's standard-library ``wave`` module and hand-built RIFF headers following the Microsoft
WAVE / WAVEFORMATEXTENSIBLE layout (Multimedia Programming Interface and Data Specifications
1.0, 1991, and the WAVEFORMATEXTENSIBLE structure documented in the Windows SDK mmreg.h).
"""

from __future__ import annotations

import os
import struct
import wave

import numpy as np
import pytest
import soundfile as sf

from audiodsm.errors import AudioFileError, OutputError, ParameterError
from audiodsm.io import (
    audio_info,
    iter_audio_blocks,
    open_audio_writer,
    read_audio,
    read_audio_span,
    write_audio_atomic,
)

# KSDATAFORMAT_SUBTYPE_PCM / _IEEE_FLOAT GUID tails (mmreg.h / ksmedia.h): format tag in the
# first two bytes, then 0000-0010-8000-00aa00389b71.
_GUID_TAIL = b"\x00\x00\x00\x00\x10\x00\x80\x00\x00\xaa\x00\x38\x9b\x71"


def _riff_wav(payload: bytes, *, rate, channels, bits, float_format=False, extensible=False):
    """Build a WAV file byte string by hand (independent of libsndfile)."""
    tag = 3 if float_format else 1
    block_align = channels * bits // 8
    base = struct.pack("<HHIIHH", tag, channels, rate, rate * block_align, block_align, bits)
    if extensible:
        mask = (1 << channels) - 1
        guid = struct.pack("<H", tag) + _GUID_TAIL
        fmt = struct.pack("<HHIIHH", 0xFFFE, channels, rate, rate * block_align, block_align, bits)
        fmt += struct.pack("<HHI", 22, bits, mask) + guid
    else:
        fmt = base
    body = b"WAVE" + b"fmt " + struct.pack("<I", len(fmt)) + fmt
    body += b"data" + struct.pack("<I", len(payload)) + payload
    return b"RIFF" + struct.pack("<I", len(body)) + body


def _codes(rng, n, channels, bits):
    lo, hi = -(1 << (bits - 1)), (1 << (bits - 1)) - 1
    codes = rng.integers(lo, hi + 1, size=(n, channels), dtype=np.int64)
    codes[0, 0], codes[1, 0] = lo, hi  # the extremes are always present
    return codes


@pytest.mark.parametrize("bits", [8, 16, 24, 32])
def test_integer_wav_scaling_against_stdlib_wave(tmp_path, rng, bits):
    # Reference: Python's stdlib ``wave`` writes plain PCM WAV (8-bit unsigned offset binary,
    # other widths signed little-endian, per the RIFF WAVE specification). Integer code c of
    # a b-bit file must read as c / 2**(b-1) exactly (full scale ±1.0): every such value is
    # exact in float64, so the comparison has zero tolerance.
    n, ch, rate = 500, 2, 48000
    codes = _codes(rng, n, ch, bits)
    if bits == 8:
        raw = (codes + 128).astype(np.uint8).tobytes()
    elif bits == 24:
        u = (codes & 0xFFFFFF).astype("<u4")
        raw = np.stack([(u >> s) & 0xFF for s in (0, 8, 16)], axis=-1).astype(np.uint8).tobytes()
    else:
        raw = codes.astype(f"<i{bits // 8}").tobytes()
    path = tmp_path / f"c{bits}.wav"
    with wave.open(str(path), "wb") as w:
        w.setnchannels(ch)
        w.setsampwidth(bits // 8)
        w.setframerate(rate)
        w.writeframes(raw)
    x, r = read_audio(path)
    assert r == rate and x.dtype == np.float64 and x.shape == (n, ch)
    np.testing.assert_array_equal(x, codes / 2.0 ** (bits - 1))


@pytest.mark.parametrize("bits,is_float", [(16, False), (24, False), (32, True), (64, True)])
def test_wave_format_extensible(tmp_path, rng, bits, is_float):
    # Reference: a WAVE_FORMAT_EXTENSIBLE header (tag 0xFFFE, 22 extra bytes, sub-format GUID)
    # built byte by byte above; samples must come back exactly.
    n, ch, rate = 300, 3, 96000
    if is_float:
        vals = rng.uniform(-1, 1, size=(n, ch)).astype(f"<f{bits // 8}")
        raw, expected = vals.tobytes(), vals.astype(np.float64)
    else:
        codes = _codes(rng, n, ch, bits)
        if bits == 24:
            u = (codes & 0xFFFFFF).astype("<u4")
            raw = np.stack([(u >> s) & 0xFF for s in (0, 8, 16)], -1).astype(np.uint8).tobytes()
        else:
            raw = codes.astype("<i2").tobytes()
        expected = codes / 2.0 ** (bits - 1)
    path = tmp_path / "ext.wav"
    path.write_bytes(
        _riff_wav(raw, rate=rate, channels=ch, bits=bits, float_format=is_float, extensible=True)
    )
    info = audio_info(path)
    assert info.container == "WAVEX" and info.channels == ch and info.rate_hz == rate
    x, r = read_audio(path)
    assert r == rate
    np.testing.assert_array_equal(x, expected)


@pytest.mark.parametrize(
    "suffix,subtype",
    [
        (".flac", "PCM_16"),
        (".flac", "PCM_24"),
        (".flac", "PCM_S8"),
        (".aiff", "PCM_S8"),
        (".aiff", "PCM_16"),
        (".aif", "PCM_24"),
        (".aiff", "PCM_32"),
        (".aiff", "FLOAT"),
        (".aiff", "DOUBLE"),
        (".wav", "PCM_U8"),
        (".wav", "FLOAT"),
        (".wav", "DOUBLE"),
    ],
)
def test_flac_aiff_and_wav_formats_round_trip(tmp_path, rng, suffix, subtype):
    # Values on the format's own grid survive a write and read exactly (lossless formats).
    bits = {"PCM_S8": 8, "PCM_U8": 8, "PCM_16": 16, "PCM_24": 24, "PCM_32": 32}.get(subtype)
    if bits:
        x = _codes(rng, 400, 2, bits) / 2.0 ** (bits - 1)
    elif subtype == "FLOAT":
        x = rng.uniform(-1, 1, (400, 2)).astype(np.float32).astype(np.float64)
    else:
        x = rng.uniform(-1, 1, (400, 2))
    path = tmp_path / f"f{suffix}"
    container = {".flac": "FLAC", ".wav": "WAV"}.get(suffix, "AIFF")
    sf.write(str(path), x, 44100, subtype=subtype, format=container)
    y, r = read_audio(path)
    assert r == 44100
    np.testing.assert_array_equal(y, x)


def test_blocks_equal_whole_read(tmp_path, rng):
    x = rng.uniform(-0.9, 0.9, (10007, 2))
    path = write_audio_atomic(tmp_path / "b.wav", x, 48000, subtype="DOUBLE")
    blocks = list(iter_audio_blocks(path, 1000))
    assert [b.shape[0] for b in blocks] == [1000] * 10 + [7]
    np.testing.assert_array_equal(np.concatenate(blocks), read_audio(path)[0])
    np.testing.assert_array_equal(np.concatenate(blocks), x)
    with pytest.raises(ParameterError, match="block_frames"):
        next(iter_audio_blocks(path, 0))


@pytest.mark.parametrize("suffix,subtype", [(".wav", "PCM_24"), (".flac", "PCM_16")])
def test_span_reads_equal_slices(tmp_path, rng, suffix, subtype):
    bits = {"PCM_16": 16, "PCM_24": 24}[subtype]
    x = _codes(rng, 50000, 2, bits) / 2.0 ** (bits - 1)
    path = tmp_path / f"span{suffix}"
    sf.write(str(path), x, 48000, subtype=subtype)
    for start, frames in ((0, 10), (12345, 20000), (49990, 10), (7, 0)):
        np.testing.assert_array_equal(
            read_audio_span(path, start, frames), x[start : start + frames]
        )
    with pytest.raises(ParameterError, match="at most 50000"):
        read_audio_span(path, 49990, 11)
    with pytest.raises(ParameterError, match="start_frame"):
        read_audio_span(path, -1, 5)


def test_span_read_reports_nan_frame(tmp_path):
    x = np.zeros((1000, 1))
    x[600, 0] = np.inf
    path = tmp_path / "inf.wav"
    sf.write(str(path), x, 48000, subtype="FLOAT")
    assert read_audio_span(path, 0, 600).shape == (600, 1)
    with pytest.raises(AudioFileError, match="frame 600"):
        read_audio_span(path, 500, 200)


# ---------------------------------------------------------------------------------------------
# Bad files: one AudioFileError naming the file and the problem
# ---------------------------------------------------------------------------------------------


def _good_bytes(tmp_path, rng, suffix=".wav", subtype="PCM_24"):
    path = tmp_path / f"good{suffix}"
    sf.write(str(path), rng.uniform(-0.5, 0.5, (48000, 2)), 48000, subtype=subtype)
    return path.read_bytes()


def _assert_one_line(exc, path, words):
    msg = str(exc.value)
    assert "\n" not in msg and str(path) in msg and words in msg


def test_missing_empty_and_garbage(tmp_path):
    missing = tmp_path / "nothing.wav"
    with pytest.raises(AudioFileError) as exc:
        read_audio(missing)
    _assert_one_line(exc, missing, "no such file")
    empty = tmp_path / "empty.wav"
    empty.write_bytes(b"")
    with pytest.raises(AudioFileError) as exc:
        read_audio(empty)
    _assert_one_line(exc, empty, "empty")
    garbage = tmp_path / "garbage.wav"
    garbage.write_bytes(b"not audio at all " * 20)
    with pytest.raises(AudioFileError) as exc:
        audio_info(garbage)
    _assert_one_line(exc, garbage, "unreadable")


def test_header_only_file_is_empty(tmp_path):
    path = tmp_path / "header_only.wav"
    path.write_bytes(_riff_wav(b"", rate=48000, channels=1, bits=16))
    with pytest.raises(AudioFileError) as exc:
        read_audio(path)
    _assert_one_line(exc, path, "empty")


@pytest.mark.parametrize("suffix", [".wav", ".aiff", ".flac"])
def test_truncated_files(tmp_path, rng, suffix):
    good = _good_bytes(tmp_path, rng, suffix)
    path = tmp_path / f"cut{suffix}"
    path.write_bytes(good[: len(good) // 2])
    with pytest.raises(AudioFileError) as exc:
        read_audio(path)
    _assert_one_line(exc, path, "truncated")


def test_nan_and_inf_samples(tmp_path):
    x = np.zeros((1000, 1))
    x[700, 0] = np.nan
    path = tmp_path / "nan.wav"
    sf.write(str(path), x, 48000, subtype="FLOAT")
    with pytest.raises(AudioFileError) as exc:
        read_audio(path)
    _assert_one_line(exc, path, "NaN or Inf")
    assert "frame 700" in str(exc.value)
    x[700, 0] = np.inf
    sf.write(str(path), x, 48000, subtype="DOUBLE")
    with pytest.raises(AudioFileError, match="NaN or Inf"):
        list(iter_audio_blocks(path, 256))


def test_too_many_channels_and_low_rate(tmp_path):
    many = tmp_path / "nine.wav"
    sf.write(str(many), np.zeros((100, 9)), 48000, subtype="PCM_16")
    with pytest.raises(AudioFileError) as exc:
        audio_info(many)
    _assert_one_line(exc, many, "9 channels")
    low = tmp_path / "low.wav"
    sf.write(str(low), np.zeros((100, 1)), 32000, subtype="PCM_16")
    with pytest.raises(AudioFileError) as exc:
        read_audio(low)
    _assert_one_line(exc, low, "32000 Hz")
    ok = tmp_path / "eight.wav"
    sf.write(str(ok), np.zeros((100, 8)), 44100, subtype="PCM_16")
    assert audio_info(ok).channels == 8


# ---------------------------------------------------------------------------------------------
# Writing
# ---------------------------------------------------------------------------------------------


def test_write_atomic_round_trip_and_refuses_overwrite(tmp_path, rng):
    x = _codes(rng, 2000, 2, 24) / 2.0**23
    path = write_audio_atomic(tmp_path / "w.wav", x, 96000)
    assert audio_info(path).sample_format == "PCM_24"
    np.testing.assert_array_equal(read_audio(path)[0], x)
    with pytest.raises(OutputError, match="already exists"):
        write_audio_atomic(path, x, 96000)
    write_audio_atomic(path, x[:10], 96000, overwrite=True)
    assert audio_info(path).frames == 10
    with pytest.raises(OutputError, match="input"):
        write_audio_atomic(path, x, 96000, overwrite=True, protect=[path])
    assert audio_info(path).frames == 10
    assert sorted(os.listdir(tmp_path)) == ["w.wav"]  # no temporary left behind


def test_write_float_keeps_values_beyond_full_scale(tmp_path):
    x = np.array([[1.5], [-2.0], [0.25]])
    path = write_audio_atomic(tmp_path / "f.wav", x, 48000, subtype="FLOAT")
    np.testing.assert_array_equal(read_audio(path)[0], x)
    with pytest.raises(ParameterError, match="frames"):
        write_audio_atomic(tmp_path / "i.wav", x, 48000, subtype="PCM_24")


def test_write_rejects_bad_requests(tmp_path):
    x = np.zeros(10)
    with pytest.raises(OutputError, match="extension"):
        write_audio_atomic(tmp_path / "x.mp9", x, 48000)
    with pytest.raises(OutputError, match="FLOAT"):
        write_audio_atomic(tmp_path / "x.flac", x, 48000, subtype="FLOAT")
    with pytest.raises(OutputError, match="does not exist"):
        write_audio_atomic(tmp_path / "no" / "x.wav", x, 48000)
    with pytest.raises(ParameterError, match="subtype"):
        write_audio_atomic(tmp_path / "x.wav", x, 48000, subtype="PCM_12")
    with pytest.raises(ParameterError, match="frames"):
        write_audio_atomic(tmp_path / "x.wav", [np.nan], 48000)
    assert os.listdir(tmp_path) == []


def test_streaming_writer_renames_only_on_success(tmp_path, rng):
    x = rng.uniform(-1, 1, (5000, 2)).astype(np.float32).astype(np.float64)
    final = tmp_path / "s.wav"
    with open_audio_writer(final, rate_hz=48000, channels=2, subtype="FLOAT") as w:
        for start in range(0, 5000, 1234):
            w.write(x[start : start + 1234])
            assert not final.exists()  # nothing under the final name while writing
    np.testing.assert_array_equal(read_audio(final)[0], x)

    failed = tmp_path / "failed.wav"
    with pytest.raises(KeyboardInterrupt):
        with open_audio_writer(failed, rate_hz=48000, channels=2) as w:
            w.write(x[:100] * 0.5)
            raise KeyboardInterrupt
    assert sorted(os.listdir(tmp_path)) == ["s.wav"]
    with pytest.raises(ParameterError, match="channels"):
        with open_audio_writer(failed, rate_hz=48000, channels=2) as w:
            w.write(np.zeros((10, 3)))
    assert sorted(os.listdir(tmp_path)) == ["s.wav"]


def test_text_is_replaced_whole_or_not_at_all(tmp_path):
    from audiodsm.io_files import replace_text_atomically

    target = tmp_path / "notes.csv"
    assert replace_text_atomically(target, "a,b\r\n1,2\r\n") == target
    # no newline translation: CSV line ends survive as written
    assert target.read_bytes() == b"a,b\r\n1,2\r\n"
    # a text UTF-8 cannot encode (a lone surrogate) fails mid-write: the old file stays
    # and no temporary file is left beside it
    with pytest.raises(UnicodeEncodeError):
        replace_text_atomically(target, "x\ud800")
    assert target.read_bytes() == b"a,b\r\n1,2\r\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["notes.csv"]
    with pytest.raises(OSError):
        replace_text_atomically(tmp_path / "missing" / "x.txt", "x")
