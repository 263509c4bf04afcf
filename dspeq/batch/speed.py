"""Speed restoration and output rates: a transfer made at R × speed, written at the recorded speed.

Tapes are often transferred faster than they were recorded (a 7½ ips tape
at 15 ips: R = 2).  With ``speed = R`` the playback curve is already scaled
to the transfer (every corner frequency × R).  ``restore_speed`` then writes
the de-emphasized samples *unchanged*, labelled with the rate fs / R: every
frequency is divided by R and the duration multiplied by R, exactly and
losslessly (the sample values are those of the output without restoration).
fs / R must then be a whole number of Hz (a file's rate is an integer).

``output_rate_hz`` resamples the result to a chosen rate with soxr (the
``resample`` extra; "VHQ" quality, streamed block by block: the result does
not depend on the block size).  With ``restore_speed`` the resampler's input
rate is fs / R, which need not be a whole number.

The manifest field ``rate_change`` and the CodingHistory rows record both
steps.  soxr is imported only when resampling.
"""

from __future__ import annotations

import math
import types
from collections.abc import Iterable, Iterator
from dataclasses import dataclass

import numpy as np

from .._errors import JobError

__all__ = ["RateChange", "rate_change", "require_soxr", "resample_blocks", "Counted", "sized_like",
           "RESAMPLER_QUALITY"]

#: soxr quality recipe used for every resampling (its highest, "very high quality").
RESAMPLER_QUALITY = "VHQ"


def require_soxr() -> types.ModuleType:
    """The soxr module, or a JobError saying how to install it."""
    try:
        import soxr
    except ImportError:
        raise JobError("output_rate_hz (--output-rate) needs the soxr package: "
                       "pip install 'dspeq[resample]'") from None
    return soxr


@dataclass(frozen=True)
class RateChange:
    """How the output's rate differs from the transfer's.

    Attributes
    ----------
    input_rate : float
        Rate of the transfer (and of the de-emphasis design).
    speed : float
        Transfer speed ÷ recorded speed.
    restored : bool
        Whether the speed is restored (samples relabelled at ``input_rate / speed``).
    labelled_rate : float
        Rate of the samples after restoration (``input_rate`` when not restored).
    output_rate : float
        Rate of the output file.
    resampler : str or None
        ``"soxr <version> VHQ"`` when resampled, else None.
    """

    input_rate: float
    speed: float
    restored: bool
    labelled_rate: float
    output_rate: float
    resampler: str | None

    def frames_out(self, frames_in: int) -> int:
        """Output frames expected for ``frames_in`` input frames (rounded up)."""
        return int(math.ceil(frames_in * self.output_rate / self.labelled_rate))

    def describe(self) -> str:
        """The step as CodingHistory text."""
        parts = []
        if self.restored:
            parts.append(f"speed restored: transfer at x{self.speed:g} relabelled "
                         f"{self.input_rate:g} -> {self.labelled_rate:.10g} Hz; samples unchanged")
        if self.resampler:
            parts.append(f"resampled {self.labelled_rate:.10g} -> {self.output_rate:g} Hz ({self.resampler})")
        return "; ".join(parts) or "rate unchanged"

    def to_dict(self, frames_out: int) -> dict:
        """The manifest's ``rate_change`` field."""
        return {"speed": self.speed, "restore_speed": self.restored, "input_rate": self.input_rate,
                "labelled_rate": self.labelled_rate, "output_rate": self.output_rate,
                "resampler": self.resampler, "output_frames": int(frames_out),
                "output_duration_s": frames_out / self.output_rate}


def rate_change(settings, input_rate: float) -> RateChange | None:
    """The rate change a file's settings ask for, or None when the output keeps the input's rate.

    Raises
    ------
    JobError
        When the speed is to be restored without resampling and fs / R is
        not a whole number of Hz, or soxr is missing for a resampling.
    """
    restore, out = settings.restore_speed, settings.output_rate_hz
    if not restore and out is None:
        return None
    label = input_rate / settings.speed if restore else input_rate
    if out is None:
        if abs(label - round(label)) > 1e-9 * label:
            raise JobError(f"speed restoration: {input_rate:g} Hz / speed {settings.speed:g} = "
                           f"{label:.6f} Hz is not a whole number of Hz, so it cannot label a file; "
                           "set output_rate_hz (--output-rate) to resample instead")
        label = out = float(round(label))
    resampler = None
    if abs(out - label) > 1e-9 * label:
        soxr = require_soxr()
        resampler = f"soxr {soxr.__version__} {RESAMPLER_QUALITY}"
    return RateChange(float(input_rate), float(settings.speed), bool(restore), label, float(out), resampler)


def resample_blocks(blocks: Iterable[np.ndarray], rc: RateChange, channels: int,
                    dtype: type) -> Iterator[np.ndarray]:
    """Resample a stream of (frames × channels) blocks from ``rc.labelled_rate`` to ``rc.output_rate``.

    One soxr stream runs across all blocks (its state is carried), then is
    flushed; each yielded block is a new array (input buffers may be reused).
    """
    soxr = require_soxr()
    dt = np.dtype(dtype)
    stream = soxr.ResampleStream(rc.labelled_rate, rc.output_rate, int(channels), dtype=dt.name,
                                 quality=RESAMPLER_QUALITY)
    for block in blocks:
        y = stream.resample_chunk(np.ascontiguousarray(block, dtype=dt), last=False)
        if len(y):
            yield y
    tail = stream.resample_chunk(np.zeros((0, int(channels)), dtype=dt), last=True)
    if len(tail):
        yield tail


class Counted:
    """Iterate over blocks and count their frames (``frames`` after iteration)."""

    def __init__(self, blocks: Iterable[np.ndarray]):
        self._blocks = blocks
        self.frames = 0

    def __iter__(self) -> Iterator[np.ndarray]:
        for block in self._blocks:
            self.frames += len(block)
            yield block


def sized_like(source, rc: RateChange | None):
    """What :func:`~dspeq.batch.audio.resolve_output` needs of the source, with the output's frame count."""
    if rc is None:
        return source
    return types.SimpleNamespace(container=source.container, subtype=source.subtype,
                                 channels=source.channels, frames=rc.frames_out(source.frames))
