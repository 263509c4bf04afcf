"""Plots: `check --plot` and `compare --plot` write a real PNG with the designs drawn."""

from __future__ import annotations

import pytest

pytest.importorskip("matplotlib")

import dspeq  # noqa: E402
from dspeq.cli import main  # noqa: E402
from dspeq.plot import figure_designs  # noqa: E402


@pytest.mark.parametrize("command", ["check", "compare"])
def test_cli_plot_writes_png(tmp_path, capsys, command):
    out = tmp_path / "fig.png"
    code = main([command, "riaa", "--rate", "48000", "--plot", str(out)])
    capsys.readouterr()
    assert code == 0
    data = out.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 20_000


def test_figure_has_three_labelled_panels():
    designs = [dspeq.design("riaa", 44100, method=m) for m in ("fit", "matched-z")]
    fig = figure_designs(designs)
    axes = fig.get_axes()
    assert len(axes) == 3
    assert [ax.get_ylabel().split("\n")[0] for ax in axes] == [
        "magnitude (dB re reference)", "magnitude error (dB)", "phase error (°)"]
    assert axes[2].get_xlabel() == "frequency (Hz)"
    assert len(axes[0].get_lines()) == 3          # analog curve + two designs
