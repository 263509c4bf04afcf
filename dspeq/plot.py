"""Figures of curves and designs (matplotlib, imported only here and only when called).

Needs the ``plot`` extra: ``pip install 'dspeq[plot]'``.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

from ._errors import DspeqError
from .check import DEFAULT_BAND, check

__all__ = ["plot_designs", "figure_designs", "new_figure"]


def new_figure(figsize: tuple[float, float]):
    """A matplotlib ``Figure`` of ``figsize`` inches, made without pyplot.

    No pyplot means no GUI backend, no global figure registry to close and
    half the import time; ``Figure.savefig`` renders with Agg.
    """
    try:
        from matplotlib.figure import Figure
    except ImportError:
        raise DspeqError("plotting needs matplotlib: pip install 'dspeq[plot]'") from None
    return Figure(figsize=figsize)


def figure_designs(designs: Sequence, band: tuple[float, float] = DEFAULT_BAND, title: str | None = None):
    """A matplotlib Figure: analog curve and designs, magnitude error, phase error.

    Parameters
    ----------
    designs : sequence of Design or OversampledDesign
        Designs of the same curve (usually at one rate) to draw together.
    band : (float, float)
        Frequency range in Hz of the error panels.
    title : str, optional
        Figure title (default: curve name and rate).
    """
    if not designs:
        raise DspeqError("nothing to plot: no designs given")
    fig = new_figure((9, 9.5))
    ax_mag, ax_err, ax_ph = fig.subplots(3, 1, sharex=True,
                                         gridspec_kw={"height_ratios": [2, 1.3, 1.3]})
    d0 = designs[0]
    devs = [check(d, band) for d in designs]
    f = devs[0].freqs
    ax_mag.semilogx(f, d0.target.magnitude_db(f), color="black", lw=2.5, label="analog curve")
    for d, dev in zip(designs, devs, strict=True):
        label = f"{d.label} ({d.sections} sect., max {dev.max_abs_db:.3g} dB)"
        ax_mag.semilogx(dev.freqs, d.magnitude_db(dev.freqs), lw=1.2, ls="--", label=label)
        ax_err.semilogx(dev.freqs, dev.magnitude_error_db, lw=1.2, label=d.label)
        ax_ph.semilogx(dev.freqs, dev.phase_error_deg, lw=1.2,
                       label=f"{d.label} (delay {dev.delay_samples:.2f} smp removed)")
    ax_mag.set_ylabel("magnitude (dB re reference)")
    ax_err.set_ylabel("magnitude error (dB)")
    ax_ph.set_ylabel("phase error (°)\nafter delay removal")
    ax_ph.set_xlabel("frequency (Hz)")
    for ax in (ax_mag, ax_err, ax_ph):
        ax.grid(True, which="both", alpha=0.3)
        ax.legend(fontsize=8, loc="best")
    ax_err.axhline(0.0, color="black", lw=0.8)
    # Errors may span 1e-4 dB (fit) to 10 dB (bilinear near Nyquist): then a symmetric log scale
    # shows both; errors all of one size read better on a linear scale.
    if max(dev.max_abs_db for dev in devs) > 0.05:
        ax_err.set_yscale("symlog", linthresh=1e-3, linscale=0.5)
        ax_err.set_ylabel("magnitude error (dB)\nsymmetric log scale")
    ax_ph.set_xlim(f[0], f[-1])
    # Minor grid at 2x and 5x each decade (the default 2..9 costs a fifth of the drawing time).
    from matplotlib.ticker import LogLocator

    ax_ph.xaxis.set_minor_locator(LogLocator(base=10.0, subs=(2.0, 5.0)))
    fig.suptitle(title or f"{d0.curve.name} at {d0.fs:g} Hz ({d0.curve.describe_roots()})")
    # Fixed margins (room for the two-line labels), not tight_layout: that
    # draws the whole figure once more just to measure it (most of the
    # time of a batch report's figure).
    fig.subplots_adjust(left=0.135, right=0.98, bottom=0.055, top=0.95, hspace=0.1)
    return fig


def plot_designs(designs: Sequence, path: str | Path, band: tuple[float, float] = DEFAULT_BAND,
                 title: str | None = None) -> Path:
    """Draw :func:`figure_designs` to a PNG file and return its path."""
    out = Path(path)
    figure_designs(designs, band, title).savefig(out, dpi=110)
    return out
