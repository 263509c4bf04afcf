"""Analog (s-plane) playback curves and their algebra.

A :class:`Curve` is an immutable rational transfer function

    H(s) = k * prod(s - z_i) / prod(s - p_j)

with zeros and poles in rad/s.  Evaluation is exact (no discretization).
Poles at s = 0 (ideal integrators, as in IEC tape playback for an ideal head)
are kept exactly; a digital design replaces each of them with a first-order
pole at an explicit low-frequency limit (see :func:`dspeq.design`).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence

import numpy as np

from ._errors import CurveError

__all__ = ["Curve", "tc_to_root", "root_to_tc", "rolloff_db_to_tc", "DEFAULT_REFERENCE_HZ"]

#: Frequency (Hz) at which curves are normalized to 0 dB unless told otherwise
#: (1 kHz: common practice for playback curves, e.g. the RIAA table; no single source).
DEFAULT_REFERENCE_HZ = 1000.0

# Relative tolerance under which a zero and a pole are taken to be the same root
# and cancelled (a relative 1e-9 is far below any physical time constant's precision).
_CANCEL_RTOL = 1e-9


def tc_to_root(tau_us: float | None) -> float:
    """Root (rad/s) of the factor ``1 + s*tau`` for a time constant in µs.

    ``None`` or ``inf`` means an infinite time constant: the factor tends to
    ``s*tau``, i.e. a root at s = 0.

    Examples
    --------
    >>> round(tc_to_root(318.0), 3)
    -3144.654
    >>> tc_to_root(None)
    0.0
    """
    if tau_us is None or math.isinf(tau_us):
        return 0.0
    if not (tau_us > 0 and math.isfinite(tau_us)):
        raise CurveError(f"time constant must be positive (µs), got {tau_us!r}")
    return -1e6 / float(tau_us)


def root_to_tc(root: complex) -> float:
    """Time constant in µs of a real root (``inf`` for a root at s = 0)."""
    r = complex(root)
    if r.imag != 0.0:
        raise CurveError(f"root {root!r} is complex; it has no single time constant")
    return math.inf if r.real == 0.0 else -1e6 / r.real


def rolloff_db_to_tc(rolloff_db: float, at_hz: float = 10_000.0) -> float | None:
    """Time constant (µs) of a first-order pole that attenuates by ``rolloff_db`` at ``at_hz``.

    Solves ``10*log10(1 + (2*pi*f*tau)**2) = X`` exactly:
    ``tau = sqrt(10**(X/10) - 1) / (2*pi*f)``.  A roll-off of 0 dB means no pole
    (returns ``None``).

    Examples
    --------
    >>> round(rolloff_db_to_tc(13.7), 1)   # RIAA's 75 µs is the -13.7 dB roll-off
    75.4
    """
    x = abs(float(rolloff_db))
    if not math.isfinite(x):
        raise CurveError(f"roll-off must be a finite number of dB, got {rolloff_db!r}")
    if x == 0.0:
        return None
    return math.sqrt(10.0 ** (x / 10.0) - 1.0) / (2.0 * math.pi * float(at_hz)) * 1e6


def _as_roots(values: Iterable[complex], what: str) -> np.ndarray:
    arr = np.asarray(list(values), dtype=complex).ravel()
    if not np.all(np.isfinite(arr)):
        raise CurveError(f"{what} must be finite, got {arr!r}")
    # Real roots are stored with an exact zero imaginary part.
    arr = np.where(np.abs(arr.imag) <= 1e-12 * np.abs(arr), arr.real + 0j, arr)
    order = np.lexsort((arr.imag, -arr.real))   # deterministic: slowest (nearest 0) first
    arr = arr[order]
    arr.setflags(write=False)
    return arr


def _cancel(zeros: np.ndarray, poles: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Remove equal zero/pole pairs (relative tolerance ``_CANCEL_RTOL``)."""
    z = list(zeros)
    p = list(poles)
    for zi in list(z):
        for j, pj in enumerate(p):
            scale = max(abs(zi), abs(pj))
            if abs(zi - pj) <= _CANCEL_RTOL * scale or (scale == 0.0):
                z.remove(zi)
                del p[j]
                break
    return np.asarray(z, dtype=complex), np.asarray(p, dtype=complex)


class Curve:
    """An immutable analog transfer function H(s) = k·∏(s − zᵢ)/∏(s − pⱼ).

    Parameters
    ----------
    zeros, poles : sequence of complex
        Roots in rad/s.  Poles must lie in the closed left half-plane
        (s = 0 allowed: an ideal integrator).
    gain : float
        The constant ``k``.
    name : str, optional
        Short identifier, e.g. ``"riaa"``.
    source : str, optional
        Where the curve is published (standard, clause or table).
    kind : str, optional
        ``"disc"``, ``"tape"``, ``"correction"`` or ``"custom"``.
    description : str, optional
        Free text.
    reference_hz : float, optional
        Frequency at which the curve was normalized (kept for algebra).

    Examples
    --------
    >>> c = Curve.from_time_constants([318], [3180, 75], name="riaa")
    >>> round(float(c.magnitude_db(20.0)), 2)
    19.27
    """

    __slots__ = ("_zeros", "_poles", "_gain", "name", "source", "kind", "description",
                 "reference_hz", "__weakref__")

    def __init__(self, zeros: Sequence[complex], poles: Sequence[complex], gain: float,
                 name: str = "custom", source: str = "", kind: str = "custom",
                 description: str = "", reference_hz: float = DEFAULT_REFERENCE_HZ):
        z, p = _cancel(_as_roots(zeros, "zeros"), _as_roots(poles, "poles"))
        z, p = _as_roots(z, "zeros"), _as_roots(p, "poles")
        if np.any(p.real > 0):
            bad = ", ".join(f"{complex(x):g}" for x in p[p.real > 0])
            raise CurveError(
                f"pole(s) at {bad} rad/s lie in the right half-plane: an unstable curve "
                "cannot be realized (did you invert a curve with a right-half-plane zero?)")
        k = float(np.real(gain))
        if not math.isfinite(k) or k == 0.0:
            raise CurveError(f"gain must be finite and non-zero, got {gain!r}")
        object.__setattr__(self, "_zeros", z)
        object.__setattr__(self, "_poles", p)
        object.__setattr__(self, "_gain", k)
        object.__setattr__(self, "name", str(name))
        object.__setattr__(self, "source", str(source))
        object.__setattr__(self, "kind", str(kind))
        object.__setattr__(self, "description", str(description))
        object.__setattr__(self, "reference_hz", float(reference_hz))

    def __setattr__(self, key, value):
        raise AttributeError("Curve is immutable; use its methods to derive a new curve")

    # ---------------------------------------------------------------- constructors
    @classmethod
    def from_zpk(cls, zeros: Sequence[complex], poles: Sequence[complex], gain: float = 1.0, *,
                 reference_hz: float | None = DEFAULT_REFERENCE_HZ, gain_db: float = 0.0,
                 **meta) -> Curve:
        """Curve from zeros and poles (rad/s) and a gain.

        With ``reference_hz`` set (default 1 kHz) the gain is replaced so that
        ``|H| = gain_db`` at that frequency; with ``reference_hz=None`` the
        given ``gain`` is kept.
        """
        c = cls(zeros, poles, gain, reference_hz=reference_hz or DEFAULT_REFERENCE_HZ, **meta)
        return c if reference_hz is None else c.normalized(reference_hz, gain_db)

    @classmethod
    def from_time_constants(cls, zeros_us: Iterable[float | None], poles_us: Iterable[float | None],
                            *, reference_hz: float = DEFAULT_REFERENCE_HZ, gain_db: float = 0.0,
                            **meta) -> Curve:
        """Curve ∏(1 + s·τ_zero) / ∏(1 + s·τ_pole), time constants in µs.

        ``None`` or ``inf`` stands for an infinite time constant, i.e. a factor
        ``s`` (a root at s = 0).  The result is normalized to ``gain_db`` at
        ``reference_hz``.

        Examples
        --------
        >>> nab = Curve.from_time_constants([50], [3180])
        >>> iec = Curve.from_time_constants([35], [None])   # (1 + s·35 µs)/s
        >>> iec.poles
        array([0.+0.j])
        """
        zeros = [tc_to_root(t) for t in zeros_us]
        poles = [tc_to_root(t) for t in poles_us]
        return cls.from_zpk(zeros, poles, 1.0, reference_hz=reference_hz, gain_db=gain_db, **meta)

    @classmethod
    def from_expression(cls, text: str, *, reference_hz: float | None = DEFAULT_REFERENCE_HZ,
                        gain_db: float = 0.0, **meta) -> Curve:
        """Curve from a rational expression in ``s`` (safe parser, no ``eval``).

        Numbers may carry SI suffixes (``318u`` = 318e-6).  See :mod:`dspeq.expr`.

        Examples
        --------
        >>> c = Curve.from_expression("(1 + s*318u) / ((1 + s*3180u)(1 + s*75u))")
        >>> round(float(c.magnitude_db(20000.0)), 2)
        -19.62
        """
        from .expr import parse_zpk

        z, p, k = parse_zpk(text)
        meta.setdefault("name", text.strip())
        meta.setdefault("source", "user expression")
        return cls.from_zpk(z, p, k, reference_hz=reference_hz, gain_db=gain_db, **meta)

    @classmethod
    def from_network(cls, text: str, **meta) -> Curve:
        """Exact curve of an analog network described in dspeq's network text.

        See :mod:`dspeq.network` for the format (impedances from R and C values,
        inverting / non-inverting stages, passive dividers).
        """
        from .network import network_curve

        return network_curve(text, **meta)

    # ---------------------------------------------------------------- properties
    @property
    def zeros(self) -> np.ndarray:
        """Zeros in rad/s (read-only array)."""
        return self._zeros

    @property
    def poles(self) -> np.ndarray:
        """Poles in rad/s (read-only array)."""
        return self._poles

    @property
    def gain(self) -> float:
        """The constant k of H(s) = k·∏(s − z)/∏(s − p)."""
        return self._gain

    @property
    def order(self) -> int:
        """max(number of zeros, number of poles)."""
        return max(len(self._zeros), len(self._poles))

    @property
    def n_integrators(self) -> int:
        """Number of poles at s = 0 (ideal integrators)."""
        return int(np.count_nonzero(self._poles == 0))

    def key(self) -> tuple:
        """Hashable identity of the transfer function (roots, gain, reference)."""
        return (tuple(self._zeros.tolist()), tuple(self._poles.tolist()), self._gain,
                self.reference_hz)

    def time_constants(self) -> tuple[list[float], list[float]]:
        """(zero, pole) time constants in µs for real roots (``inf`` for s = 0).

        Raises
        ------
        CurveError
            If a root is complex (no single time constant).
        """
        return ([root_to_tc(z) for z in self._zeros], [root_to_tc(p) for p in self._poles])

    def describe_roots(self) -> str:
        """Compact text of the roots: time constants in µs, or Hz and Q for complex pairs."""
        def fmt(roots: np.ndarray) -> str:
            parts = []
            for r in roots:
                if r.imag > 0:
                    continue
                if r.imag == 0:
                    tc = root_to_tc(r)
                    parts.append("inf" if math.isinf(tc) else f"{tc:.6g}")
                else:
                    w0 = abs(r)
                    parts.append(f"{w0 / (2 * math.pi):.6g}Hz/Q{w0 / (-2 * r.real):.4g}")
            return ",".join(parts) or "-"
        return f"{fmt(self._zeros)} / {fmt(self._poles)} µs"

    def tc_spec(self) -> str:
        """The ``tc:ZEROS/POLES`` text of this curve (real roots only).

        Examples
        --------
        >>> Curve.from_time_constants([318], [3180, 75]).tc_spec()
        'tc:318/3180,75'
        """
        zs, ps = self.time_constants()
        def fmt(vals):
            return ",".join("inf" if math.isinf(v) else f"{v:.10g}" for v in vals)
        return f"tc:{fmt(zs)}/{fmt(ps)}"

    # ---------------------------------------------------------------- evaluation
    def response(self, f: np.ndarray | float) -> np.ndarray:
        """Complex response H(j·2πf) at frequencies ``f`` in Hz (exact)."""
        s = 2j * np.pi * np.asarray(f, dtype=float)
        h = np.full(s.shape, self._gain, dtype=complex)
        for z in self._zeros:
            h = h * (s - z)
        for p in self._poles:
            h = h / (s - p)
        return h

    def magnitude_db(self, f: np.ndarray | float) -> np.ndarray:
        """Magnitude in dB at frequencies ``f`` (Hz)."""
        return 20.0 * np.log10(np.abs(self.response(f)))

    def phase_deg(self, f: np.ndarray | float) -> np.ndarray:
        """Phase in degrees (continuous: a sum of the factors' angles, not wrapped)."""
        s = 2j * np.pi * np.asarray(f, dtype=float)
        ph = np.full(s.shape, 0.0 if self._gain > 0 else np.pi)
        for z in self._zeros:
            ph = ph + np.angle(s - z)
        for p in self._poles:
            ph = ph - np.angle(s - p)
        return np.degrees(ph)

    def group_delay(self, f: np.ndarray | float) -> np.ndarray:
        """Group delay −dφ/dω in seconds at frequencies ``f`` (Hz), exact.

        d/dω angle(jω − a) = Re(1 / (jω − a)), summed over the roots.
        """
        s = 2j * np.pi * np.asarray(f, dtype=float)
        tau = np.zeros(s.shape)
        for z in self._zeros:
            tau = tau - np.real(1.0 / (s - z))
        for p in self._poles:
            tau = tau + np.real(1.0 / (s - p))
        return tau

    # ---------------------------------------------------------------- algebra
    def _derive(self, zeros, poles, gain, **meta) -> Curve:
        fields = {"name": self.name, "source": self.source, "kind": self.kind,
                  "description": self.description, "reference_hz": self.reference_hz}
        fields.update(meta)
        return Curve(zeros, poles, gain, **fields)

    def normalized(self, reference_hz: float = DEFAULT_REFERENCE_HZ, gain_db: float = 0.0) -> Curve:
        """The same curve scaled to ``gain_db`` at ``reference_hz``."""
        ref = float(reference_hz)
        if not (ref > 0 and math.isfinite(ref)):
            raise CurveError(f"reference frequency must be a positive number of Hz, got {reference_hz!r}")
        mag = abs(complex(self.response(ref)))
        if mag == 0.0 or not math.isfinite(mag):
            raise CurveError(f"curve {self.name!r} has no finite non-zero gain at {ref!r} Hz; "
                             "choose another reference frequency")
        k = self._gain * 10.0 ** (gain_db / 20.0) / mag
        return self._derive(self._zeros, self._poles, k, reference_hz=ref)

    def inverse(self) -> Curve:
        """1/H: the recording (pre-emphasis) curve of a playback curve, and vice versa."""
        if np.any(self._zeros.real > 0):
            raise CurveError(f"curve {self.name!r} has right-half-plane zeros; its inverse is unstable")
        return self._derive(self._poles, self._zeros, 1.0 / self._gain,
                            name=f"inverse({self.name})")

    def __mul__(self, other: Curve) -> Curve:
        """Cascade: H = self · other."""
        if not isinstance(other, Curve):
            return NotImplemented
        return self._derive(np.concatenate([self._zeros, other._zeros]),
                            np.concatenate([self._poles, other._poles]),
                            self._gain * other._gain, name=f"{self.name}*{other.name}",
                            kind="correction", source=_join_sources(self, other))

    def __truediv__(self, other: Curve) -> Curve:
        """Ratio: correct a transfer made with curve ``other`` to curve ``self``."""
        if not isinstance(other, Curve):
            return NotImplemented
        return (self * other.inverse())._derive_name(f"{self.name}/{other.name}")

    def _derive_name(self, name: str) -> Curve:
        return self._derive(self._zeros, self._poles, self._gain, name=name)

    def at_speed(self, ratio: float) -> Curve:
        """The curve for a carrier replayed at ``ratio`` × its recorded speed.

        Every corner frequency is multiplied by ``ratio`` (time constants are
        divided by it); the result is renormalized at the curve's reference
        frequency.

        Examples
        --------
        >>> c = Curve.from_time_constants([50], [3180])
        >>> print(c.at_speed(2).tc_spec())
        tc:25/1590
        """
        r = float(ratio)
        if not (r > 0 and math.isfinite(r)):
            raise CurveError(f"speed ratio must be a positive number, got {ratio!r}")
        if r == 1.0:
            return self
        label = f"{self.name}@x{r:g}"
        c = self._derive(self._zeros * r, self._poles * r, self._gain, name=label)
        return c.normalized(self.reference_hz, float(self.magnitude_db(self.reference_hz)))

    def with_lf_limit(self, lf_limit_hz: float) -> Curve:
        """Replace each pole at s = 0 by a pole at −2π·``lf_limit_hz`` (gain kept at high f)."""
        if self.n_integrators == 0:
            return self
        w = 2.0 * math.pi * float(lf_limit_hz)
        if not (w > 0 and math.isfinite(w)):
            raise CurveError(f"low-frequency limit must be a positive number of Hz, got {lf_limit_hz!r}")
        poles = np.where(self._poles == 0, -w, self._poles)
        note = f" [integrator limited at {lf_limit_hz:g} Hz]"
        return self._derive(self._zeros, poles, self._gain, description=(self.description + note).strip())

    def renamed(self, name: str, **meta) -> Curve:
        """Same transfer function with a new name (and other metadata)."""
        return self._derive(self._zeros, self._poles, self._gain, name=name, **meta)

    # ---------------------------------------------------------------- dunder
    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Curve):
            return NotImplemented
        return self.key()[:3] == other.key()[:3]

    def __hash__(self) -> int:
        return hash(self.key()[:3])

    def is_close(self, other: Curve, rtol: float = 1e-9) -> bool:
        """True when roots and gain agree to a relative tolerance."""
        if len(self._zeros) != len(other._zeros) or len(self._poles) != len(other._poles):
            return False
        def close(a, b):
            return bool(np.all(np.abs(a - b) <= rtol * np.maximum(np.abs(a), np.abs(b)) + 1e-300))
        return (close(self._zeros, other._zeros) and close(self._poles, other._poles)
                and abs(self._gain - other._gain) <= rtol * abs(other._gain))

    def __repr__(self) -> str:
        return f"Curve({self.name!r}, {self.describe_roots()}, k={self._gain:.6g})"


def _join_sources(a: Curve, b: Curve) -> str:
    parts = [s for s in (a.source, b.source) if s]
    return "; ".join(dict.fromkeys(parts))
