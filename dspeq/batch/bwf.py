"""Provenance written into the audio files: the BWF ``bext`` chunk and FLAC tags.

python-soundfile does not expose the Broadcast Wave ``bext`` chunk, so this
module reads and writes it itself:

* :func:`walk_riff` lists the chunks of a RIFF/WAVE, RF64 or BW64 file
  (EBU Tech 3306 / ITU-R BS.2088 ``ds64`` sizes included);
* :func:`read_bext` parses a ``bext`` chunk (EBU Tech 3285 layout: 602 fixed
  bytes, then the CodingHistory text);
* :func:`append_bext` adds one at the end of a finished file and updates the
  RIFF (or ``ds64``) size, without rewriting the audio;
* :func:`coding_history_row` and :func:`parse_coding_history` build and read
  CodingHistory rows in the EBU R 98 syntax ``A=PCM,F=48000,W=24,M=stereo,T=…``,
  each row ended by CR LF.

FLAC has no ``bext``; the equivalent provenance goes into Vorbis comments
(``DESCRIPTION``, ``CODINGHISTORY`` with the same CR LF rows, ``COMMENT`` with a
copy for readers that show only the common fields, ``SOFTWARE`` and ``DATE``).
libsndfile writes a placeholder comment block of the right size while the
file is encoded (:func:`flac_placeholder`); :func:`fill_flac_tags` then
replaces that block in place by the real comments plus a PADDING block, so
the audio frames are never rewritten.
"""

from __future__ import annotations

import os
import struct
from dataclasses import dataclass, field

__all__ = [
    "Bext", "Chunk", "RiffLayout", "walk_riff", "read_bext", "pack_bext", "append_bext",
    "coding_history_row", "parse_coding_history", "history_rows", "channel_mode",
    "flac_placeholder", "fill_flac_tags", "read_flac_tags", "BEXT_FIXED_SIZE",
]

#: Bytes of the fixed part of a ``bext`` chunk (EBU Tech 3285 v2: 256 + 32 + 32
#: + 10 + 8 + 4 + 4 + 2 + 64 + 5·2 + 180).
BEXT_FIXED_SIZE = 602
_BEXT_TEXT = (("description", 256), ("originator", 32), ("originator_reference", 32),
              ("origination_date", 10), ("origination_time", 8))
_RIFF_FORMS = (b"RIFF", b"RF64", b"BW64")
_U32_MAX = 0xFFFFFFFF
CRLF = "\r\n"


# ----------------------------------------------------------------------------- RIFF layout
@dataclass(frozen=True)
class Chunk:
    """One RIFF chunk: its id, where its header starts, where its data starts, its size."""

    id: bytes
    offset: int
    data_offset: int
    size: int


@dataclass(frozen=True)
class RiffLayout:
    """The chunk list of a RIFF/WAVE, RF64 or BW64 file.

    Attributes
    ----------
    form : bytes
        ``b"RIFF"``, ``b"RF64"`` or ``b"BW64"``.
    riff_size : int
        Declared size of the form (``ds64`` value for RF64/BW64).
    file_size : int
        Actual size of the file in bytes.
    chunks : tuple of Chunk
        In file order; a chunk whose declared size runs past the end of the
        file is listed with its declared size (see :meth:`present_bytes`).
    """

    form: bytes
    riff_size: int
    file_size: int
    chunks: tuple[Chunk, ...] = field(default_factory=tuple)

    def find(self, chunk_id: bytes) -> Chunk | None:
        """The first chunk with this id, or None."""
        return next((c for c in self.chunks if c.id == chunk_id), None)

    def present_bytes(self, chunk: Chunk) -> int:
        """How many of the chunk's declared data bytes the file really holds."""
        return max(0, min(chunk.size, self.file_size - chunk.data_offset))


def _read_ds64(f, size: int) -> tuple[int, int]:
    body = f.read(size)
    if size < 24 or len(body) < 24:
        raise ValueError("RF64 file without a complete ds64 chunk")
    riff_size, data_size = struct.unpack_from("<QQ", body, 0)
    return riff_size, data_size


def walk_riff(path: str | os.PathLike) -> RiffLayout:
    """List the chunks of a RIFF/WAVE, RF64 or BW64 file.

    Raises
    ------
    ValueError
        If the file is not a WAVE file of one of these forms.
    """
    file_size = os.path.getsize(path)
    with open(path, "rb") as f:
        head = f.read(12)
        if len(head) < 12 or head[:4] not in _RIFF_FORMS or head[8:12] != b"WAVE":
            raise ValueError(f"{os.fspath(path)!r} is not a RIFF/RF64/BW64 WAVE file")
        form = head[:4]
        riff_size = struct.unpack_from("<I", head, 4)[0]
        ds64_data_size = None
        chunks = []
        pos = 12
        while pos + 8 <= file_size:
            f.seek(pos)
            chunk_id, size = struct.unpack("<4sI", f.read(8))
            if chunk_id == b"ds64" and form != b"RIFF":
                riff_size, ds64_data_size = _read_ds64(f, size)
            if chunk_id == b"data" and size == _U32_MAX and ds64_data_size is not None:
                size = ds64_data_size
            chunks.append(Chunk(chunk_id, pos, pos + 8, size))
            pos += 8 + size + (size & 1)
    return RiffLayout(form, riff_size, file_size, tuple(chunks))


# ----------------------------------------------------------------------------- bext
@dataclass(frozen=True)
class Bext:
    """The fields of a ``bext`` chunk (EBU Tech 3285).

    Text fields are ASCII and cut to their fixed widths when packed.  The
    loudness fields of version 2 are not used: :func:`pack_bext` writes
    version 1 with them (and the UMID) zero.
    """

    description: str = ""
    originator: str = ""
    originator_reference: str = ""
    origination_date: str = ""
    origination_time: str = ""
    time_reference: int = 0
    version: int = 1
    umid: bytes = b""
    coding_history: str = ""

    @property
    def rows(self) -> list[str]:
        """The CodingHistory rows, without their line ends."""
        return history_rows(self.coding_history)


def _ascii(text: str) -> bytes:
    return text.encode("ascii", errors="replace")


def pack_bext(bext: Bext) -> bytes:
    """The data of a ``bext`` chunk (602 fixed bytes + CodingHistory)."""
    parts = [_ascii(getattr(bext, name))[:width].ljust(width, b"\0") for name, width in _BEXT_TEXT]
    ref = int(bext.time_reference)
    parts.append(struct.pack("<IIH", ref & _U32_MAX, ref >> 32, int(bext.version)))
    parts.append(bext.umid[:64].ljust(64, b"\0"))
    parts.append(bytes(BEXT_FIXED_SIZE - 348 - 64))      # loudness (unused) + reserved
    fixed = b"".join(parts)
    assert len(fixed) == BEXT_FIXED_SIZE
    return fixed + _ascii(bext.coding_history)


def _unpack_bext(data: bytes) -> Bext:
    if len(data) < BEXT_FIXED_SIZE:
        raise ValueError(f"bext chunk of {len(data)} bytes is shorter than {BEXT_FIXED_SIZE}")
    texts, pos = {}, 0
    for name, width in _BEXT_TEXT:
        texts[name] = data[pos:pos + width].split(b"\0", 1)[0].decode("ascii", errors="replace")
        pos += width
    low, high, version = struct.unpack_from("<IIH", data, pos)
    umid = data[pos + 10:pos + 74]
    history = data[BEXT_FIXED_SIZE:].split(b"\0", 1)[0].decode("ascii", errors="replace")
    return Bext(**texts, time_reference=(high << 32) | low, version=version, umid=umid,
                coding_history=history)


def read_bext(path: str | os.PathLike) -> Bext | None:
    """The ``bext`` chunk of a RIFF/RF64/BW64 file, or None when it has none."""
    layout = walk_riff(path)
    chunk = layout.find(b"bext")
    if chunk is None:
        return None
    with open(path, "rb") as f:
        f.seek(chunk.data_offset)
        return _unpack_bext(f.read(chunk.size))


def append_bext(path: str | os.PathLike, bext: Bext) -> int:
    """Append a ``bext`` chunk to a finished RIFF/RF64/BW64 file; return its size in bytes.

    The chunk goes after the existing chunks (RIFF readers find chunks in
    any order), so the audio data is not moved; the RIFF size, or the
    ``ds64`` riff size of an RF64/BW64 file, is updated.

    Raises
    ------
    ValueError
        If the file already has a ``bext`` chunk, is not RIFF/RF64/BW64, or a
        plain RIFF file would grow past 4 GiB.
    """
    layout = walk_riff(path)
    if layout.find(b"bext") is not None:
        raise ValueError(f"{os.fspath(path)!r} already has a bext chunk")
    data = pack_bext(bext)
    chunk = b"bext" + struct.pack("<I", len(data)) + data + (b"\0" if len(data) & 1 else b"")
    start = layout.file_size + (layout.file_size & 1)
    new_size = start + len(chunk)
    if layout.form == b"RIFF" and new_size - 8 > _U32_MAX:
        raise ValueError(f"{os.fspath(path)!r}: a RIFF file cannot exceed 4 GiB (use RF64)")
    with open(path, "r+b") as f:
        f.seek(layout.file_size)
        f.write(b"\0" * (start - layout.file_size) + chunk)
        if layout.form == b"RIFF":
            f.seek(4)
            f.write(struct.pack("<I", new_size - 8))
        else:
            ds64 = layout.find(b"ds64")
            f.seek(ds64.data_offset)
            f.write(struct.pack("<Q", new_size - 8))
    return len(chunk)


# ----------------------------------------------------------------------------- CodingHistory
def channel_mode(channels: int) -> str:
    """The EBU R 98 ``M=`` value for a channel count (mono, stereo, else multitrack).

    "multitrack" for more than two channels is from memory of EBU R 98's list.
    """
    return {1: "mono", 2: "stereo"}.get(int(channels), "multitrack")


def _clean_text(text: str) -> str:
    """Free text for a ``T=`` field: printable ASCII, no commas (they separate fields)."""
    text = text.replace(",", ";").replace("\r", " ").replace("\n", " ")
    return "".join(ch if 32 <= ord(ch) < 127 else "?" for ch in text)


def coding_history_row(rate: float, bits: int, channels: int, text: str, algorithm: str = "PCM") -> str:
    """One CodingHistory row in the EBU R 98 syntax, ended by CR LF.

    Examples
    --------
    >>> coding_history_row(48000, 24, 2, "dspeq 0.1; riaa")
    'A=PCM,F=48000,W=24,M=stereo,T=dspeq 0.1; riaa\\r\\n'
    """
    return (f"A={algorithm},F={int(round(rate))},W={int(bits)},M={channel_mode(channels)},"
            f"T={_clean_text(text)}{CRLF}")


def history_rows(text: str) -> list[str]:
    """Rows of a CodingHistory text (split on CR LF, or a lone LF), empty rows dropped."""
    return [row.strip("\r") for row in text.replace("\r\n", "\n").split("\n") if row.strip()]


def parse_coding_history(text: str) -> list[dict[str, str]]:
    """Parse CodingHistory rows into dicts of their ``key=value`` fields.

    A comma not followed by ``KEY=`` (one capital letter) is kept as part of
    the previous value, so free text written by other tools with commas in
    it survives.

    Examples
    --------
    >>> parse_coding_history("A=ANALOGUE,M=mono,T=deck; 15 ips\\r\\nA=PCM,F=48000,W=24,M=mono\\r\\n")
    [{'A': 'ANALOGUE', 'M': 'mono', 'T': 'deck; 15 ips'}, {'A': 'PCM', 'F': '48000', 'W': '24', 'M': 'mono'}]
    """
    rows = []
    for row in history_rows(text):
        fields: dict[str, str] = {}
        last = None
        for part in row.split(","):
            key, eq, value = part.partition("=")
            if eq and len(key) == 1 and key.isupper():
                fields[key] = value
                last = key
            elif last is not None:
                fields[last] += "," + part
        rows.append(fields)
    return rows


# ----------------------------------------------------------------------------- FLAC tags
_FLAC_STREAMINFO, _FLAC_PADDING, _FLAC_COMMENT = 0, 1, 4
_VENDOR = b"dspeq"


def flac_placeholder(tags: list[tuple[str, str]]) -> str:
    """Text to set as libsndfile's comment so it reserves room for ``tags``.

    libsndfile writes it as one ``comment=…`` Vorbis comment; the block it
    makes is at least as large as the real comments plus a PADDING header.
    """
    need = len(_pack_comments(tags)) + 16
    return " " * need


def _pack_comments(tags: list[tuple[str, str]]) -> bytes:
    items = [f"{k}={v}".encode() for k, v in tags]
    return (struct.pack("<I", len(_VENDOR)) + _VENDOR + struct.pack("<I", len(items))
            + b"".join(struct.pack("<I", len(i)) + i for i in items))


def _flac_blocks(f) -> list[tuple[int, int, int, bool]]:
    """(type, header offset, length, is_last) of each FLAC metadata block."""
    if f.read(4) != b"fLaC":
        raise ValueError("not a FLAC stream")
    blocks, pos = [], 4
    while True:
        head = f.read(4)
        if len(head) < 4:
            raise ValueError("FLAC metadata ends early")
        kind, last, length = head[0] & 0x7F, bool(head[0] & 0x80), int.from_bytes(head[1:4], "big")
        blocks.append((kind, pos, length, last))
        pos += 4 + length
        if last:
            return blocks
        f.seek(pos)


def _block_header(kind: int, length: int, last: bool) -> bytes:
    return bytes([kind | (0x80 if last else 0)]) + length.to_bytes(3, "big")


def fill_flac_tags(path: str | os.PathLike, tags: list[tuple[str, str]]) -> None:
    """Replace the (placeholder) Vorbis comment block of a FLAC file by ``tags``.

    The new comment block and a PADDING block fill exactly the space of the
    old one; nothing else in the file moves.

    Raises
    ------
    ValueError
        If there is no comment block or it is too small.
    """
    body = _pack_comments(tags)
    with open(path, "r+b") as f:
        found = [b for b in _flac_blocks(f) if b[0] == _FLAC_COMMENT]
        if not found:
            raise ValueError(f"{os.fspath(path)!r} has no Vorbis comment block to fill")
        _, pos, length, last = found[0]
        spare = length - len(body) - 4
        if spare < 0:
            raise ValueError(f"{os.fspath(path)!r}: reserved comment block of {length} bytes is too "
                             f"small for {len(body)} bytes of tags")
        f.seek(pos)
        f.write(_block_header(_FLAC_COMMENT, len(body), False) + body
                + _block_header(_FLAC_PADDING, spare, last) + bytes(spare))


def read_flac_tags(path: str | os.PathLike) -> list[tuple[str, str]]:
    """All Vorbis comments of a FLAC file as (NAME, value) pairs, names upper-cased."""
    with open(path, "rb") as f:
        found = [b for b in _flac_blocks(f) if b[0] == _FLAC_COMMENT]
        if not found:
            return []
        f.seek(found[0][1] + 4)
        data = f.read(found[0][2])
    (vendor_len,) = struct.unpack_from("<I", data, 0)
    pos = 4 + vendor_len
    (count,) = struct.unpack_from("<I", data, pos)
    pos += 4
    tags = []
    for _ in range(count):
        (n,) = struct.unpack_from("<I", data, pos)
        name, _, value = data[pos + 4:pos + 4 + n].decode("utf-8", errors="replace").partition("=")
        tags.append((name.upper(), value))
        pos += 4 + n
    return tags
