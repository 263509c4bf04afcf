"""Analog RC networks: dspeq's network text, exact curves and tolerance spread.

A playback stage is the ratio of two impedances built from resistors and
capacitors.  The network text (documented in ``docs/networks.md``) names the
parts with their values and describes each stage's arms::

    # an invented disc stage
    name = demo disc stage
    R1 = 10k
    R2 = 680k  1%
    C1 = 4n7   5%
    R3 = 6k8
    C2 = 11n
    stage = inverting
    feedback = R2 | C1 + R3 | C2
    input = R1

* ``PART = VALUE [TOLERANCE]`` declares a part; a name starting with ``R`` is a
  resistor (ohms), with ``C`` a capacitor (farads).  Values take SI prefixes
  (``22k``, ``10n``, ``2u2``, ``4k7``) and an optional unit (``10nF``,
  ``22kohm``); a tolerance is ``1%`` or ``±1%``.
* ``stage = inverting | noninverting | divider`` starts a stage; its arms are
  ``feedback``/``input`` (H = −Z_feedback/Z_input), ``feedback``/``ground``
  (H = 1 + Z_feedback/Z_ground) or ``series``/``shunt``
  (H = Z_shunt/(Z_series + Z_shunt)).  Several stages multiply (each driven
  from a zero impedance and unloaded, as between op-amp stages).
* An arm is an impedance: part names joined by ``+`` (series) and ``|`` or
  ``||`` (parallel, binds tighter than ``+``), with parentheses.
* ``name = …`` names the network; ``tolerance = 1%`` is the default tolerance
  of parts that give none.  ``#`` starts a comment; ``;`` separates
  statements on one line.

Nothing is evaluated as code; every error names the line and the column of
the bad token.
"""

from __future__ import annotations

import itertools
import math
import re
import warnings
from dataclasses import dataclass, field, replace
from decimal import Decimal

import numpy as np

from ._errors import CurveError, ExpressionError
from .curves import DEFAULT_REFERENCE_HZ, Curve
from .expr import parse_si_number

__all__ = ["Part", "Stage", "Network", "Spread", "TOPOLOGIES", "parse_network", "network_curve",
           "tolerance_spread", "parse_tolerance", "format_value", "CORNER_LIMIT"]

#: Stage topologies and their two arms (the first arm is the "upper" one).
TOPOLOGIES: dict[str, tuple[str, str]] = {
    "inverting": ("feedback", "input"),
    "noninverting": ("feedback", "ground"),
    "divider": ("series", "shunt"),
}
_TOPOLOGY_ALIASES = {"non-inverting": "noninverting", "passive": "divider"}
_ARMS = {arm for arms in TOPOLOGIES.values() for arm in arms}
_SETTINGS = ("name", "stage", "tolerance")
_UNITS = {"R": ("ohms", "ohm", "\u03a9", "\u2126"), "C": ("F",)}
#: Largest number of toleranced parts for which every corner (±tolerance) is tried.
CORNER_LIMIT = 12
# Roots of a network closer than this (relative) are one root: a double root of an
# expanded polynomial is computed to about sqrt(eps) ~ 1e-8.
_CANCEL_RTOL = 1e-6
_IDENT = re.compile(r"[A-Za-z][A-Za-z0-9_]*")
_TOKEN = re.compile(r"\s*(?:(?P<name>[A-Za-z][A-Za-z0-9_]*)|(?P<op>\|\||[|+()]))")


# ---------------------------------------------------------------------------- data


@dataclass(frozen=True)
class Part:
    """One resistor (ohms) or capacitor (farads), with its tolerance (fraction) if given."""

    name: str
    kind: str
    value: float
    tolerance: float | None = None

    def impedance(self, s: np.ndarray, value: np.ndarray | float | None = None) -> np.ndarray:
        """Impedance at complex frequencies ``s`` (rad/s) for this or another ``value``."""
        v = self.value if value is None else value
        return v + 0 * s if self.kind == "R" else 1.0 / (s * v)


@dataclass(frozen=True)
class Stage:
    """One stage: a topology and the impedance tree of each arm.

    A tree is ``("part", name)``, ``("series", children)`` or
    ``("parallel", children)``.
    """

    topology: str
    arms: tuple[tuple[str, tuple], ...]

    def arm(self, name: str) -> tuple:
        """The impedance tree of arm ``name``."""
        return dict(self.arms)[name]


@dataclass(frozen=True)
class Network:
    """A parsed network: parts (in declaration order), stages and defaults.

    Use :func:`parse_network` to build one from text and :meth:`to_text` to
    write it back.
    """

    parts: tuple[Part, ...]
    stages: tuple[Stage, ...]
    name: str = "network"
    tolerance: float | None = None
    _index: dict = field(init=False, repr=False, compare=False)

    def __post_init__(self):
        object.__setattr__(self, "_index", {p.name: p for p in self.parts})

    def part(self, name: str) -> Part:
        """The part called ``name``."""
        return self._index[name]

    # ------------------------------------------------------------ evaluation
    def response(self, f: np.ndarray | float, values: dict[str, np.ndarray] | None = None) -> np.ndarray:
        """Complex response at ``f`` (Hz), exact, vectorized.

        ``values`` replaces part values by name; arrays broadcast against
        ``f`` (give shape ``(n, 1)`` for ``n`` variants, result ``(n, len(f))``).
        """
        s = 2j * np.pi * np.asarray(f, dtype=float)
        values = values or {}
        h = np.ones(s.shape, dtype=complex)
        for stage in self.stages:
            upper, lower = (self._impedance(stage.arm(a), s, values) for a in TOPOLOGIES[stage.topology])
            h = h * _STAGE_RESPONSE[stage.topology](upper, lower)
        return h

    def magnitude_db(self, f: np.ndarray | float, values: dict[str, np.ndarray] | None = None) -> np.ndarray:
        """Magnitude (dB) at ``f`` (Hz); ``values`` as in :meth:`response`."""
        return 20.0 * np.log10(np.abs(self.response(f, values)))

    def _impedance(self, node: tuple, s: np.ndarray, values: dict) -> np.ndarray:
        if node[0] == "part":
            part = self._index[node[1]]
            return part.impedance(s, values.get(part.name))
        zs = [self._impedance(child, s, values) for child in node[1]]
        if node[0] == "series":
            return sum(zs[1:], zs[0])
        return 1.0 / sum((1.0 / z for z in zs[1:]), 1.0 / zs[0])

    def curve(self, **meta) -> Curve:
        """The exact :class:`~dspeq.curves.Curve` (zeros, poles, gain) of the network."""
        zeros, poles, gain = [], [], 1.0
        for stage in self.stages:
            upper, lower = (self._polynomials(stage.arm(a)) for a in TOPOLOGIES[stage.topology])
            num, den = _STAGE_POLYNOMIALS[stage.topology](upper, lower)
            for poly, roots in ((num, zeros), (den, poles)):
                roots.extend(np.roots(poly).tolist())
            gain *= _leading(num) / _leading(den)
        z, p = _cancel_close(np.array(zeros, dtype=complex), np.array(poles, dtype=complex))
        meta.setdefault("name", self.name)
        meta.setdefault("source", "dspeq network text")
        meta.setdefault("kind", "custom")
        meta.setdefault("description", self.describe())
        return Curve(_real_roots(z), _real_roots(p), gain, **meta)

    def _polynomials(self, node: tuple) -> tuple[np.ndarray, np.ndarray]:
        """(numerator, denominator) coefficients of an arm's impedance, highest power first."""
        if node[0] == "part":
            part = self._index[node[1]]
            if part.kind == "R":
                return np.array([part.value]), np.array([1.0])
            return np.array([1.0]), np.array([part.value, 0.0])
        polys = [self._polynomials(child) for child in node[1]]
        num, den = polys[0]
        for n, d in polys[1:]:
            cross = np.polyadd(np.polymul(num, d), np.polymul(n, den))
            num, den = (cross, np.polymul(den, d)) if node[0] == "series" else (np.polymul(num, n), cross)
        return num, den

    # ------------------------------------------------------------ derived networks
    def scaled(self, k: float) -> Network:
        """Every impedance multiplied by ``k`` (R·k, C/k): the same curve."""
        k = float(k)
        if not (k > 0 and math.isfinite(k)):
            raise CurveError(f"impedance scale must be a positive number, got {k!r}")
        return self.with_values({p.name: p.value * k if p.kind == "R" else p.value / k for p in self.parts})

    def with_values(self, values: dict[str, float]) -> Network:
        """A copy with some part values replaced (by name)."""
        unknown = set(values) - set(self._index)
        if unknown:
            raise CurveError(f"unknown part(s) {sorted(unknown)!r}")
        parts = tuple(replace(p, value=float(values.get(p.name, p.value))) for p in self.parts)
        return replace(self, parts=parts)

    def tolerances(self, default: float | None = None) -> dict[str, float]:
        """Tolerance (fraction) of every part: its own, else ``default``, else the file's, else 0."""
        fallback = default if default is not None else self.tolerance
        return {p.name: p.tolerance if p.tolerance is not None else (fallback or 0.0) for p in self.parts}

    # ------------------------------------------------------------ text
    def describe(self) -> str:
        """One line per stage: topology and arms."""
        rows = []
        for stage in self.stages:
            arms = "; ".join(f"{a} = {_tree_text(stage.arm(a))}" for a in TOPOLOGIES[stage.topology])
            rows.append(f"{stage.topology} stage: {arms}")
        return " | then ".join(rows)

    def to_text(self, header: str = "") -> str:
        """The network as dspeq network text (parses back to the same network)."""
        lines = [f"# {row}".rstrip() for row in header.splitlines()]
        lines.append(f"name = {self.name}")
        if self.tolerance is not None:
            lines.append(f"tolerance = {self.tolerance * 100:g}%")
        for p in self.parts:
            tol = "" if p.tolerance is None else f"  {p.tolerance * 100:g}%"
            lines.append(f"{p.name} = {format_value(p.value)}{tol}")
        for stage in self.stages:
            lines.append(f"stage = {stage.topology}")
            lines += [f"{a} = {_tree_text(stage.arm(a))}" for a in TOPOLOGIES[stage.topology]]
        return "\n".join(lines) + "\n"


def _tree_text(node: tuple, parent: str = "series") -> str:
    if node[0] == "part":
        return node[1]
    if node[0] == "series":
        text = " + ".join(_tree_text(c, "series") for c in node[1])
        return f"({text})" if parent == "parallel" else text
    return " | ".join(_tree_text(c, "parallel") for c in node[1])


def _leading(poly: np.ndarray) -> float:
    nonzero = np.flatnonzero(poly)
    return float(poly[nonzero[0]])


def _cancel_close(zeros: np.ndarray, poles: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Remove zero/pole pairs equal to ``_CANCEL_RTOL`` (common factors of the arms)."""
    z, p = list(zeros), list(poles)
    for zi in list(z):
        if not p:
            break
        dist = np.abs(np.array(p) - zi)
        j = int(np.argmin(dist))
        if dist[j] <= _CANCEL_RTOL * max(abs(zi), abs(p[j])) or dist[j] == 0.0:
            z.remove(zi)
            del p[j]
    return np.array(z, dtype=complex), np.array(p, dtype=complex)


def _real_roots(roots: np.ndarray) -> np.ndarray:
    """Roots of an RC network are real; drop the rounding-level imaginary parts of double roots."""
    bad = np.abs(roots.imag) > 1e-6 * np.abs(roots)
    if np.any(bad):  # pragma: no cover - impossible for R and C only
        raise CurveError(f"network has complex roots {roots[bad]!r}")
    return roots.real.astype(complex)


def _inverting(upper, lower):
    return -upper / lower


def _noninverting(upper, lower):
    return 1.0 + upper / lower


def _divider(upper, lower):
    return lower / (upper + lower)


_STAGE_RESPONSE = {"inverting": _inverting, "noninverting": _noninverting, "divider": _divider}


def _poly_inverting(upper, lower):
    (nu, du), (nl, dl) = upper, lower
    return -np.polymul(nu, dl), np.polymul(du, nl)


def _poly_noninverting(upper, lower):
    (nu, du), (nl, dl) = upper, lower
    return np.polyadd(np.polymul(du, nl), np.polymul(nu, dl)), np.polymul(du, nl)


def _poly_divider(upper, lower):
    (nu, du), (nl, dl) = upper, lower
    return np.polymul(nl, du), np.polyadd(np.polymul(nu, dl), np.polymul(nl, du))


_STAGE_POLYNOMIALS = {"inverting": _poly_inverting, "noninverting": _poly_noninverting,
                      "divider": _poly_divider}


# ---------------------------------------------------------------------------- values


_PREFIXES = {-15: "f", -12: "p", -9: "n", -6: "u", -3: "m", 0: "", 3: "k", 6: "M", 9: "G", 12: "T"}


def format_value(value: float) -> str:
    """Shortest SI text that parses back to exactly ``value``.

    Up to three significant digits use the prefix as decimal point
    (IEC 60062 style: ``4k7``, ``2u2``); longer mantissas keep the point
    (``3.1831n``).

    Examples
    --------
    >>> format_value(4700.0), format_value(2.2e-6), format_value(1e6), format_value(470.0)
    ('4k7', '2u2', '1M', '470')
    """
    v = float(value)
    if not (v > 0 and math.isfinite(v)):
        raise CurveError(f"component value must be positive and finite, got {value!r}")
    exp3 = min(max(3 * math.floor(math.log10(v) / 3), -15), 12)
    # repr() is the shortest text that reads back as v; shift its point exactly.
    mantissa = format(Decimal(repr(v)).scaleb(-exp3).normalize(), "f")
    digits = len(mantissa.replace(".", "").strip("0"))
    prefix = _PREFIXES[exp3]
    if not prefix or "." not in mantissa or digits > 3 or mantissa.startswith("0"):
        return f"{mantissa}{prefix}"
    whole, frac = mantissa.split(".")
    return f"{whole}{prefix}{frac}"


def parse_tolerance(text: str) -> float:
    """A tolerance such as ``"1%"``, ``"±0.5%"`` or ``"+-2%"`` as a fraction (0.01).

    Examples
    --------
    >>> parse_tolerance("±1%")
    0.01
    """
    body = str(text).strip()
    for sign in ("\u00b1", "+-", "+/-"):
        if body.startswith(sign):
            body = body[len(sign):].strip()
    if not body.endswith("%"):
        raise CurveError(f"tolerance {text!r} must be a percentage such as '1%'")
    try:
        pct = float(body[:-1])
    except ValueError:
        raise CurveError(f"tolerance {text!r} must be a percentage such as '1%'") from None
    if not (0.0 <= pct < 100.0):
        raise CurveError(f"tolerance {text!r} must lie between 0% and 100%")
    return pct / 100.0


# ---------------------------------------------------------------------------- parser


@dataclass(frozen=True)
class _Statement:
    lineno: int
    line: str          # the physical line, for error messages
    key: str
    key_col: int
    value: str
    value_col: int


def _fail(message: str, st: _Statement | tuple[int, str], col: int) -> ExpressionError:
    lineno, line = (st.lineno, st.line) if isinstance(st, _Statement) else st
    return ExpressionError(f"network line {lineno}: {message}", line, col)


def _statements(text: str):
    """Yield one _Statement per ``KEY = VALUE`` (lines, ``;`` separators, ``#`` comments)."""
    for lineno, line in enumerate(text.splitlines(), start=1):
        body = line.split("#", 1)[0]
        start = 0
        for segment in body.split(";"):
            col = start + len(segment) - len(segment.lstrip())
            start += len(segment) + 1
            if not segment.strip():
                continue
            key_match = _IDENT.match(body, col)
            if key_match is None:
                raise _fail("expected 'NAME = VALUE'", (lineno, line), col)
            eq = body.find("=", key_match.end(), col + len(segment.strip()))
            if eq < 0 or body[key_match.end():eq].strip():
                raise _fail(f"expected '=' after {key_match.group(0)!r}", (lineno, line), key_match.end())
            value = body[eq + 1: col + len(segment.strip())]
            value_col = eq + 1 + len(value) - len(value.lstrip())
            yield _Statement(lineno, line, key_match.group(0), col, value.strip(), value_col)


def _parse_part(st: _Statement) -> Part:
    kind = st.key[0].upper()
    tokens = st.value.split()
    if not tokens:
        raise _fail(f"part {st.key!r} needs a value", st, st.value_col)
    if len(tokens) > 2:
        col = st.line.find(tokens[2], st.value_col)
        raise _fail(f"unexpected {tokens[2]!r} after the value of {st.key!r}", st, col)
    number = tokens[0]
    for unit in _UNITS[kind]:
        if number.endswith(unit) and len(number) > len(unit):
            number = number[: -len(unit)]
            break
    try:
        value = parse_si_number(number)
    except ExpressionError as exc:
        col = st.value_col + max(exc.position, 0)
        raise _fail(f"bad value {tokens[0]!r} for {st.key!r}", st, col) from None
    if not (value > 0 and math.isfinite(value)):
        raise _fail(f"value of {st.key!r} must be positive, got {tokens[0]!r}", st, st.value_col)
    tolerance = None
    if len(tokens) == 2:
        try:
            tolerance = parse_tolerance(tokens[1])
        except CurveError as exc:
            raise _fail(str(exc), st, st.line.find(tokens[1], st.value_col)) from None
    return Part(st.key, kind, value, tolerance)


class _ArmParser:
    """Recursive descent over one arm: series := par ('+' par)*; par := atom ('|' atom)*."""

    def __init__(self, st: _Statement, parts: dict[str, Part], used: dict[str, int]):
        self.st, self.parts, self.used = st, parts, used
        self.tokens = self._tokenize()
        self.i = 0

    def _tokenize(self) -> list[tuple[str, str, int]]:
        st, out, pos = self.st, [], self.st.value_col
        end = st.value_col + len(st.value)
        while pos < end:
            m = _TOKEN.match(st.line, pos, end)
            if m is None:
                bad = pos + len(st.line[pos:end]) - len(st.line[pos:end].lstrip())
                raise _fail(f"unexpected {st.line[bad]!r} in arm {st.key!r} (use part names, "
                            "'+', '|' and parentheses)", st, bad)
            kind = "name" if m.group("name") else "op"
            out.append((kind, m.group(kind), m.start(kind)))
            pos = m.end()
        out.append(("end", "", end))
        return out

    def parse(self) -> tuple:
        tree = self.series()
        kind, text, col = self.tokens[self.i]
        if kind != "end":
            raise _fail(f"unexpected {text!r} in arm {self.st.key!r}", self.st, col)
        return tree

    def series(self) -> tuple:
        items = [self.parallel()]
        while self.tokens[self.i][1] == "+":
            self.i += 1
            items.append(self.parallel())
        return items[0] if len(items) == 1 else ("series", tuple(items))

    def parallel(self) -> tuple:
        items = [self.atom()]
        while self.tokens[self.i][1] in ("|", "||"):
            self.i += 1
            items.append(self.atom())
        return items[0] if len(items) == 1 else ("parallel", tuple(items))

    def atom(self) -> tuple:
        kind, text, col = self.tokens[self.i]
        self.i += 1
        if kind == "name":
            return self._part(text, col)
        if text == "(":
            tree = self.series()
            if self.tokens[self.i][1] != ")":
                raise _fail("expected ')'", self.st, self.tokens[self.i][2])
            self.i += 1
            return tree
        found = "end of line" if kind == "end" else repr(text)
        raise _fail(f"unexpected {found} in arm {self.st.key!r}; expected a part name or '('",
                    self.st, col)

    def _part(self, name: str, col: int) -> tuple:
        if name not in self.parts:
            known = ", ".join(self.parts) or "none yet"
            raise _fail(f"unknown part {name!r} (declared: {known}); declare parts before the arms",
                        self.st, col)
        if name in self.used:
            raise _fail(f"part {name!r} is already used on line {self.used[name]}; each part "
                        "stands in one place (declare another with the same value)", self.st, col)
        self.used[name] = self.st.lineno
        return ("part", name)


class _Builder:
    """Collects statements into a Network."""

    def __init__(self):
        self.name = "network"
        self.tolerance: float | None = None
        self.parts: dict[str, Part] = {}
        self.stages: list[tuple[_Statement, str, dict[str, tuple]]] = []
        self.used: dict[str, int] = {}

    def add(self, st: _Statement) -> None:
        if st.key in _SETTINGS:
            getattr(self, f"_set_{st.key}")(st)
        elif st.key in _ARMS:
            self._set_arm(st)
        elif st.key[0] in "RrCc":
            if st.key in self.parts:
                raise _fail(f"part {st.key!r} is declared twice", st, st.key_col)
            self.parts[st.key] = _parse_part(st)
        else:
            raise _fail(f"unknown name {st.key!r}: parts start with R (resistor) or C (capacitor); "
                        f"settings are {', '.join(_SETTINGS)}; arms are {', '.join(sorted(_ARMS))}",
                        st, st.key_col)

    def _set_name(self, st: _Statement) -> None:
        self.name = st.value or self.name

    def _set_tolerance(self, st: _Statement) -> None:
        try:
            self.tolerance = parse_tolerance(st.value)
        except CurveError as exc:
            raise _fail(str(exc), st, st.value_col) from None

    def _set_stage(self, st: _Statement) -> None:
        self._close_stage()
        word = st.value.lower()
        topology = _TOPOLOGY_ALIASES.get(word, word)
        if topology not in TOPOLOGIES:
            raise _fail(f"unknown stage {st.value!r}; choose from {', '.join(TOPOLOGIES)}", st, st.value_col)
        self.stages.append((st, topology, {}))

    def _set_arm(self, st: _Statement) -> None:
        if not self.stages:
            raise _fail(f"arm {st.key!r} comes before any 'stage = …' line", st, st.key_col)
        _, topology, arms = self.stages[-1]
        if st.key not in TOPOLOGIES[topology]:
            raise _fail(f"a {topology} stage has arms {' and '.join(TOPOLOGIES[topology])}, "
                        f"not {st.key!r}", st, st.key_col)
        if st.key in arms:
            raise _fail(f"arm {st.key!r} is given twice in this stage", st, st.key_col)
        arms[st.key] = _ArmParser(st, self.parts, self.used).parse()

    def _close_stage(self) -> None:
        if self.stages:
            st, topology, arms = self.stages[-1]
            missing = [a for a in TOPOLOGIES[topology] if a not in arms]
            if missing:
                raise _fail(f"the {topology} stage has no {' or '.join(missing)} arm", st, st.key_col)

    def build(self, text: str) -> Network:
        self._close_stage()
        if not self.stages:
            raise ExpressionError(f"network has no 'stage = …' line: {text[:60]!r}")
        unused = [name for name in self.parts if name not in self.used]
        if unused:
            warnings.warn(f"network {self.name!r}: part(s) {', '.join(unused)} declared but not used",
                          UserWarning, stacklevel=4)
        used = tuple(p for p in self.parts.values() if p.name in self.used)
        stages = tuple(Stage(top, tuple((a, arms[a]) for a in TOPOLOGIES[top]))
                       for _, top, arms in self.stages)
        return Network(used, stages, self.name, self.tolerance)


def parse_network(text: str) -> Network:
    """Parse dspeq network text (see the module docstring and ``docs/networks.md``).

    Raises
    ------
    ExpressionError
        With the line, the column and the reason, for any malformed text.

    Examples
    --------
    >>> net = parse_network("R1 = 10k; R2 = 100k; C1 = 10n; stage = inverting; "
    ...                     "feedback = R2 | C1; input = R1")
    >>> net.curve().tc_spec()       # R2·C1 = 1 ms
    'tc:/1000'
    >>> [p.name for p in net.parts]
    ['R1', 'R2', 'C1']
    """
    if not isinstance(text, str):
        raise ExpressionError(f"network text must be a string, got {type(text).__name__}")
    builder = _Builder()
    for st in _statements(text):
        builder.add(st)
    return builder.build(text)


def _as_network(network: str | Network) -> Network:
    return network if isinstance(network, Network) else parse_network(network)


def network_curve(network: str | Network, **meta) -> Curve:
    """The exact curve (zeros, poles, gain) of a network given as text or :class:`Network`.

    The gain is the stage's own (not normalized); an inverting stage has a
    negative gain.  ``meta`` sets the Curve's name, source, kind or description.

    Examples
    --------
    >>> c = network_curve("R1 = 10k; R2 = 20k; stage = noninverting; feedback = R2; ground = R1")
    >>> c.gain
    3.0
    """
    return _as_network(network).curve(**meta)


# ---------------------------------------------------------------------------- tolerance


@dataclass(frozen=True)
class Spread:
    """Spread of a network's response over its parts' tolerances.

    Attributes
    ----------
    freqs : ndarray
        Frequencies (Hz).
    nominal_db : ndarray
        Nominal response (dB; relative to ``reference_hz`` when set).
    low_db, median_db, high_db : ndarray
        Percentiles (``percentiles[0]``, 50, ``percentiles[1]``) of the
        deviation from nominal over the draws (dB).
    worst_db : ndarray
        Largest absolute deviation over the draws (dB).
    corner_worst_db : ndarray or None
        Largest absolute deviation over every ±tolerance corner (None when
        more than ``CORNER_LIMIT`` parts vary).
    """

    freqs: np.ndarray
    nominal_db: np.ndarray
    low_db: np.ndarray
    median_db: np.ndarray
    high_db: np.ndarray
    worst_db: np.ndarray
    corner_worst_db: np.ndarray | None
    percentiles: tuple[float, float]
    draws: int
    seed: int
    distribution: str
    reference_hz: float | None
    tolerances: dict[str, float]

    @property
    def max_worst_db(self) -> float:
        """Largest deviation at any frequency, from draws and corners (dB)."""
        worst = self.worst_db if self.corner_worst_db is None else np.maximum(self.worst_db,
                                                                             self.corner_worst_db)
        return float(np.max(worst))

    @property
    def f_at_worst(self) -> float:
        """Frequency (Hz) of :attr:`max_worst_db`."""
        worst = self.worst_db if self.corner_worst_db is None else np.maximum(self.worst_db,
                                                                             self.corner_worst_db)
        return float(self.freqs[int(np.argmax(worst))])

    def summary(self) -> dict[str, float]:
        """JSON-ready summary figures."""
        return {"draws": self.draws, "seed": self.seed, "max_worst_db": self.max_worst_db,
                "f_at_worst_hz": self.f_at_worst, "max_low_db": float(np.min(self.low_db)),
                "max_high_db": float(np.max(self.high_db))}


_DISTRIBUTIONS = ("uniform", "normal")


def _draw(rng: np.random.Generator, distribution: str, shape: tuple[int, int]) -> np.ndarray:
    """Relative deviations in units of the tolerance, within [-1, 1].

    ``normal`` reads the tolerance as 3 σ and clips at ±1 (common practice, no source).
    """
    if distribution == "uniform":
        return rng.uniform(-1.0, 1.0, shape)
    return np.clip(rng.standard_normal(shape) / 3.0, -1.0, 1.0)


def _deviation_db(net: Network, f: np.ndarray, factors: np.ndarray, names: list[str],
                  tols: np.ndarray, reference_hz: float | None) -> np.ndarray:
    """dB deviation from nominal for each row of ``factors`` (in units of tolerance)."""
    grid = f if reference_hz is None else np.append(f, reference_hz)
    values = {n: net.part(n).value * (1.0 + tols[j] * factors[:, j:j + 1]) for j, n in enumerate(names)}
    db = net.magnitude_db(grid, values) - net.magnitude_db(grid)
    return db if reference_hz is None else db[:, :-1] - db[:, -1:]


def tolerance_spread(network: str | Network, freqs: np.ndarray | None = None, *,
                     tolerance: float | None = None, draws: int = 2000, seed: int = 0,
                     distribution: str = "uniform", reference_hz: float | None = DEFAULT_REFERENCE_HZ,
                     percentiles: tuple[float, float] = (5.0, 95.0)) -> Spread:
    """Seeded Monte Carlo of the response over the parts' tolerances.

    Parameters
    ----------
    network : str or Network
    freqs : ndarray, optional
        Frequencies (Hz); default 31 log-spaced from 20 Hz to 20 kHz.
    tolerance : float, optional
        Tolerance (fraction, 0.01 = 1 %) of every part that gives none; the
        network's own ``tolerance =`` default otherwise.
    draws : int, optional
        Number of random networks (100 … 10⁶, default 2000), drawn at once.
    seed : int, optional
        Seed of :func:`numpy.random.default_rng`: the same seed, the same result.
    distribution : {"uniform", "normal"}, optional
        Uniform within ±tolerance, or normal with the tolerance as 3 σ (clipped).
    reference_hz : float or None, optional
        Compare shapes: each draw is normalized at this frequency (default
        1 kHz), so a pure level change is not counted.  None compares levels.
    percentiles : (float, float), optional
        Lower and upper percentile reported (default 5 and 95).

    Returns
    -------
    Spread
    """
    net = _as_network(network)
    f = np.geomspace(20.0, 20_000.0, 31) if freqs is None else np.atleast_1d(np.asarray(freqs, float))
    if distribution not in _DISTRIBUTIONS:
        raise CurveError(f"unknown distribution {distribution!r}; choose from {', '.join(_DISTRIBUTIONS)}")
    draws = int(draws)
    if not (100 <= draws <= 1_000_000) or draws * f.size > 50_000_000:
        raise CurveError(f"draws must lie between 100 and 10^6 (and draws × frequencies ≤ 5·10^7), "
                         f"got {draws!r}")
    if tolerance is not None and not (0 <= tolerance < 1):
        raise CurveError(f"tolerance must be a fraction in [0, 1), got {tolerance!r}")
    all_tols = net.tolerances(tolerance)
    names = [n for n, t in all_tols.items() if t > 0]
    if not names:
        raise CurveError(f"no part of network {net.name!r} has a tolerance: give one "
                         "(e.g. --tolerance 1%) or write it after the part's value")
    tols = np.array([all_tols[n] for n in names])
    rng = np.random.default_rng(seed)
    dev = _deviation_db(net, f, _draw(rng, distribution, (draws, len(names))), names, tols, reference_hz)
    lo, mid, hi = np.percentile(dev, [percentiles[0], 50.0, percentiles[1]], axis=0)
    corner = None
    if len(names) <= CORNER_LIMIT:
        signs = np.array(list(itertools.product((-1.0, 1.0), repeat=len(names))))
        corner = np.max(np.abs(_deviation_db(net, f, signs, names, tols, reference_hz)), axis=0)
    nominal = net.magnitude_db(f)
    if reference_hz is not None:
        nominal = nominal - net.magnitude_db(reference_hz)
    return Spread(f, nominal, lo, mid, hi, np.max(np.abs(dev), axis=0), corner,
                  (float(percentiles[0]), float(percentiles[1])), draws, int(seed), distribution,
                  None if reference_hz is None else float(reference_hz), all_tols)
