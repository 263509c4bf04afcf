"""Turn the text a user types into a :class:`~dspeq.curves.Curve`.

One grammar serves the API, the CLI and the batch job files:

* a catalog name (``riaa``, ``nab-7.5ips``, ``disc-500-16`` …), case-insensitive;
* ``tc:ZEROS/POLES`` — time constants in µs, comma-separated, ``inf`` for an
  infinite one, e.g. ``tc:318/3180,75`` (RIAA) or ``tc:35/inf`` (IEC 15 ips);
* ``disc:TURNOVER,ROLLOFF[,SHELF]`` — a parametric pre-1955 disc curve
  (turnover Hz, roll-off dB at 10 kHz, optional LF shelf Hz);
* a rational expression in ``s``, e.g. ``(1+s*318u)/((1+s*3180u)(1+s*75u))``.
"""

from __future__ import annotations

import math
import re

from ._errors import CurveError
from .catalog import _ALIASES, CATALOG, catalog_curve, disc_curve
from .curves import DEFAULT_REFERENCE_HZ, Curve

__all__ = ["curve", "curves", "parse_curve"]

_NAME_RE = re.compile(r"^[A-Za-z][A-Za-z0-9_.\-]*$")


def _float_list(text: str, what: str, spec: str) -> list[float]:
    out: list[float] = []
    for item in filter(None, (t.strip() for t in text.split(","))):
        try:
            val = float(item)
        except ValueError:
            raise CurveError(f"{what} {item!r} in {spec!r} is not a number") from None
        out.append(math.inf if item.lower() in ("inf", "infinity") else val)
    return out


def _parse_tc(spec: str, reference_hz: float) -> Curve:
    body = spec[3:]
    if body.count("/") != 1:
        raise CurveError(f"time-constant curve {spec!r} must look like 'tc:ZEROS/POLES' "
                         "(µs, comma-separated, 'inf' allowed), e.g. 'tc:318/3180,75'")
    zs, ps = body.split("/")
    zeros = _float_list(zs, "time constant", spec)
    poles = _float_list(ps, "time constant", spec)
    if not zeros and not poles:
        raise CurveError(f"time-constant curve {spec!r} has no time constants")
    return Curve.from_time_constants(zeros, poles, reference_hz=reference_hz, name=spec,
                                     source="user time constants", kind="custom")


def _parse_disc(spec: str, reference_hz: float) -> Curve:
    vals = _float_list(spec[5:], "disc parameter", spec)
    if len(vals) not in (2, 3):
        raise CurveError(f"disc curve {spec!r} must look like 'disc:TURNOVER,ROLLOFF[,SHELF]' "
                         "(Hz, dB at 10 kHz, Hz), e.g. 'disc:500,16'")
    entry = disc_curve(vals[0], vals[1], vals[2] if len(vals) == 3 else None,
                       source="parametric disc curve")
    return entry.curve(reference_hz)


def parse_curve(spec: str | Curve, reference_hz: float | None = None) -> Curve:
    """Parse one curve spec (see module docstring); a Curve passes through.

    Raises
    ------
    CurveError
        With the reason, and the closest catalog names for an unknown name.
    """
    if isinstance(spec, Curve):
        return spec if reference_hz is None else spec.normalized(reference_hz)
    if not isinstance(spec, str) or not spec.strip():
        raise CurveError(f"a curve must be a name, 'tc:…', 'disc:…' or an expression in s; got {spec!r}")
    text = spec.strip()
    ref = DEFAULT_REFERENCE_HZ if reference_hz is None else float(reference_hz)
    low = text.lower()
    if low.startswith("tc:"):
        return _parse_tc(text, ref)
    if low.startswith("disc:"):
        return _parse_disc(text, ref)
    if low in CATALOG or low in _ALIASES:
        return catalog_curve(low, ref)
    if _NAME_RE.match(text) and "s" != low:
        catalog_curve(text)          # raises the unknown-name error with suggestions
    return Curve.from_expression(text, reference_hz=ref)


def curve(spec: str | Curve, *, speed: float = 1.0, from_curve: str | Curve | None = None,
          reference_hz: float | None = None) -> Curve:
    """The curve to apply to a transfer, from what the user knows about it.

    Parameters
    ----------
    spec : str or Curve
        The curve the carrier needs (catalog name, ``tc:…``, ``disc:…``,
        expression in ``s``, or a Curve).
    speed : float, optional
        Transfer speed ÷ recorded speed (2 for a 7½ ips tape played at 15 ips).
        Every corner frequency of ``spec`` is multiplied by it.
    from_curve : str or Curve, optional
        The playback curve the transfer machine already applied (at transfer
        speed: it acted on the electrical signal).  The result is the
        correction ``spec.at_speed(speed) / from_curve``.
    reference_hz : float, optional
        Frequency at which the result is 0 dB (default 1 kHz).

    Examples
    --------
    >>> import dspeq
    >>> c = dspeq.curve("iec-7.5ips", from_curve="nab-7.5ips")   # IEC tape on an NAB machine
    >>> c.n_integrators
    1
    >>> dspeq.curve("riaa", from_curve="riaa").order   # cancels exactly
    0
    """
    target = parse_curve(spec, reference_hz).at_speed(speed)
    if from_curve is None:
        return target
    used = parse_curve(from_curve, reference_hz)
    result = (target / used).renamed(f"{target.name} from {used.name}", kind="correction")
    return result.normalized(reference_hz or DEFAULT_REFERENCE_HZ)


def curves() -> list[dict]:
    """The catalog as a list of dicts: name, kind, time constants (µs), source, description."""
    return [{"name": e.name, "kind": e.kind, "zeros_us": list(e.zeros_us),
             "poles_us": list(e.poles_us), "aliases": list(e.aliases), "source": e.source,
             "description": e.description} for e in CATALOG.values()]
