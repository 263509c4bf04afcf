"""dspeq — playback de-emphasis for flat tape and disc transfers.

The filter core: analog playback curves (:class:`Curve`, :func:`curve`,
:func:`curves`), their digital designs (:func:`design`, :class:`Design`),
deviation checks (:func:`check`, :class:`Deviation`) and a streaming
:class:`Equalizer`; an oversampled run (:func:`design_oversampled`,
:class:`OversampledDesign`, :class:`OversampledEqualizer`) for a phase closer
to the analog curve's at 44.1/48 kHz.  Importing dspeq compiles nothing and imports neither
audio I/O nor plotting libraries.

Examples
--------
>>> import numpy as np, dspeq
>>> d = dspeq.design("riaa", 48000)
>>> dspeq.check(d).max_abs_db < 0.01
True
>>> eq = dspeq.Equalizer(d, channels=2)
>>> eq.process(np.zeros((256, 2))).shape
(256, 2)
"""

from __future__ import annotations

from ._errors import AudioFileError, CurveError, DesignError, DspeqError, ExpressionError, JobError
from .check import Deviation, check
from .curves import Curve
from .design import Design, design, methods
from .oversample import OversampledDesign, design_oversampled
from .spec import curve, curves

__version__ = "0.1.0"

__all__ = [
    "Curve", "curve", "curves", "Design", "design", "methods", "check", "Deviation", "Equalizer",
    "OversampledDesign", "design_oversampled", "OversampledEqualizer",
    "DspeqError", "CurveError", "ExpressionError", "DesignError", "AudioFileError", "JobError",
    "__version__",
]


def __getattr__(name: str):
    # The Equalizer pulls in numba (the kernels); import it on first use only.  The other core
    # modules import only numpy at module level (scipy is imported inside the functions that use it).
    if name == "Equalizer":
        from .stream import Equalizer

        return Equalizer
    if name == "OversampledEqualizer":
        from .oversample import OversampledEqualizer

        return OversampledEqualizer
    raise AttributeError(f"module 'dspeq' has no attribute {name!r}")
