"""Figures of curves and designs (matplotlib, imported only here and only when called).

Needs the ``plot`` extra: ``pip install 'dspeq[plot]'``.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

from ._errors import DspeqError
from .check import DEFAULT_BAND, check

__all__ = ["plot_designs", "figure_designs"]


def _pyplot():
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        raise DspeqError("plotting needs matplotlib: pip install 'dspeq[plot]'") from None
    return plt


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
    plt = _pyplot()
    fig, (ax_mag, ax_err, ax_ph) = plt.subplots(3, 1, figsize=(9, 9.5), sharex=True,
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
    fig.suptitle(title or f"{d0.curve.name} at {d0.fs:g} Hz ({d0.curve.describe_roots()})")
    fig.tight_layout()
    return fig


def plot_designs(designs: Sequence, path: str | Path, band: tuple[float, float] = DEFAULT_BAND,
                 title: str | None = None) -> Path:
    """Draw :func:`figure_designs` to a PNG file and return its path."""
    plt = _pyplot()
    fig = figure_designs(designs, band, title)
    out = Path(path)
    fig.savefig(out, dpi=110)
    plt.close(fig)
    return out
