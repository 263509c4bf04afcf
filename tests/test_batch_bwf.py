"""BWF bext chunk and FLAC tags: our writer checked against independent readers (libsndfile)."""

from __future__ import annotations

import struct
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from conftest import write_audio

from dspeq.batch import bwf

# libsndfile's command number for reading the bext chunk (sndfile.h: SFC_GET_BROADCAST_INFO = 0x10F0).
SFC_GET_BROADCAST_INFO = 0x10F0


def libsndfile_bext(path: Path) -> dict:
    """The bext chunk as libsndfile itself parses it (an independent reader).

    sndfile.h lays SF_BROADCAST_INFO out as description[256], originator[32],
    originator_reference[32], origination_date[10], origination_time[8], then
    (4-byte aligned, offset 340) time_reference_low/high, version (short),
    umid[64], five int16 loudness fields, reserved[180], coding_history_size
    (uint32 at offset 604) and coding_history from offset 608.
    """
    from soundfile import _ffi, _snd

    size = 608 + 8192
    with sf.SoundFile(str(path)) as f:
        buf = _ffi.new("char[]", size)
        ok = _snd.sf_command(f._file, SFC_GET_BROADCAST_INFO, buf, size)
        frames = f.frames
    raw = bytes(_ffi.buffer(buf))
    low, high, version = struct.unpack_from("<IIh", raw, 340)
    (hist_len,) = struct.unpack_from("<I", raw, 604)
    text = lambda a, b: raw[a:b].split(b"\0", 1)[0].decode("ascii")  # noqa: E731
    return {"ok": ok, "frames": frames, "description": text(0, 256), "originator": text(256, 288),
            "reference": text(288, 320), "date": raw[320:330].decode(), "time": raw[330:338].decode(),
            "time_reference": (high << 32) | low, "version": version,
            "history": raw[608:608 + hist_len].decode("ascii")}


def test_r98_row_syntax():
    # EBU R 98 row syntax: A=…,F=…,W=…,M=…,T=… ended by CR LF; commas are field separators, so free
    # text must not contain them.
    row = bwf.coding_history_row(96000, 24, 2, "dspeq 1; riaa, fit; gain -3.0 dB")
    assert row == "A=PCM,F=96000,W=24,M=stereo,T=dspeq 1; riaa; fit; gain -3.0 dB\r\n"
    assert bwf.coding_history_row(44100.0, 16, 1, "x").startswith("A=PCM,F=44100,W=16,M=mono,")
    assert bwf.coding_history_row(48000, 24, 1, "µs").endswith("T=?s\r\n")      # ASCII only


def test_parse_history_keeps_commas_in_free_text():
    # The example row layout of EBU R 98 (analogue source, then PCM steps), from memory.
    text = ("A=ANALOGUE,M=stereo,T=Studer A816; SN1007; 38; Agfa PER528\r\n"
            "A=PCM,F=48000,W=18,M=stereo,T=NVision NV1000, A/D\r\n")
    rows = bwf.parse_coding_history(text)
    assert rows[0] == {"A": "ANALOGUE", "M": "stereo", "T": "Studer A816; SN1007; 38; Agfa PER528"}
    assert rows[1]["T"] == "NVision NV1000, A/D" and rows[1]["W"] == "18"
    assert bwf.history_rows("a\nb\r\n\r\n") == ["a", "b"]


@pytest.mark.parametrize("fmt", ["WAV", "WAVEX", "RF64"])
def test_bext_appended_is_read_by_libsndfile(tmp_path, fmt):
    path = write_audio(tmp_path / f"x_{fmt}.wav", fmt=fmt, channels=1, seconds=0.01001)  # odd byte count
    frames = sf.info(str(path)).frames
    before = sf.read(str(path))[0]
    history = "A=ANALOGUE,M=mono,T=deck\r\nA=PCM,F=48000,W=24,M=mono,T=step two\r\n"
    bext = bwf.Bext(description="Derivative of a flat transfer", originator="dspeq",
                    originator_reference="0123456789abcdef0123456789abcdef", origination_date="2024-05-02",
                    origination_time="10:15:00", time_reference=2**33 + 5, coding_history=history)
    bwf.append_bext(path, bext)
    got = libsndfile_bext(path)
    assert got["ok"] and got["frames"] == frames
    assert got["description"] == bext.description and got["originator"] == "dspeq"
    assert got["reference"] == bext.originator_reference
    assert (got["date"], got["time"]) == ("2024-05-02", "10:15:00")
    assert got["time_reference"] == 2**33 + 5 and got["version"] == 1
    assert got["history"] == history
    assert bwf.read_bext(path) == bext.__class__(**{**bext.__dict__, "umid": bytes(64)})
    layout = bwf.walk_riff(path)
    assert layout.riff_size == layout.file_size - 8          # RIFF or ds64 size updated
    assert np.array_equal(sf.read(str(path))[0], before)     # audio untouched
    with pytest.raises(ValueError, match="already has a bext"):
        bwf.append_bext(path, bext)


def test_bext_fixed_part_is_602_bytes():
    # EBU Tech 3285: 602 bytes before CodingHistory.
    data = bwf.pack_bext(bwf.Bext(description="d" * 300, coding_history="A=PCM\r\n"))
    assert len(data) == 602 + 7 and data[:256] == b"d" * 256


def test_walk_riff_refuses_other_files(tmp_path):
    path = write_audio(tmp_path / "x.aiff", fmt="AIFF")
    with pytest.raises(ValueError, match="not a RIFF"):
        bwf.walk_riff(path)


def test_flac_tags_fill_reserved_block_and_libsndfile_reads_them(tmp_path):
    history = "A=PCM,F=48000\r\nA=PCM,F=44100\r\n"
    tags = [("DESCRIPTION", "Playback de-emphasis"), ("CODINGHISTORY", history), ("COMMENT", history),
            ("SOFTWARE", "dspeq test"), ("DATE", "2024-05-02")]
    path = tmp_path / "t.flac"
    data = (np.arange(4410 * 2).reshape(-1, 2) % 200 - 100).astype(np.int32) << 16
    with sf.SoundFile(str(path), "w", 44100, 2, "PCM_16", format="FLAC") as f:
        f.comment = bwf.flac_placeholder(tags)
        f.write(data)
    size = path.stat().st_size
    bwf.fill_flac_tags(path, tags)
    assert path.stat().st_size == size                       # filled in place
    assert bwf.read_flac_tags(path) == tags
    with sf.SoundFile(str(path)) as f:                        # independent reader
        meta = f.copy_metadata()
        audio = f.read(dtype="int32")
    assert meta["comment"] == tags[2][1] and meta["software"] == "dspeq test" and meta["date"] == "2024-05-02"
    assert np.array_equal(audio, data)
    with pytest.raises(ValueError, match="too small"):
        bwf.fill_flac_tags(path, tags + [("X", "y" * 5000)])
