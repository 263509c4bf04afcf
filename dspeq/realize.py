"""Curve → network: an RC stage whose ratio of impedances is the curve.

Every stage of :mod:`dspeq.network` reduces to one ratio of impedances
``Q(s) = Z_a(s) / Z_b(s)``:

* inverting: ``|H| = Z_feedback / Z_input``, so ``Q = |k|·N/D``;
* non-inverting: ``H = 1 + Z_feedback / Z_ground``, so ``Q = H − 1``;
* divider: ``1/H = 1 + Z_series / Z_shunt``, so ``Q = 1/H − 1``.

``Q`` is realizable with resistors and capacitors when its roots are real and
not positive.  Each root goes to ``Z_a`` or to ``1/Z_b``; a split is kept when
both impedances are RC driving-point impedances (critical frequencies on the
negative real axis, alternating, the one nearest the origin a pole).  Each
impedance is then built in a Foster form from its partial fractions:

* Foster I: a resistor ``Z(∞)``, a capacitor for a pole at s = 0, and one
  parallel R‖C per finite pole, all in series;
* Foster II: a resistor ``Z(0)``, a capacitor for ``Z → 0`` at high
  frequency, and one series R + C per finite zero, all in parallel.

All impedances are then multiplied by one factor (which leaves the curve
unchanged) chosen so that every part lies in the practical ranges, each value
is rounded to an E series (IEC 60063), and the rounded network's curve is
compared with the target.  The factor is searched across the feasible range
for the smallest deviation after rounding.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ._errors import CurveError
from ._eseries import round_to_series, series_tolerance
from .curves import DEFAULT_REFERENCE_HZ, Curve
from .network import TOPOLOGIES, Network, Part, Stage, format_value, network_curve
from .spec import parse_curve

__all__ = ["Realization", "realize", "DEFAULT_R_RANGE", "DEFAULT_C_RANGE", "FORMS", "BUILD_CAUTION",
           "DEFAULT_BAND"]

#: Practical resistor range (ohms) for op-amp stages (common practice, no source).
DEFAULT_R_RANGE = (1e3, 10e6)
#: Practical capacitor range (farads): 100 pF – 0.1 µF (common practice, no source).
DEFAULT_C_RANGE = (100e-12, 100e-9)
#: Band (Hz) over which a realization is compared with its target.
DEFAULT_BAND = (20.0, 20_000.0)
FORMS = ("foster1", "foster2")
BUILD_CAUTION = (
    "CAUTION: these component values are a starting point, not a tested design: check them by\n"
    "measurement, and mind the amplifier's noise, drive and stability. Mains-powered and high-gain\n"
    "stages belong to qualified builders and must follow the local electrical codes.")

_GRID_POINTS = 400
_SCALE_STEPS = 241           # impedance factors tried across the feasible range
_SNAP_RTOL = 1e-9        # polynomial coefficients below this (relative) cancel exactly
_ROOT_RTOL = 1e-9        # imaginary parts below this (relative) are rounding
_MAX_ROOTS = 12          # 2**12 splits at most


@dataclass(frozen=True)
class Realization:
    """A realized network and how close it comes to its target.

    Attributes
    ----------
    target : Curve
        The curve asked for, at the level realized.
    topology : str
        ``"inverting"``, ``"noninverting"`` or ``"divider"``.
    network : Network
        The network with rounded values (the exact values when no series).
    exact : Network
        The same network before rounding (after impedance scaling).
    scale : float
        The impedance factor applied to the synthesized network.
    series : (str or None, str or None)
        E series of the resistors and of the capacitors.
    freqs, deviation_db : ndarray
        Grid (Hz) and shape deviation of ``network`` from ``target`` (dB,
        both normalized at ``reference_hz``).
    level_error_db : float
        Level difference at ``reference_hz`` (dB).
    out_of_range : list of str
        One sentence per part outside the ranges, with the reason.
    notes : list of str
        Remarks on the realization (polarity, DC path, …).
    """

    target: Curve
    topology: str
    network: Network
    exact: Network
    scale: float
    series: tuple[str | None, str | None]
    r_range: tuple[float, float]
    c_range: tuple[float, float]
    reference_hz: float
    freqs: np.ndarray
    deviation_db: np.ndarray
    level_error_db: float
    out_of_range: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)

    @property
    def max_deviation_db(self) -> float:
        """Largest absolute shape deviation over the band (dB)."""
        return float(np.max(np.abs(self.deviation_db)))

    @property
    def f_at_max(self) -> float:
        """Frequency (Hz) of the largest deviation."""
        return float(self.freqs[int(np.argmax(np.abs(self.deviation_db)))])

    @property
    def text(self) -> str:
        """The network as dspeq network text, with a header."""
        series = "exact values" if self.series == (None, None) else \
            f"R in {self.series[0] or 'exact values'}, C in {self.series[1] or 'exact values'}"
        header = (f"{self.topology} stage for curve {self.target.name!r} ({series}), "
                  "written by dspeq realize\n"
                  f"shape deviation {self.max_deviation_db:.3g} dB max over "
                  f"{self.freqs[0]:g}-{self.freqs[-1]:g} Hz; level error {self.level_error_db:+.3g} dB "
                  f"at {self.reference_hz:g} Hz\n"
                  "component values are a starting point; see docs/networks.md")
        return self.network.to_text(header)

    def in_range(self, part: Part) -> bool:
        """True when ``part`` lies within the practical range of its kind."""
        return _in_range(part, self.r_range, self.c_range)

    def summary(self) -> dict:
        """JSON-ready summary."""
        return {"curve": self.target.name, "topology": self.topology, "scale": self.scale,
                "r_series": self.series[0], "c_series": self.series[1],
                "max_deviation_db": self.max_deviation_db, "f_at_max_hz": self.f_at_max,
                "level_error_db": self.level_error_db, "parts": len(self.network.parts),
                "out_of_range": list(self.out_of_range)}


# ---------------------------------------------------------------------------- the ratio Q(s)


def _poly_difference(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """a − b, with coefficients lost to rounding set to exactly zero."""
    size = max(len(a), len(b))
    a, b = np.pad(a, (size - len(a), 0)), np.pad(b, (size - len(b), 0))
    out = a - b
    out[np.abs(out) <= _SNAP_RTOL * np.maximum(np.abs(a), np.abs(b))] = 0.0
    return np.trim_zeros(out, "f") if np.any(out) else out[-1:]


def _real_nonpositive(roots: np.ndarray, what: str) -> np.ndarray:
    roots = np.asarray(roots, dtype=complex)
    bad = (np.abs(roots.imag) > _ROOT_RTOL * np.abs(roots)) | (roots.real > _ROOT_RTOL * np.abs(roots))
    if np.any(bad):
        shown = ", ".join(f"{complex(r):.5g}" for r in roots[bad])
        raise CurveError(f"{what} has roots ({shown}) rad/s that are complex or in the right half-plane: "
                         "resistors and capacitors realize only real roots ≤ 0")
    return np.minimum(roots.real, 0.0)


def _ratio(target: Curve, topology: str) -> tuple[np.ndarray, np.ndarray, float]:
    """Zeros, poles and gain of Q = Z_a/Z_b for the topology (see module docstring)."""
    z = _real_nonpositive(target.zeros, f"curve {target.name!r}")
    p = _real_nonpositive(target.poles, f"curve {target.name!r}")
    k = target.gain
    if topology == "inverting":
        return z, p, abs(k)
    kn, d = k * np.poly(z), np.poly(p)
    num, den, gain_den = (_poly_difference(kn, d), p, 1.0) if topology == "noninverting" else \
        (_poly_difference(d, kn), z, k)
    if not np.any(num):
        raise CurveError(f"curve {target.name!r} is flat at unity gain: a {topology} stage would be a wire")
    qz = _real_nonpositive(np.roots(num), f"{'H − 1' if topology == 'noninverting' else '1/H − 1'} "
                           f"of curve {target.name!r} at this level")
    return qz, np.asarray(den, float), float(num[0]) / gain_den


# ---------------------------------------------------------------------------- RC impedances


def _is_rc_impedance(zeros: np.ndarray, poles: np.ndarray) -> bool:
    """Critical frequencies alternate along −σ, starting with a pole (which may be at 0)."""
    crit = sorted([(-x, 1) for x in zeros] + [(-x, 0) for x in poles])
    kinds = [kind for _, kind in crit]
    mags = [m for m, _ in crit]
    return kinds == [i % 2 for i in range(len(kinds))] and all(np.diff(mags) > 0)


def _residue(root: float, k: float, num_roots: np.ndarray, den_roots: np.ndarray) -> float:
    """Residue at ``root`` of k·∏(s − num)/∏(s − den) with ``root`` removed once from ``den``."""
    others = list(den_roots)
    others.remove(root)
    return k * float(np.prod(root - num_roots)) / float(np.prod(root - np.array(others)))


def _foster1(zeros: np.ndarray, poles: np.ndarray, k: float) -> list[list[tuple[str, float]]]:
    """Sections in series; each a list of parts in parallel: R(∞), C for s = 0, R‖C per pole."""
    sections = []
    if len(zeros) == len(poles):
        sections.append([("R", k)])
    for p in sorted(poles, reverse=True):
        r = _residue(p, k, zeros, poles)
        sections.append([("C", 1.0 / r)] if p == 0 else [("R", r / -p), ("C", 1.0 / r)])
    return sections


def _foster2(zeros: np.ndarray, poles: np.ndarray, k: float) -> list[list[tuple[str, float]]]:
    """Branches in parallel; each a list of parts in series: R(0), C(∞), R + C per zero."""
    branches = []
    if not np.any(poles == 0):
        branches.append([("R", k * float(np.prod(-zeros)) / float(np.prod(-poles)))])
    if len(poles) == len(zeros) + 1:
        branches.append([("C", 1.0 / k)])
    ys = np.append(zeros, 0.0)          # Y(s)/s = (1/k)·∏(s − p) / (s·∏(s − z))
    for z in sorted(zeros, reverse=True):
        r = _residue(z, 1.0 / k, poles, ys)
        branches.append([("R", 1.0 / r), ("C", r / -z)])
    return branches


_FOSTER = {"foster1": (_foster1, "series", "parallel"), "foster2": (_foster2, "parallel", "series")}


@dataclass(frozen=True)
class _Arm:
    form: str
    groups: tuple[tuple[tuple[str, float], ...], ...]

    @property
    def elements(self) -> list[tuple[str, float]]:
        return [e for g in self.groups for e in g]


def _arms(zeros, poles, k, forms) -> list[_Arm]:
    out = []
    for form in forms:
        groups = tuple(tuple(g) for g in _FOSTER[form][0](zeros, poles, k))
        if any(v <= 0 or not math.isfinite(v) for g in groups for _, v in g):
            raise CurveError(f"internal error: {form} synthesis gave a non-positive part {groups!r}")
        if all(_signature(a) != _signature(_Arm(form, groups)) for a in out):
            out.append(_Arm(form, groups))
    return out


def _signature(arm: _Arm) -> tuple:
    """Structure and values, so that identical arms from both forms count once."""
    if all(len(g) == 1 for g in arm.groups) and len(arm.groups) == 1:
        return ("single", arm.groups)
    return (arm.form, arm.groups)


def _pick(roots: list[tuple[float, str]], side: list[int], which: int, tag: str) -> np.ndarray:
    return np.array([r for (r, t), s in zip(roots, side, strict=True) if s == which and t == tag])


def _candidates(qz, qp, qk, forms):
    """Every (Z_a arm, Z_b arm) pair from a valid split of Q's roots, smallest first."""
    roots = [(r, "z") for r in qz] + [(r, "p") for r in qp]
    if len(roots) > _MAX_ROOTS:
        raise CurveError(f"curve has {len(roots)} roots; at most {_MAX_ROOTS} can be realized")
    out = []
    for mask in range(2 ** len(roots)):
        side = [(mask >> i) & 1 for i in range(len(roots))]
        az, ap = _pick(roots, side, 0, "z"), _pick(roots, side, 0, "p")
        bz, bp = _pick(roots, side, 1, "p"), _pick(roots, side, 1, "z")   # Z_b = 1/(its share of Q)
        if _is_rc_impedance(az, ap) and _is_rc_impedance(bz, bp):
            out += [(a, b) for a in _arms(az, ap, 1.0, forms) for b in _arms(bz, bp, 1.0 / qk, forms)]
    out.sort(key=lambda ab: len(ab[0].elements) + len(ab[1].elements))
    return out


# ---------------------------------------------------------------------------- network and scale


def _network(arm_a: _Arm, arm_b: _Arm, topology: str, name: str) -> Network:
    counts = {"R": 0, "C": 0}
    parts: list[Part] = []

    def tree(arm: _Arm) -> tuple:
        outer, inner = _FOSTER[arm.form][1:]
        nodes = []
        for group in arm.groups:
            leaves = []
            for kind, value in group:
                counts[kind] += 1
                parts.append(Part(f"{kind}{counts[kind]}", kind, value))
                leaves.append(("part", parts[-1].name))
            nodes.append(leaves[0] if len(leaves) == 1 else (inner, tuple(leaves)))
        return nodes[0] if len(nodes) == 1 else (outer, tuple(nodes))

    arms = tuple(zip(TOPOLOGIES[topology], (tree(arm_a), tree(arm_b)), strict=True))
    return Network(tuple(parts), (Stage(topology, arms),), name)


def _scale_bounds(net: Network, r_range, c_range):
    """Interval of impedance factors keeping every part in range, with the parts that bound it."""
    lows, highs = [], []
    for p in net.parts:
        if p.kind == "R":
            lows.append((r_range[0] / p.value, p.name))
            highs.append((r_range[1] / p.value, p.name))
        else:
            lows.append((p.value / c_range[1], p.name))
            highs.append((p.value / c_range[0], p.name))
    return max(lows), min(highs)


def _rounded(values: np.ndarray, kinds: list[str], series: tuple[str | None, str | None]) -> np.ndarray:
    out = values.copy()
    for kind, name in zip("RC", series, strict=True):
        cols = [i for i, k in enumerate(kinds) if k == kind]
        if name and cols:
            out[:, cols] = round_to_series(values[:, cols].ravel(), name).reshape(len(values), len(cols))
    return out


def _in_range(part: Part, r_range, c_range) -> bool:
    lo, hi = r_range if part.kind == "R" else c_range
    return lo * (1 - 1e-12) <= part.value <= hi * (1 + 1e-12)


def _out_of_range(net: Network, r_range, c_range, low, high) -> list[str]:
    msgs = []
    for p in net.parts:
        lo, hi, unit = (*r_range, "\u03a9") if p.kind == "R" else (*c_range, "F")
        if _in_range(p, r_range, c_range):
            continue
        where = "below" if p.value < lo else "above"
        if low[0] > high[0]:
            why = (f"the ranges are {low[0] / high[0]:.3g}× too narrow for this curve at this gain "
                   f"({low[1]} and {high[1]} limit the common impedance factor from opposite sides)")
        else:
            why = "rounding to the series moved it across the limit"
        msgs.append(f"{p.name} = {format_value(p.value)}{unit} is {where} the range "
                    f"{format_value(lo)}-{format_value(hi)}{unit}: {why}")
    return msgs


def _evaluate(net: Network, target: Curve, series, r_range, c_range, f, ref):
    """Scale (searched), round and measure one candidate.

    Returns the rounded network, the scaled exact one, the factor and the out-of-range messages.
    The factor chosen keeps every part in range if any does, then has the least deviation, then
    lies nearest the middle of the feasible interval.
    """
    low, high = _scale_bounds(net, r_range, c_range)
    if low[0] <= high[0] and any(series):
        scales = np.geomspace(low[0], high[0], _SCALE_STEPS)
    else:
        scales = np.array([math.sqrt(low[0] * high[0])])
    kinds = [p.kind for p in net.parts]
    base = np.array([p.value for p in net.parts])
    factor = np.where(np.array(kinds) == "R", scales[:, None], 1.0 / scales[:, None])  # R·k, C/k
    values = _rounded(base * factor, kinds, series)
    grid = np.append(f, ref)
    dev = net.magnitude_db(grid, {p.name: values[:, [i]] for i, p in enumerate(net.parts)})
    dev = dev - target.magnitude_db(grid)
    shape = dev[:, :-1] - dev[:, -1:]
    is_r = np.array(kinds) == "R"
    lo_b, hi_b = np.where(is_r, r_range[0], c_range[0]), np.where(is_r, r_range[1], c_range[1])
    in_range = np.all((values >= lo_b * (1 - 1e-12)) & (values <= hi_b * (1 + 1e-12)), axis=1)
    worst = np.max(np.abs(shape), axis=1)
    off_centre = np.abs(np.log(scales / math.sqrt(low[0] * high[0])))
    best = int(np.lexsort((off_centre, worst, ~in_range))[0])
    exact = net.scaled(scales[best])
    final = net.with_values(dict(zip([p.name for p in net.parts], values[best], strict=True)))
    return final, exact, float(scales[best]), _out_of_range(final, r_range, c_range, low, high)


def _with_tolerances(net: Network, series) -> Network:
    parts = []
    for p in net.parts:
        name = series[0] if p.kind == "R" else series[1]
        parts.append(Part(p.name, p.kind, p.value, series_tolerance(name) if name else None))
    return Network(tuple(parts), net.stages, net.name)


def _level_target(target: Curve, topology: str, gain_db: float | None, ref: float) -> Curve:
    """The target at the level to realize: ``gain_db`` at ``ref``, or the topology's natural level.

    A non-inverting stage never goes below unity gain and a divider never above
    it, so their natural level puts the curve's lower (resp. higher) end at
    0 dB.
    """
    if topology != "inverting" and target.gain < 0:
        raise CurveError(f"a {topology} stage cannot invert polarity; curve {target.name!r} has a "
                         "negative gain")
    if gain_db is not None:
        target = target.normalized(ref, float(gain_db))
    if topology == "inverting":
        return target
    ends = _end_gains(target)
    if topology == "noninverting":
        level, ok, hint = min(ends), min(ends) >= 1 - 1e-9, "falls below unity gain (0 dB)"
    else:
        level, ok, hint = max(ends), max(ends) <= 1 + 1e-9, "rises above unity gain (0 dB)"
    if gain_db is None and 0 < level < math.inf:
        return target.normalized(ref, float(target.magnitude_db(ref)) - 20 * math.log10(level))
    if ok and gain_db is not None:
        return target
    where = "at low frequencies" if level == ends[0] else "at high frequencies"
    if 0 < level < math.inf:
        fix = "raise --gain-db" if topology == "noninverting" else "lower --gain-db"
        raise CurveError(f"curve {target.name!r} {hint} {where} (|H| → {level:.4g}); a {topology} stage "
                         f"cannot follow it: {fix}")
    if topology == "divider" and level == 0:
        raise CurveError(f"curve {target.name!r} falls to zero at both ends: give a divider's level with "
                         "--gain-db (a passive stage loses level; start well below the curve's peak)")
    raise CurveError(f"curve {target.name!r} {hint} {where} (|H| → {level:.4g}); a {topology} stage "
                     "cannot follow it: use --topology inverting")


def _end_gains(c: Curve) -> tuple[float, float]:
    """|H| at s → 0 and s → ∞ (0 or inf where it vanishes or grows)."""
    def at(limit_zero: bool) -> float:
        nz, npo = len(c.zeros), len(c.poles)
        if limit_zero:
            z0, p0 = int(np.sum(c.zeros == 0)), int(np.sum(c.poles == 0))
            if z0 != p0:
                return 0.0 if z0 > p0 else math.inf
            zs, ps = c.zeros[c.zeros != 0], c.poles[c.poles != 0]
            return abs(c.gain * float(np.prod(-zs.real)) / float(np.prod(-ps.real)))
        if nz != npo:
            return 0.0 if npo > nz else math.inf
        return abs(c.gain)
    return at(True), at(False)


def _notes(target: Curve, topology: str) -> list[str]:
    notes = []
    if topology == "inverting":
        notes.append("an inverting stage reverses polarity (180° phase); invert again downstream if "
                     "absolute polarity matters")
        if target.n_integrators:
            notes.append("the curve has a pole at s = 0: the feedback arm has no DC path, so a built "
                         "stage needs a large resistor across it for a finite DC gain (a low-frequency "
                         "limit, as --lf-limit sets for a digital design)")
    return notes


def realize(curve: Curve | str, *, topology: str = "inverting", series: str | None = "E24",
            c_series: str | None = "same", r_range: tuple[float, float] = DEFAULT_R_RANGE,
            c_range: tuple[float, float] = DEFAULT_C_RANGE, gain_db: float | None = None,
            reference_hz: float = DEFAULT_REFERENCE_HZ, form: str = "auto",
            band: tuple[float, float] = DEFAULT_BAND) -> Realization:
    """Synthesize an RC stage for ``curve``, scaled into practical ranges and rounded.

    Parameters
    ----------
    curve : Curve or str
        Any curve spec accepted by :func:`dspeq.curve`.  Its roots must be real.
    topology : {"inverting", "noninverting", "divider"}, optional
    series, c_series : str or None, optional
        E series for the resistors (default E24) and the capacitors (default
        ``"same"``: as the resistors); None keeps exact values.
    r_range, c_range : (float, float), optional
        Practical ranges in ohms and farads (defaults 1 kΩ–10 MΩ and
        100 pF–0.1 µF, common practice for op-amp stages, no source).
    gain_db : float, optional
        Level of the stage at ``reference_hz``.  Default: the curve's own level
        (inverting), unity at the curve's low end (non-inverting) or its high
        end (divider).
    reference_hz : float, optional
        Frequency at which shapes are compared and ``gain_db`` applies.
    form : {"auto", "foster1", "foster2"}, optional
        Foster form of both arms; "auto" tries both and keeps the best.
    band : (float, float), optional
        Band (Hz) of the deviation check.

    Returns
    -------
    Realization

    Examples
    --------
    >>> r = realize("riaa", series=None)
    >>> r.max_deviation_db < 1e-9
    True
    """
    topology = str(topology).lower()
    if topology not in TOPOLOGIES:
        raise CurveError(f"unknown topology {topology!r}; choose from {', '.join(TOPOLOGIES)}")
    forms = FORMS if form == "auto" else (form,)
    if any(fm not in FORMS for fm in forms):
        raise CurveError(f"unknown form {form!r}; choose from auto, {', '.join(FORMS)}")
    rr, cr = _check_range(r_range, "resistor"), _check_range(c_range, "capacitor")
    both = (series, series if c_series == "same" else c_series)
    ref = float(reference_hz)
    target = _level_target(parse_curve(curve), topology, gain_db, ref)
    qz, qp, qk = _ratio(target, topology)
    candidates = _candidates(qz, qp, qk, forms)
    if not candidates:
        raise CurveError(f"curve {target.name!r} has no RC realization as a {topology} stage "
                         "(its roots do not interlace): try another topology or --gain-db")
    f = np.geomspace(band[0], band[1], _GRID_POINTS)
    fewest = len(candidates[0][0].elements) + len(candidates[0][1].elements)
    results = []
    for arm_a, arm_b in candidates:
        if len(arm_a.elements) + len(arm_b.elements) > fewest:
            break
        net = _network(arm_a, arm_b, topology, f"{target.name} ({topology})")
        final, exact, scale, bad = _evaluate(net, target, both, rr, cr, f, ref)
        dev = _deviation(final, target, f, ref)
        results.append((len(bad), float(np.max(np.abs(dev))), final, exact, scale, bad, dev))
    n_bad, _, final, exact, scale, bad, dev = min(results, key=lambda r: r[:2])
    final = _with_tolerances(final, both)
    level = float(final.magnitude_db(ref) - target.magnitude_db(ref))
    notes = _notes(target, topology)
    if bad:
        notes.append("parts out of range: widen --r-range/--c-range, lower --gain-db, or split the gain "
                     "over two stages")
    return Realization(target, topology, final, exact, scale, both, rr, cr, ref, f, dev, level, bad, notes)


def _deviation(net: Network, target: Curve, f: np.ndarray, ref: float) -> np.ndarray:
    """Shape deviation (dB) of the network's exact curve from the target, both 0 dB at ``ref``."""
    curve = network_curve(net)
    shape = curve.magnitude_db(f) - target.magnitude_db(f)
    return shape - float(curve.magnitude_db(ref) - target.magnitude_db(ref))


def _check_range(rng, what: str) -> tuple[float, float]:
    lo, hi = (float(x) for x in rng)
    if not (0 < lo < hi and math.isfinite(hi)):
        raise CurveError(f"{what} range must be (low, high) with 0 < low < high, got {rng!r}")
    return lo, hi
