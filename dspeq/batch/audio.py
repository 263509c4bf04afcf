"""Audio files for the batch processor: open, read in blocks, check, quantize, write.

* :class:`Source` opens an original read-only, reads it in fixed-size blocks
  into one reused buffer, and detects a truncated file (frames read versus
  frames declared by the container header) and decoder errors.
* :func:`resolve_output` chooses the output container and encoding (the
  input's by default) and switches a WAV that would pass 4 GiB to RF64.
* :class:`Spool` keeps the first-pass (filtered) samples of the peak-safe
  level mode for the second pass: in memory under a budget, else in a raw
  temporary file beside the output, so the input is decoded only once.
* :class:`Sink` writes to a temporary name in the output folder, quantizes
  integer output itself with seeded TPDF dither (via
  :func:`dspeq._kernels.quantize_tpdf`, counting clipped samples, or
  :meth:`Quantizer.filtered`, which filters and quantizes in one kernel
  pass), keeps an MD5 of the samples as written, and on
  :meth:`Sink.commit` adds the provenance metadata and renames the file to
  its final name.
* :class:`FileDigest` computes a file's SHA-256 in a background thread
  (hashlib and file reads release the GIL), so that hashing an original
  overlaps with decoding it.

The sample MD5 follows FLAC's STREAMINFO convention: interleaved samples,
signed little-endian integers of the output word length (8-bit output is
hashed as signed), or the IEEE float bytes for float output.  For FLAC
output the encoder computes exactly this MD5 while it encodes and stores it
in STREAMINFO, so the Sink reads it from there instead of hashing the
samples a second time (a test checks it against the decoded samples).

soundfile is imported inside the functions that need it.
"""

from __future__ import annotations

import hashlib
import os
import secrets
import struct
import threading
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .._errors import AudioFileError, JobError
from . import bwf

__all__ = [
    "AUDIO_EXTENSIONS", "OUTPUT_FORMATS", "SUBTYPES", "TEMP_SUFFIX", "OutputSpec", "Source", "Sink",
    "Spool", "Quantizer", "resolve_output", "output_suffix", "sha256_file", "FileDigest", "declared_frames",
    "remove_stale_temps", "temp_path", "RF64_THRESHOLD",
]

#: File name endings (lower case) taken as audio when scanning an input tree.
AUDIO_EXTENSIONS = frozenset({".wav", ".wave", ".bwf", ".rf64", ".w64", ".flac", ".aif", ".aiff",
                              ".aifc"})
#: Our output format names -> (libsndfile major format, file name ending).
OUTPUT_FORMATS = {"wav": ("WAV", ".wav"), "wavex": ("WAVEX", ".wav"), "rf64": ("RF64", ".wav"),
                  "w64": ("W64", ".w64"), "flac": ("FLAC", ".flac"), "aiff": ("AIFF", ".aiff")}
#: Our encoding names -> bits (None for float).
SUBTYPES = {"int8": 8, "int16": 16, "int24": 24, "int32": 32, "float32": None, "float64": None}
_SF_SUBTYPE = {"int16": "PCM_16", "int24": "PCM_24", "int32": "PCM_32", "float32": "FLOAT",
               "float64": "DOUBLE"}
_FROM_SF_SUBTYPE = {"PCM_S8": "int8", "PCM_U8": "int8", "PCM_16": "int16", "PCM_24": "int24",
                    "PCM_32": "int32", "FLOAT": "float32", "DOUBLE": "float64"}
#: What "same" becomes when the container cannot hold the input's encoding.
_FALLBACK = {"flac": "int24"}
_INPUT_FORMATS = {"WAV": "wav", "WAVEX": "wavex", "RF64": "rf64", "W64": "w64", "FLAC": "flac",
                  "AIFF": "aiff"}
#: A RIFF WAV output estimated above this many bytes is written as RF64 (4 GiB less 1 MiB
#: of room for headers and the bext chunk).
RF64_THRESHOLD = 2**32 - 2**20
#: Temporary outputs are hidden files ``.<final name>.<token><TEMP_SUFFIX>`` in the output folder.
TEMP_SUFFIX = ".dspeq-part"
_HASH_CHUNK = 1 << 20


def sha256_file(path: str | os.PathLike) -> tuple[str, int]:
    """SHA-256 (hex) and size in bytes of a file, read in 1 MiB chunks."""
    with open(path, "rb", buffering=0) as f:
        return _sha256_of(f)


def _sha256_of(f) -> tuple[str, int]:
    h = hashlib.sha256()
    size = 0
    buf = bytearray(_HASH_CHUNK)
    view = memoryview(buf)
    while n := f.readinto(buf):
        h.update(view[:n])
        size += n
    return h.hexdigest(), size


class FileDigest:
    """:func:`sha256_file` of ``path``, computed in a background thread.

    The file is opened at once (so a missing or unreadable file raises
    OSError here, as :func:`sha256_file` would) and read and hashed in a
    thread; :meth:`result` waits for it. Started before the file is decoded,
    the hashing costs no wall time on a machine with a spare core, and on a
    busy one what the synchronous call would.
    """

    def __init__(self, path: str | os.PathLike):
        self._value: tuple[str, int] | None = None
        self._error: BaseException | None = None
        f = open(path, "rb", buffering=0)  # noqa: SIM115 - closed by the thread
        self._thread = threading.Thread(target=self._run, args=(f,), name="dspeq-sha256", daemon=True)
        self._thread.start()

    def _run(self, f) -> None:
        try:
            with f:
                self._value = _sha256_of(f)
        except BaseException as exc:  # noqa: BLE001 - re-raised in result()
            self._error = exc

    def result(self) -> tuple[str, int]:
        """(SHA-256 hex, size in bytes); raises what hashing raised (e.g. OSError)."""
        self._thread.join()
        if self._error is not None:
            raise self._error
        return self._value

    def hex_or_none(self) -> str | None:
        """The SHA-256, or None if hashing failed."""
        self._thread.join()
        return None if self._value is None else self._value[0]


# ----------------------------------------------------------------------------- output format
@dataclass(frozen=True)
class OutputSpec:
    """How an output file is written.

    Attributes
    ----------
    container, subtype : str
        Our names (``"flac"``, ``"int24"`` …).
    sf_format, sf_subtype : str
        The libsndfile names.
    bits : int or None
        Integer word length, None for float output.
    note : str
        Why the format differs from what was asked, if it does.
    """

    container: str
    subtype: str
    sf_format: str
    sf_subtype: str
    bits: int | None
    note: str = ""

    @property
    def is_float(self) -> bool:
        return self.bits is None

    @property
    def bytes_per_sample(self) -> int:
        return (self.bits or (64 if self.subtype == "float64" else 32)) // 8


def output_suffix(output_format: str, input_path: str | os.PathLike) -> str:
    """File name ending of the output: the input's own for ``"same"``."""
    if output_format == "same":
        return Path(input_path).suffix
    return OUTPUT_FORMATS[output_format][1]


def _sf_subtype(subtype: str, container: str) -> str:
    if subtype == "int8":
        return "PCM_U8" if container in ("wav", "wavex", "rf64", "w64") else "PCM_S8"
    return _SF_SUBTYPE[subtype]


def resolve_output(output_format: str, subtype: str, source: Source) -> OutputSpec:
    """The output format for ``source`` under the settings ``output_format``/``subtype``.

    ``"same"`` keeps the input's container or encoding; an encoding the
    container cannot hold (float or 32-bit in FLAC) becomes int24, and a
    WAV/WAVEX output estimated above 4 GiB becomes RF64 (both noted).

    Raises
    ------
    JobError
        If an explicitly asked combination is impossible.
    """
    import soundfile as sf

    notes = []
    container = source.container if output_format == "same" else output_format
    if subtype == "same":
        sub = _FROM_SF_SUBTYPE.get(source.subtype)
        if sub is None:
            sub = "int16"
            notes.append(f"input encoding {source.subtype} written as int16")
        if not sf.check_format(OUTPUT_FORMATS[container][0], _sf_subtype(sub, container)):
            notes.append(f"{container} cannot hold {sub}; written as {_FALLBACK.get(container, 'int24')}")
            sub = _FALLBACK.get(container, "int24")
    else:
        sub = subtype
    if container in ("wav", "wavex"):
        estimate = source.frames * source.channels * (SUBTYPES[sub] or 32) // 8
        if sub == "float64":
            estimate *= 2
        if estimate > RF64_THRESHOLD:
            notes.append(f"estimated {estimate} bytes exceed a RIFF file's 4 GiB: written as RF64")
            container = "rf64"
    sf_format, sf_sub = OUTPUT_FORMATS[container][0], _sf_subtype(sub, container)
    if not sf.check_format(sf_format, sf_sub):
        raise JobError(f"output format {container!r} cannot hold subtype {sub!r}")
    return OutputSpec(container, sub, sf_format, sf_sub, SUBTYPES[sub], "; ".join(notes))


# ----------------------------------------------------------------------------- declared length
def _riff_declared(path: str) -> tuple[int, int] | None:
    layout = bwf.walk_riff(path)
    fmt, data = layout.find(b"fmt "), layout.find(b"data")
    if fmt is None or data is None:
        return None
    with open(path, "rb") as f:
        f.seek(fmt.data_offset + 12)
        (block_align,) = struct.unpack("<H", f.read(2))
    if block_align == 0 or (layout.form == b"RIFF" and data.size in (0, 0xFFFFFFFF)):
        return None   # unfinalized stream: no declared length to check against
    return data.size // block_align, layout.present_bytes(data) // block_align


def _w64_declared(path: str) -> tuple[int, int] | None:
    size = os.path.getsize(path)
    block_align = None
    with open(path, "rb") as f:
        pos = 40
        while pos + 24 <= size:
            f.seek(pos)
            guid, length = struct.unpack("<16sQ", f.read(24))
            if guid[:4] == b"fmt ":
                block_align = struct.unpack("<12xH", f.read(14))[0]
            elif guid[:4] == b"data" and block_align:
                declared = length - 24
                return declared // block_align, max(0, min(declared, size - pos - 24)) // block_align
            if length < 24:
                return None
            pos += (length + 7) & ~7
    return None


def _aiff_declared(path: str) -> tuple[int, int] | None:
    size = os.path.getsize(path)
    frames = frame_bytes = None
    with open(path, "rb") as f:
        pos = 12
        while pos + 8 <= size:
            f.seek(pos)
            cid, length = struct.unpack(">4sI", f.read(8))
            if cid == b"COMM":
                channels, frames, bits = struct.unpack(">hIh", f.read(8))
                frame_bytes = channels * ((bits + 7) // 8)
            elif cid == b"SSND" and frames is not None and frame_bytes:
                (offset,) = struct.unpack(">I", f.read(4))
                present = max(0, min(length - 8, size - pos - 16) - offset)
                return frames, present // frame_bytes
            pos += 8 + length + (length & 1)
    return None


_DECLARED = {"wav": _riff_declared, "wavex": _riff_declared, "rf64": _riff_declared,
             "w64": _w64_declared, "aiff": _aiff_declared}


def declared_frames(path: str | os.PathLike, container: str) -> tuple[int, int] | None:
    """(frames declared by the header, frames the file holds), or None if not knowable.

    For WAV/WAVEX/RF64, W64 and AIFF the header's data size is compared with
    the bytes present; libsndfile itself silently shortens a truncated file.
    FLAC is checked while decoding instead (STREAMINFO total vs frames read).
    """
    parse = _DECLARED.get(container)
    if parse is None:
        return None
    try:
        return parse(os.fspath(path))
    except (ValueError, struct.error):
        return None


# ----------------------------------------------------------------------------- reading
def _describe_decoder_error(exc: Exception) -> str:
    text = getattr(exc, "error_string", None) or str(exc)
    return text.strip().removeprefix("Error : ").strip() or type(exc).__name__


class Source:
    """An original audio file, opened read-only and read in blocks.

    Parameters
    ----------
    path : path-like
        The file.

    Raises
    ------
    AudioFileError
        Empty file, not readable as audio, unsupported container, or a header
        that declares more audio than the file holds.
    """

    def __init__(self, path: str | os.PathLike):
        import soundfile as sf

        self.path = os.fspath(path)
        if os.path.getsize(self.path) == 0:
            raise AudioFileError(f"empty file (0 bytes): {self.path!r}")
        try:
            self._sf = sf.SoundFile(self.path, "r")
        except (sf.LibsndfileError, RuntimeError, TypeError) as exc:
            raise AudioFileError(f"not readable as audio ({_describe_decoder_error(exc)}): "
                                 f"{self.path!r}") from None
        self.container = _INPUT_FORMATS.get(self._sf.format)
        self.subtype = self._sf.subtype
        self.rate = float(self._sf.samplerate)
        self.channels = int(self._sf.channels)
        self.frames = int(self._sf.frames)
        self.frames_read = 0
        if self.container is None:
            self.close()
            raise AudioFileError(f"unsupported container {self._sf.format!r}: {self.path!r}")
        self._check_declared()

    def _check_declared(self) -> None:
        extent = declared_frames(self.path, self.container)
        if extent is None:
            return
        declared, present = extent
        self.frames = declared
        if present < declared:
            self.close()
            raise AudioFileError(self._short_message(present))

    def _short_message(self, got: int) -> str:
        missing = self.frames - got
        return (f"truncated: the header declares {self.frames} frames but only {got} are present "
                f"({missing / self.rate:.3f} s missing): {self.path!r}")

    @property
    def is_float(self) -> bool:
        return self.subtype in ("FLOAT", "DOUBLE")

    @property
    def duration_s(self) -> float:
        return self.frames / self.rate

    def blocks(self, block_frames: int, dtype: np.dtype) -> Iterator[np.ndarray]:
        """Yield consecutive blocks (frames × channels) from one reused buffer.

        After the last block, the frames read are compared with the frames
        declared; a shortfall or a decoder error raises :class:`AudioFileError`.
        """
        import soundfile as sf

        buf = np.empty((int(block_frames), self.channels), dtype=dtype)
        while True:
            try:
                block = self._sf.read(len(buf), dtype=buf.dtype.name, always_2d=True, out=buf)
            except (sf.LibsndfileError, RuntimeError) as exc:
                raise AudioFileError(f"decoder error after {self.frames_read} frames "
                                     f"({_describe_decoder_error(exc)}): {self.path!r}") from None
            if len(block) == 0:
                break
            self.frames_read += len(block)
            yield block
        if self.frames_read < self.frames:
            raise AudioFileError(self._short_message(self.frames_read))

    def read_history(self) -> tuple[str, int]:
        """(CodingHistory text, BWF time reference) carried by the original, if any."""
        try:
            if self.container in ("wav", "wavex", "rf64"):
                bext = bwf.read_bext(self.path)
                return (bext.coding_history, bext.time_reference) if bext else ("", 0)
            if self.container == "flac":
                tags = dict(bwf.read_flac_tags(self.path))
                return tags.get("CODINGHISTORY", ""), 0
        except (ValueError, struct.error, OSError):
            pass
        return "", 0

    def close(self) -> None:
        self._sf.close()

    def __enter__(self) -> Source:
        return self

    def __exit__(self, *exc) -> None:
        self.close()


# ----------------------------------------------------------------------------- first-pass spool
#: Alignment of direct I/O (buffer address, file offset and length): the usual page and block size.
_DIRECT_ALIGN = 4096
#: Frames per chunk of the raw spool file (a multiple of _DIRECT_ALIGN, so chunks hold whole frames).
_SPOOL_CHUNK_FRAMES = 65536


class Spool:
    """First-pass samples kept for the second pass of the peak-safe level mode.

    Up to ``budget_bytes`` the samples stay in memory; beyond that they go
    to a raw file (native float32/float64, no header) beside the output,
    written and read sequentially so that memory stays constant. The writes
    run in a thread beside the first pass. The file is written and read in
    chunks of :data:`_SPOOL_CHUNK_FRAMES` frames through a few aligned
    buffers that are reused, with direct I/O where the file system offers it
    (``O_DIRECT``): the samples do not pass through the page cache, so the
    spool needs no fresh memory however long the file (on a virtual machine
    whose host takes free memory back, fresh pages cost about 35 us each:
    measured, DEVELOPERS.md). Elsewhere, or with the environment variable
    ``DSPEQ_SPOOL_BUFFERED=1``, the same chunks go through the page cache:
    better where the spool sits on a slow disk (a NAS, spinning disks) and
    the machine has the memory to spare, since a spool deleted before the
    kernel writes it back never reaches the disk at all.
    """

    def __init__(self, frames: int, channels: int, dtype: np.dtype, budget_bytes: int, raw_path: Path):
        self.dtype = np.dtype(dtype)
        self.channels = int(channels)
        self.frames = 0
        self._raw_path = raw_path
        self._file = None
        self._mem = None
        self._writer: _BackgroundWriter | None = None
        self.direct = False  # whether the raw file bypasses the page cache (O_DIRECT)
        if frames * channels * self.dtype.itemsize <= budget_bytes:
            self._mem = np.empty((frames, channels), dtype=self.dtype)
        else:
            import queue

            self._file, self.direct = _open_raw(raw_path)
            self._chunk = _SPOOL_CHUNK_FRAMES * self.channels * self.dtype.itemsize
            self._free: queue.Queue = queue.Queue()
            for _ in range(_BackgroundWriter.DEPTH + 1):
                self._free.put(_aligned_bytes(self._chunk))
            self._stage, self._filled = self._free.get(), 0
            self._writer = _BackgroundWriter(self._file, recycle=self._recycle)

    @property
    def on_disk(self) -> bool:
        return self._file is not None

    def _recycle(self, buffer: np.ndarray) -> None:
        """A written chunk's buffer back to the pool (not the padded last one: a slice of the stage)."""
        if len(buffer) == self._chunk:
            self._free.put(buffer)

    def append(self, block: np.ndarray) -> None:
        n = len(block)
        if self._mem is not None and self.frames + n > len(self._mem):
            self._mem = np.concatenate([self._mem[:self.frames], np.empty_like(block)])
        if self._mem is not None:
            self._mem[self.frames:self.frames + n] = block
        else:
            self._stage_bytes(np.ascontiguousarray(block, dtype=self.dtype).reshape(-1).view(np.uint8))
        self.frames += n

    def _stage_bytes(self, data: np.ndarray) -> None:
        """Copy ``data`` into the staging chunks, handing each full one to the writer."""
        while len(data):
            take = min(len(data), self._chunk - self._filled)
            self._stage[self._filled:self._filled + take] = data[:take]
            self._filled += take
            data = data[take:]
            if self._filled == self._chunk:
                self._writer.write(self._stage)
                self._stage, self._filled = self._free.get(), 0

    def _flush_stage(self) -> None:
        """Write the last, partial chunk, padded to the alignment of direct I/O."""
        if self._filled:
            end = -(-self._filled // _DIRECT_ALIGN) * _DIRECT_ALIGN
            self._stage[self._filled:end] = 0
            self._writer.write(self._stage[:end])
            self._filled = 0
        self._writer.finish()

    def blocks(self, block_frames: int) -> Iterator[np.ndarray]:
        """Yield the kept samples again, in blocks of at most ``block_frames`` frames.

        Each block is a view of a buffer that the next one overwrites.
        """
        if self._mem is not None:
            for start in range(0, self.frames, block_frames):
                yield self._mem[start:min(start + block_frames, self.frames)]
            return
        self._flush_stage()
        self._file.seek(0)
        self._free.put(self._stage)
        frame_bytes = self.channels * self.dtype.itemsize
        reader = _BackgroundReader(self._file, self.frames * frame_bytes, self._free)
        try:
            for buf, n in reader:
                chunk = buf[:n].view(self.dtype).reshape(-1, self.channels)
                for start in range(0, len(chunk), block_frames):
                    yield chunk[start:start + block_frames]
                self._free.put(buf)
        finally:
            reader.stop()
        # Gone before the output is synced: the kernel then drops the file's dirty pages
        # instead of writing them out with the output's journal commit (ext4's ordered mode).
        self.close()

    def close(self) -> None:
        self._mem = None
        if self._writer is not None:
            self._writer.stop()
        if self._file is not None:
            self._file.close()
            self._file = None
            _unlink(self._raw_path)


class _BackgroundReader:
    """Reads a file's first ``size`` bytes in chunks from a thread, one chunk ahead of its consumer.

    Iterating yields ``(buffer, n_bytes)``; each buffer comes from ``free``
    (a queue of aligned chunk buffers) and goes back there when the consumer
    is done with it. Direct I/O has no read-ahead of its own: this is it.
    """

    def __init__(self, file, size: int, free):
        import queue

        self._file, self._left, self._free = file, size, free
        self._ready: queue.Queue = queue.Queue(maxsize=2)
        self._stopped = False
        self._thread = threading.Thread(target=self._run, name="dspeq-spool-read", daemon=True)
        self._thread.start()

    def __iter__(self):
        while (item := self._ready.get()) is not None:
            if isinstance(item, BaseException):
                raise item
            yield item

    def _run(self) -> None:
        try:
            while self._left > 0 and not self._stopped:
                buf = self._free.get()
                got = self._file.readinto(buf)
                if not got:
                    raise OSError(f"spool file ended {self._left} bytes early")
                n = min(got, self._left)
                self._left -= n
                self._ready.put((buf, n))
            self._ready.put(None)
        except BaseException as exc:  # noqa: BLE001 - handed to the consumer
            self._ready.put(exc)

    def stop(self) -> None:
        """End the thread (also when the consumer stopped early)."""
        import queue

        self._stopped = True
        while self._thread.is_alive():
            try:
                item = self._ready.get(timeout=0.05)
            except queue.Empty:  # the thread is reading, or done
                continue
            if isinstance(item, tuple):
                self._free.put(item[0])


def _aligned_bytes(n: int) -> np.ndarray:
    """A uint8 buffer of ``n`` bytes whose address is a multiple of _DIRECT_ALIGN."""
    raw = np.empty(n + _DIRECT_ALIGN, np.uint8)
    start = -raw.ctypes.data % _DIRECT_ALIGN
    return raw[start:start + n]


def _open_raw(path: Path):
    """``(file, direct)``: ``path`` created for reading and writing, unbuffered, with O_DIRECT if possible."""
    import io

    flags = os.O_RDWR | os.O_CREAT | os.O_TRUNC | getattr(os, "O_BINARY", 0)
    direct = 0 if os.environ.get("DSPEQ_SPOOL_BUFFERED") else getattr(os, "O_DIRECT", 0)
    if direct:
        try:
            return io.FileIO(os.open(path, flags | direct, 0o600), "r+"), True
        except OSError:  # e.g. tmpfs: EINVAL
            pass
    return io.FileIO(os.open(path, flags, 0o600), "r+"), False


class _BackgroundWriter:
    """Writes blocks to a file from a thread, so the writes overlap the decoding.

    At most :attr:`DEPTH` blocks wait at any time (the memory it may hold);
    the file's writes release the GIL. Each block, once written, goes to
    ``recycle`` if given (its buffer can be filled again). An error of the
    writer is raised by the next :meth:`write` or by :meth:`finish`.
    """

    DEPTH = 4

    def __init__(self, file, recycle=None):
        import queue

        self._file = file
        self._recycle = recycle
        self._queue: queue.Queue = queue.Queue(maxsize=self.DEPTH)
        self._error: BaseException | None = None
        self._thread = threading.Thread(target=self._run, name="dspeq-spool", daemon=True)
        self._thread.start()

    def write(self, block: np.ndarray) -> None:
        """Queue ``block`` (C-contiguous, not to be changed until recycled) for writing."""
        self._raise()
        self._queue.put(block)

    def finish(self) -> None:
        """Wait until every block is written; raise the writer's error, if any."""
        self.stop()
        self._raise()

    def stop(self) -> None:
        if self._thread.is_alive():
            self._queue.put(None)
            self._thread.join()

    def _run(self) -> None:
        while (block := self._queue.get()) is not None:
            if self._error is None:
                try:
                    _write_all(self._file, memoryview(block).cast("B"))
                except BaseException as exc:  # noqa: BLE001 - handed to the producer
                    self._error = exc
            if self._recycle is not None:
                self._recycle(block)

    def _raise(self) -> None:
        if self._error is not None:
            raise self._error


def _write_all(file, data: memoryview) -> None:
    """``file.write`` until all of ``data`` is written (raw files may write less at a time)."""
    while data:
        n = file.write(data)
        data = data[n:] if n is not None else data[len(data):]


def _unlink(path: str | os.PathLike) -> None:
    try:
        os.unlink(path)
    except FileNotFoundError:
        pass


# ----------------------------------------------------------------------------- quantize + write
class Quantizer:
    """Gain, seeded TPDF dither, rounding and clip counting for integer output.

    Parameters
    ----------
    bits : int
        Output word length (8, 16, 24 or 32).
    gain : float
        Linear gain applied before quantization.
    seed : int
        Dither seed; one generator runs across all blocks of a file.
    """

    def __init__(self, bits: int, gain: float, seed: int):
        from .. import _kernels

        self._kernels = _kernels
        self.bits, self.gain, self.seed = int(bits), float(gain), int(seed)
        self._state = _kernels.seed_state(self.seed)
        self._out = np.empty((0, 0), dtype=np.int32)
        self.clips = 0
        self.peak = 0.0

    def __call__(self, y: np.ndarray) -> np.ndarray:
        """The int32 (left-justified) samples of block ``y``; counts clips and peak."""
        out = self._buffer(y.shape)
        clips, peak = self._kernels.quantize_tpdf(y, self.gain, self.bits, self._state, out)
        return self._count(out, clips, peak)

    def filtered(self, eq, x: np.ndarray) -> np.ndarray:
        """Block ``x`` through Equalizer ``eq`` and quantized, in one kernel pass.

        The same samples as ``self(eq.process(x))``; raises what
        :meth:`dspeq.stream.Equalizer.process_pcm` raises.
        """
        out = self._buffer(x.shape)
        clips, peak = eq.process_pcm(x, self.gain, self.bits, self._state, out)
        return self._count(out, clips, peak)

    def _buffer(self, shape: tuple[int, ...]) -> np.ndarray:
        if self._out.shape != shape:
            self._out = np.empty(shape, dtype=np.int32)
        return self._out

    def _count(self, out: np.ndarray, clips: int, peak: float) -> np.ndarray:
        self.clips += clips
        self.peak = max(self.peak, peak)
        return out


def _sample_bytes(block: np.ndarray, bits: int | None) -> memoryview:
    """The bytes hashed for the sample MD5 (FLAC STREAMINFO convention)."""
    if bits is None:
        return memoryview(np.ascontiguousarray(block)).cast("B")
    from .._kernels import pcm_bytes

    return memoryview(pcm_bytes(block, bits))


def _no_sync() -> None:
    """Stands in for ``SoundFile.flush`` when the Sink syncs by itself."""


def _streaminfo_md5(path: str | os.PathLike) -> str | None:
    """The audio MD5 a FLAC encoder stored in STREAMINFO (None if it left it empty)."""
    with open(path, "rb") as f:
        head = f.read(42)
    # "fLaC", a 4-byte block header, then STREAMINFO (always first) with the MD5 in its last 16 bytes.
    digest = head[26:42] if head[:4] == b"fLaC" and head[4] & 0x7F == 0 else b""
    return digest.hex() if len(digest) == 16 and any(digest) else None


def _decoded_md5(path: str | os.PathLike, bits: int) -> str:
    """The sample MD5 of a finished PCM file, by decoding it."""
    import soundfile as sf

    h = hashlib.md5()
    with sf.SoundFile(path) as f:
        for block in f.blocks(65536, dtype="int32", always_2d=True):
            h.update(_sample_bytes(block, bits))
    return h.hexdigest()


def temp_path(final_path: Path, kind: str = "") -> Path:
    """A fresh hidden temporary name beside ``final_path`` (``kind`` is appended to it)."""
    return final_path.with_name(f".{final_path.name}.{secrets.token_hex(4)}{TEMP_SUFFIX}{kind}")


def remove_stale_temps(final_path: Path) -> int:
    """Delete temporary files a killed earlier run left for ``final_path``; return how many."""
    count = 0
    for stale in final_path.parent.glob(f".{_glob_escape(final_path.name)}.*{TEMP_SUFFIX}*"):
        _unlink(stale)
        count += 1
    return count


def _glob_escape(name: str) -> str:
    return "".join(f"[{c}]" if c in "*?[" else c for c in name)


class Sink:
    """An output file written under a temporary name, renamed when complete.

    Parameters
    ----------
    final_path : Path
        Where the finished file goes; its folder must exist.
    spec : OutputSpec
        Container and encoding.
    rate, channels : float, int
        As the input.
    quantizer : Quantizer or None
        Required for integer output; float output is written as is (times
        ``gain``).
    gain : float
        Linear gain for float output.
    flac_tags : list of (str, str), optional
        Vorbis comments for FLAC output (room is reserved while encoding).
    """

    def __init__(self, final_path: Path, spec: OutputSpec, rate: float, channels: int,
                 quantizer: Quantizer | None, gain: float = 1.0,
                 flac_tags: list[tuple[str, str]] | None = None):
        import soundfile as sf

        self.final_path = Path(final_path)
        self.spec = spec
        self.quantizer = quantizer
        self.gain = float(gain)
        self.flac_tags = flac_tags or []
        self.temp_path = temp_path(self.final_path)
        self.peak = 0.0
        # FLAC's encoder computes the sample MD5 itself (see the module docstring).
        self._md5 = None if spec.container == "flac" else hashlib.md5()
        self._float_dtype = np.float64 if spec.subtype == "float64" else np.float32
        with open(self.temp_path, "xb"):    # a clear OSError (permissions, read-only) before libsndfile
            pass
        try:
            self._sf = sf.SoundFile(self.temp_path, "w", int(round(rate)), int(channels),
                                    spec.sf_subtype, format=spec.sf_format)
        except BaseException:
            _unlink(self.temp_path)
            raise
        if spec.container == "flac" and self.flac_tags:
            self._sf.comment = bwf.flac_placeholder(self.flac_tags)

    def write(self, y: np.ndarray) -> None:
        """Quantize (integer output) or scale (float output) block ``y`` and write it."""
        from .._kernels import peak_abs

        if self.quantizer is not None:
            data = self.quantizer(y)
        else:
            data = np.multiply(y, self.gain, dtype=self._float_dtype)
            self.peak = max(self.peak, peak_abs(data))
        self.write_pcm(data)

    def write_pcm(self, data: np.ndarray) -> None:
        """Write samples that are already in the output's form (e.g. from :meth:`Quantizer.filtered`)."""
        if self._md5 is not None:
            self._md5.update(_sample_bytes(data, self.spec.bits))
        self._sf.write(data)

    @property
    def audio_md5(self) -> str:
        """MD5 of the samples written; for FLAC output this finishes the encoding.

        After it, FLAC output takes no more samples (:meth:`commit` follows).
        """
        if self._md5 is not None:
            return self._md5.hexdigest()
        self._close_encoder()
        return _streaminfo_md5(self.temp_path) or _decoded_md5(self.temp_path, self.spec.bits)

    def commit(self, bext: bwf.Bext | None) -> tuple[str, int]:
        """Close, add provenance, sync, rename to the final name; return (SHA-256, bytes).

        ``bext`` is appended to WAV/WAVEX/RF64 output; FLAC output gets its
        Vorbis comments filled in; other containers carry no provenance (the
        manifest does). The finished file (provenance included) is synced to
        disk before the rename; its SHA-256 is computed in a thread meanwhile,
        from the page cache.
        """
        self._close_encoder()
        if bext is not None and self.spec.container in ("wav", "wavex", "rf64"):
            bwf.append_bext(self.temp_path, bext)
        if self.spec.container == "flac" and self.flac_tags:
            bwf.fill_flac_tags(self.temp_path, self.flac_tags)
        digest = FileDigest(self.temp_path)
        with open(self.temp_path, "rb") as f:
            os.fsync(f.fileno())
        result = digest.result()
        os.replace(self.temp_path, self.final_path)
        return result

    def abort(self) -> None:
        """Close and delete the temporary file (after a failure)."""
        try:
            self._close_encoder()
        finally:
            _unlink(self.temp_path)

    def _close_encoder(self) -> None:
        """Finish the encoding and close, without libsndfile's own fsync.

        soundfile's ``close()`` first calls ``flush()`` (``sf_write_sync``,
        which only fsyncs); :meth:`commit` syncs once, after the provenance
        is written, overlapped with hashing.
        """
        if not self._sf.closed:
            self._sf.flush = _no_sync
            self._sf.close()
