"""Preferred component values: the E series of IEC 60063.

Each series is a list of mantissas per decade.  E3 … E24 are the standard's
tables (values from memory; E24 and below depart from the geometric formula
at several places for historical reasons).  E48, E96 and E192 are the
formula ``round(10**(i/N), 2)`` for ``i = 0 … N-1`` with the standard's one
exception, 9.20 in place of 9.19 in E192 (formula and exception as described
by published summaries of IEC 60063:2015; the tables were checked against
published copies).

Values are kept as integer mantissas (``47`` for 4.7, ``499`` for 4.99) so that
a rounded value is the exact double of its decimal text (``47 / 1e9`` is
``float("47e-9")``).
"""

from __future__ import annotations

import numpy as np

from ._errors import CurveError

__all__ = ["SERIES_NAMES", "series_values", "round_to_series", "series_tolerance"]

# IEC 60063 tables, two significant digits (from memory).
_E3 = (10, 22, 47)
_E6 = (10, 15, 22, 33, 47, 68)
_E12 = (10, 12, 15, 18, 22, 27, 33, 39, 47, 56, 68, 82)
_E24 = (10, 11, 12, 13, 15, 16, 18, 20, 22, 24, 27, 30, 33, 36, 39, 43, 47, 51, 56, 62, 68, 75, 82, 91)

# The one value of E192 that is not the rounded formula (IEC 60063; see module docstring).
_E192_EXCEPTIONS = {919: 920}


def _formula_series(n: int) -> tuple[int, ...]:
    """Three-digit mantissas round(10**(i/n), 2)·100, with the E192 exception."""
    values = (int(round(100 * 10 ** (i / n))) for i in range(n))
    return tuple(_E192_EXCEPTIONS.get(v, v) if n == 192 else v for v in values)


_SERIES: dict[str, tuple[int, ...]] = {
    "E3": _E3, "E6": _E6, "E12": _E12, "E24": _E24,
    "E48": _formula_series(48), "E96": _formula_series(96), "E192": _formula_series(192),
}  # fmt: skip

#: Names of the available series, coarsest first.
SERIES_NAMES: tuple[str, ...] = tuple(_SERIES)

# Usual tolerance of each series (common practice, no source): E3 is ±>20 %, E6 ±20 %,
# E12 ±10 %, E24 ±5 %, E48 ±2 %, E96 ±1 %, E192 ±0.5 % (and better).
_TOLERANCE = {"E3": 0.4, "E6": 0.2, "E12": 0.1, "E24": 0.05, "E48": 0.02, "E96": 0.01, "E192": 0.005}


def _key(name: str) -> str:
    key = str(name).strip().upper()
    if key not in _SERIES:
        raise CurveError(f"unknown E series {name!r}; choose from {', '.join(SERIES_NAMES)}")
    return key


def series_values(name: str) -> np.ndarray:
    """Mantissas of one decade of series ``name`` in [1, 10) (e.g. 4.7), ascending.

    Examples
    --------
    >>> series_values("E6").tolist()
    [1.0, 1.5, 2.2, 3.3, 4.7, 6.8]
    """
    mantissas = _SERIES[_key(name)]
    digits = len(str(mantissas[0]))
    return np.array([m / 10 ** (digits - 1) for m in mantissas])


def series_tolerance(name: str) -> float:
    """The tolerance (fraction) usually sold in series ``name`` (common practice, no source)."""
    return _TOLERANCE[_key(name)]


def round_to_series(values: np.ndarray | float, name: str) -> np.ndarray:
    """Round positive values to the nearest member of E series ``name``.

    Nearest means smallest ratio (nearest on a log scale), across decade
    boundaries (9.6 rounds to 10 in E24).  The results are the exact doubles
    of their decimal values.

    Examples
    --------
    >>> round_to_series([4900.0, 9.6e-9, 1.0], "E12").tolist()
    [4700.0, 1e-08, 1.0]
    """
    mantissas = _SERIES[_key(name)]
    digits = len(str(mantissas[0]))
    v = np.atleast_1d(np.asarray(values, dtype=float))
    if not np.all(np.isfinite(v) & (v > 0)):
        raise CurveError(f"only positive finite values can be rounded to a series, got {values!r}")
    table = np.array([*mantissas, 10 ** digits], dtype=float)   # next decade's first value
    log_table = np.log10(table) - (digits - 1)
    decade = np.floor(np.log10(v))
    frac = np.log10(v) - decade
    idx = np.clip(np.searchsorted(log_table, frac), 1, len(table) - 1)
    pick = np.where(frac - log_table[idx - 1] <= log_table[idx] - frac, idx - 1, idx)
    out = [_exact(int(table[i]), int(d) - (digits - 1)) for i, d in zip(pick, decade, strict=True)]
    return np.array(out, dtype=float)


def _exact(mantissa: int, exponent: int) -> float:
    """``mantissa · 10**exponent`` as the double nearest the exact decimal."""
    return float(mantissa * 10 ** exponent) if exponent >= 0 else mantissa / 10.0 ** (-exponent)

