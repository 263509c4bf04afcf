"""Safe parser for rational expressions in the Laplace variable ``s``.

The text is read by a small tokenizer and a recursive-descent parser; nothing
is ever evaluated as Python code.  The grammar (juxtaposition binds tighter
than ``*`` and ``/``, so ``1/(1+s)(1+2s)`` is ``1/((1+s)(1+2s))``)::

    sum      := term (("+" | "-") term)*
    term     := unary (("*" | "/") unary)*
    unary    := ("+" | "-") unary | product
    product  := power power_p*          (implicit multiplication)
    power    := primary [("^" | "**") INTEGER]
    primary  := NUMBER | "s" | "pi" | "(" sum ")"

``power_p`` is a power whose primary starts with a name or ``(``; a number
right after another factor (``1 000``, ``s2``) is an error, not a product.
Numbers take scientific notation or one SI prefix (``22k``, ``4k7``, ``3180u``,
``0.1µ``).  ``U+2212`` (minus sign), ``·`` and ``×`` are read as ``-``, ``*``
and ``*``.

The value is kept factored: products and quotients collect polynomial factors
(coefficients highest power first, :func:`numpy.polyval` order) and a real
constant; a sum of non-constant terms is expanded into one numerator
polynomial over the common denominator (denominator factors shared by both
terms are not repeated).  Nothing is cancelled between numerator and
denominator.  Where a coefficient of a sum is smaller than the rounding error
of its two addends (``4·eps·(|a|+|b|)``) it is set to exactly zero, so
``0.1*s + 0.2*s - 0.3*s`` is zero rather than ``5.6e-17*s``.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

import numpy as np

from dspeq._errors import ExpressionError

__all__ = ["parse_si_number", "parse_rational", "parse_zpk"]

MAX_LENGTH = 2000
"""Longest accepted expression text, in characters."""
MAX_DEPTH = 100
"""Deepest accepted nesting of parentheses and unary signs."""
MAX_EXPONENT = 16
"""Largest accepted integer exponent."""
MAX_DEGREE = 64
"""Largest accepted degree of the numerator or the denominator."""

_SI_EXPONENTS = {
    "f": -15, "p": -12, "n": -9, "u": -6, "\u00b5": -6, "\u03bc": -6,
    "m": -3, "k": 3, "M": 6, "G": 9, "T": 12,
}  # fmt: skip
_MANTISSA = re.compile(r"([0-9]+)(\.[0-9]*)?|\.[0-9]+")
_EXPONENT = re.compile(r"[eE][+-]?[0-9]+")
_DIGITS = re.compile(r"[0-9]+")
_OPERATORS = ("**", "+", "-", "*", "/", "^", "(", ")")
_ALIASES = {"\u2212": "-", "\u00b7": "*", "\u00d7": "*"}
_NAMES = ("s", "pi")
_ADD_TOL = 4 * np.finfo(float).eps
_REAL_TOL = 8 * math.sqrt(np.finfo(float).eps)


# ----------------------------------------------------------------- numbers


def _letter_run(text: str, pos: int) -> str:
    """Return the run of letters in `text` starting at `pos`."""
    end = pos
    while end < len(text) and text[end].isalpha():
        end += 1
    return text[pos:end]


def _scan_number(text: str, pos: int) -> tuple[float, int]:
    """Read one number (scientific notation or SI prefix) at `pos`.

    Returns the value and the position after it.  An SI prefix letter that
    starts a known name (``2pi``) is left for the tokenizer.  The value is
    converted from its decimal text in one step, so ``4k7`` is exactly 4700.0.
    """
    match = _MANTISSA.match(text, pos)
    if match is None:
        raise ExpressionError("expected a number", text, pos)
    literal, end = match.group(0), match.end()
    exponent = _EXPONENT.match(text, end)
    if exponent is not None:
        literal, end = text[pos : exponent.end()], exponent.end()
    elif end < len(text) and text[end] in _SI_EXPONENTS and _letter_run(text, end) not in _NAMES:
        shift, end = _SI_EXPONENTS[text[end]], end + 1
        fraction = _DIGITS.match(text, end)
        if fraction is not None and match.group(1) is not None and match.group(2) is None:
            literal, end = f"{literal}.{fraction.group(0)}", fraction.end()
        literal = f"{literal}e{shift}"
    value = float(literal)
    if not math.isfinite(value):
        raise ExpressionError("number out of floating-point range", text, pos)
    return value, end


def _check_text(text: object) -> str:
    """Reject non-strings, empty and over-long texts."""
    if not isinstance(text, str):
        raise ExpressionError(f"expected a string, got {type(text).__name__}: {text!r:.80}")
    if len(text) > MAX_LENGTH:
        raise ExpressionError(f"text too long ({len(text)} characters, limit {MAX_LENGTH}): {text[:40]!r}...")
    if not text.strip():
        raise ExpressionError("empty expression", text, 0)
    return text


def parse_si_number(text: str) -> float:
    """Parse a number with an optional sign, exponent or SI prefix.

    Parameters
    ----------
    text : str
        For example ``"22k"``, ``"4k7"`` (4700), ``"2u2"`` (2.2e-6),
        ``"3180u"``, ``"0.1µ"``, ``"75e-6"`` or ``"-1.5M"``.  Prefixes:
        f p n u (µ, μ) m k M G T.  Surrounding whitespace is ignored; unit
        letters are not accepted.

    Returns
    -------
    float
        The finite value.

    Raises
    ------
    ExpressionError
        If the text is not exactly one number.

    Examples
    --------
    >>> parse_si_number("4k7")
    4700.0
    >>> parse_si_number("10n")
    1e-08
    """
    text = _check_text(text)
    pos = len(text) - len(text.lstrip())
    sign = 1.0
    if text[pos] in "+-\u2212":
        sign, pos = (1.0 if text[pos] == "+" else -1.0), pos + 1
    value, end = _scan_number(text, pos)
    rest = text[end:]
    if rest.strip():
        position = end + len(rest) - len(rest.lstrip())
        raise ExpressionError(f"unexpected {rest.strip()[0]!r} after number", text, position)
    return sign * value


# --------------------------------------------------------------- tokenizer


@dataclass(frozen=True)
class _Token:
    kind: str  # "num", "name", "op" or "end"
    text: str
    pos: int
    value: float = 0.0


def _tokenize(text: str) -> list[_Token]:
    """Split `text` into tokens, ending with an ``end`` token."""
    tokens, pos = [], 0
    while pos < len(text):
        char = text[pos]
        if char.isspace():
            pos += 1
        elif char in "0123456789.":
            value, end = _scan_number(text, pos)
            tokens.append(_Token("num", text[pos:end], pos, value))
            pos = end
        elif char.isalpha():
            name = _letter_run(text, pos)
            if name not in _NAMES:
                raise ExpressionError(f"unknown name {name!r} (only s and pi)", text, pos)
            tokens.append(_Token("name", name, pos))
            pos += len(name)
        else:
            pos = _append_operator(tokens, text, pos)
    tokens.append(_Token("end", "", len(text)))
    return tokens


def _append_operator(tokens: list[_Token], text: str, pos: int) -> int:
    """Append the operator at `pos` to `tokens`; return the next position."""
    alias = _ALIASES.get(text[pos])
    if alias is not None:
        tokens.append(_Token("op", alias, pos))
        return pos + 1
    for op in _OPERATORS:
        if text.startswith(op, pos):
            tokens.append(_Token("op", op, pos))
            return pos + len(op)
    raise ExpressionError(f"unexpected character {text[pos]!r}", text, pos)


# ------------------------------------------------------- rational values


@dataclass(frozen=True)
class _Rational:
    """const * prod(num) / prod(den); factors are coefficient tuples of degree >= 1."""

    num: tuple[tuple[float, ...], ...] = ()
    den: tuple[tuple[float, ...], ...] = ()
    const: float = 1.0


_ONE = _Rational()


def _degree(factors: tuple[tuple[float, ...], ...]) -> int:
    return sum(len(f) - 1 for f in factors)


def _make(num, den, const: float, text: str, pos: int) -> _Rational:
    """Build a value, checking range and degree; zero drops all factors."""
    coefficients = [const, *(c for f in (*num, *den) for c in f)]
    if not all(math.isfinite(c) for c in coefficients):
        raise ExpressionError("value out of floating-point range", text, pos)
    if max(_degree(num), _degree(den)) > MAX_DEGREE:
        raise ExpressionError(f"degree above {MAX_DEGREE}", text, pos)
    if const == 0.0:
        return _Rational(const=0.0)
    return _Rational(tuple(num), tuple(den), float(const))


def _product(factors, start=(1.0,)) -> np.ndarray:
    result = np.asarray(start, dtype=float)
    for factor in factors:
        result = np.polymul(result, factor)
    return result


def _add_coefficients(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Add two polynomials; coefficients lost in rounding become exact zeros."""
    size = max(len(a), len(b))
    a = np.pad(a, (size - len(a), 0))
    b = np.pad(b, (size - len(b), 0))
    total = a + b
    total[np.abs(total) <= _ADD_TOL * (np.abs(a) + np.abs(b))] = 0.0
    nonzero = np.flatnonzero(total)
    return total[nonzero[0] :] if nonzero.size else total[-1:]


def _remove(factors, taken) -> list:
    """Return `factors` with one occurrence of each of `taken` removed."""
    rest = list(factors)
    for factor in taken:
        rest.remove(factor)
    return rest


def _common(a, b) -> list:
    """Multiset intersection of two factor lists (exact equality)."""
    rest, common = list(b), []
    for factor in a:
        if factor in rest:
            rest.remove(factor)
            common.append(factor)
    return common


def _add(a: _Rational, b: _Rational, text: str, pos: int) -> _Rational:
    """a + b over the common denominator; a non-constant sum is one factor."""
    common = _common(a.den, b.den)
    a_rest, b_rest = _remove(a.den, common), _remove(b.den, common)
    left = _product([*a.num, *b_rest], (a.const,))
    right = _product([*b.num, *a_rest], (b.const,))
    total = _add_coefficients(left, right)
    den = (*common, *a_rest, *b_rest)
    if len(total) == 1:
        return _make((), den, total[0], text, pos)
    return _make((tuple(total.tolist()),), den, 1.0, text, pos)


def _mul(a: _Rational, b: _Rational, text: str, pos: int) -> _Rational:
    return _make((*a.num, *b.num), (*a.den, *b.den), a.const * b.const, text, pos)


def _reciprocal(a: _Rational, text: str, pos: int) -> _Rational:
    if a.const == 0.0:
        raise ExpressionError("division by zero", text, pos)
    return _make(a.den, a.num, 1.0 / a.const, text, pos)


def _power(a: _Rational, exponent: int, text: str, pos: int) -> _Rational:
    result = _ONE
    for _ in range(exponent):
        result = _mul(result, a, text, pos)
    return result


# ------------------------------------------------------------------ parser


class _Parser:
    """Recursive-descent parser over a token list, with a nesting limit."""

    def __init__(self, text: str):
        self.text = text
        self.tokens = _tokenize(text)
        self.index = 0
        self.depth = 0

    @property
    def token(self) -> _Token:
        return self.tokens[self.index]

    def error(self, message: str, token: _Token | None = None) -> ExpressionError:
        token = token or self.token
        return ExpressionError(message, self.text, token.pos)

    def unexpected(self, expected: str) -> ExpressionError:
        token = self.token
        found = "end of expression" if token.kind == "end" else repr(token.text)
        return self.error(f"unexpected {found}; expected {expected}")

    def accept(self, *ops: str) -> _Token | None:
        token = self.token
        if token.kind == "op" and token.text in ops:
            self.index += 1
            return token
        return None

    def parse(self) -> _Rational:
        value = self.sum()
        if self.token.text == ")":
            raise self.error("unbalanced ')'")
        if self.token.kind != "end":
            raise self.unexpected("an operator")
        return value

    def nested(self, method, opening: _Token):
        self.depth += 1
        if self.depth > MAX_DEPTH:
            raise self.error(f"nesting deeper than {MAX_DEPTH}", opening)
        try:
            return method()
        finally:
            self.depth -= 1

    def sum(self) -> _Rational:
        value = self.term()
        while (op := self.accept("+", "-")) is not None:
            right = self.term()
            if op.text == "-":
                right = _mul(right, _Rational(const=-1.0), self.text, op.pos)
            value = _add(value, right, self.text, op.pos)
        return value

    def term(self) -> _Rational:
        value = self.unary()
        while (op := self.accept("*", "/")) is not None:
            right = self.unary()
            if op.text == "/":
                right = _reciprocal(right, self.text, op.pos)
            value = _mul(value, right, self.text, op.pos)
        return value

    def unary(self) -> _Rational:
        op = self.accept("+", "-")
        if op is None:
            return self.product()
        value = self.nested(self.unary, op)
        if op.text == "-":
            value = _mul(value, _Rational(const=-1.0), self.text, op.pos)
        return value

    def product(self) -> _Rational:
        value = self.power()
        while self.token.kind == "name" or self.token.text == "(" or self.token.kind == "num":
            if self.token.kind == "num":
                raise self.error("number after a factor (write '*' between them)")
            pos = self.token.pos
            value = _mul(value, self.power(), self.text, pos)
        return value

    def power(self) -> _Rational:
        base = self.primary()
        op = self.accept("^", "**")
        if op is None:
            return base
        token = self.token
        if token.kind != "num" or not token.text.isdigit():
            raise self.unexpected("a non-negative integer literal as exponent")
        if int(token.text) > MAX_EXPONENT:
            raise self.error(f"exponent above {MAX_EXPONENT}")
        self.index += 1
        if self.token.text in ("^", "**"):
            raise self.error("chained exponent (use parentheses)")
        return _power(base, int(token.text), self.text, op.pos)

    def primary(self) -> _Rational:
        token = self.token
        if token.kind == "num":
            self.index += 1
            return _Rational(const=token.value)
        if token.kind == "name":
            self.index += 1
            return _Rational(num=((1.0, 0.0),)) if token.text == "s" else _Rational(const=math.pi)
        if self.accept("(") is not None:
            value = self.nested(self.sum, token)
            if self.accept(")") is None:
                if self.token.kind == "end":
                    raise self.error("unbalanced '('", token)
                raise self.unexpected("')'")
            return value
        raise self.unexpected("a number, s, pi or '('")


# ------------------------------------------------------------- public API


def _parse(text: str) -> _Rational:
    text = _check_text(text)
    with np.errstate(all="ignore"):
        return _Parser(text).parse()


def parse_rational(text: str) -> tuple[list[np.ndarray], list[np.ndarray], float]:
    """Parse a rational expression in ``s`` into polynomial factors.

    Parameters
    ----------
    text : str
        For example ``"(1 + s*318u) / ((1 + s*3180u)(1 + s*75u))"``,
        ``"1/s"``, ``"(s+1)**2/(s+2)"`` or ``"1e3/(s + 2*pi*50)"``.

    Returns
    -------
    numerator_factors, denominator_factors : list of ndarray
        Real polynomials in ``s`` of degree >= 1, highest power first, each
        as written (a sum of non-constant terms is one expanded factor).
    constant : float
        The product of all constant factors; the expression equals
        ``constant * prod(polyval(n, s)) / prod(polyval(d, s))``.

    Raises
    ------
    ExpressionError
        For any text that is not a valid expression, with the position of
        the offending character.

    Examples
    --------
    >>> num, den, k = parse_rational("2(1 + s)/s")
    >>> num, den, k
    ([array([1., 1.])], [array([1., 0.])], 2.0)
    """
    value = _parse(text)
    return (
        [np.array(f, dtype=float) for f in value.num],
        [np.array(f, dtype=float) for f in value.den],
        value.const,
    )


def _clean_roots(roots: np.ndarray) -> np.ndarray:
    """Make near-real roots real and pair the others as exact conjugates.

    An imaginary part below ``8·sqrt(eps)·|root|`` is at the rounding level of
    a double root of the coefficients, so it is set to zero.
    """
    roots = np.where(np.abs(roots.imag) <= _REAL_TOL * np.abs(roots), roots.real + 0j, roots) + 0.0
    upper = list(roots[roots.imag > 0])
    lower = list(roots[roots.imag < 0])
    paired = []
    for root in upper:
        if not lower:
            break
        nearest = int(np.argmin(np.abs(np.conj(lower) - root)))
        mate = np.conj(lower.pop(nearest))
        center = complex((root.real + mate.real) / 2, (root.imag + mate.imag) / 2)
        paired += [center, center.conjugate()]
    unpaired = list(roots[roots.imag == 0]) + upper[len(paired) // 2 :] + lower
    return np.sort_complex(np.array(paired + unpaired, dtype=complex))


def _factor_roots(factor: np.ndarray, text: str) -> np.ndarray:
    """Roots of one real polynomial factor (degree >= 1)."""
    if len(factor) == 2:
        roots = np.array([-factor[1] / factor[0]], dtype=complex)
    else:
        scaled = factor[1:] / factor[0]
        if not np.all(np.isfinite(scaled)):
            raise ExpressionError(f"roots out of floating-point range in {text!r}")
        try:
            roots = np.roots(factor).astype(complex)
        except np.linalg.LinAlgError as exc:
            raise ExpressionError(f"roots could not be computed for {text!r}") from exc
    if not np.all(np.isfinite(roots)):
        raise ExpressionError(f"roots out of floating-point range in {text!r}")
    return _clean_roots(roots)


def parse_zpk(text: str) -> tuple[np.ndarray, np.ndarray, float]:
    """Parse a rational expression in ``s`` into zeros, poles and gain.

    Parameters
    ----------
    text : str
        An expression as accepted by :func:`parse_rational`.

    Returns
    -------
    zeros, poles : ndarray of complex
        In rad/s; roots are computed per factor, so factored input gives
        exact roots.  Near-real roots have an imaginary part of exactly zero
        and complex roots come in exactly conjugate pairs.
    k : float
        Gain such that ``H(s) = k * prod(s - zeros) / prod(s - poles)``.

    Raises
    ------
    ExpressionError
        For invalid text, or when roots or gain leave the floating-point range.

    Examples
    --------
    >>> z, p, k = parse_zpk("(1 + s*318u) / ((1 + s*3180u)(1 + s*75u))")
    >>> bool(np.isclose(z[0].real, -1 / 318e-6))
    True
    """
    value = _parse(text)
    with np.errstate(all="ignore"):
        zeros = [_factor_roots(np.array(f), text) for f in value.num]
        poles = [_factor_roots(np.array(f), text) for f in value.den]
        k = value.const
        for factor in value.num:
            k *= factor[0]
        for factor in value.den:
            k /= factor[0]
    if not math.isfinite(k) or (k == 0.0) != (value.const == 0.0):
        raise ExpressionError(f"gain out of floating-point range in {text!r}")
    return (
        np.concatenate([np.empty(0, complex), *zeros]),
        np.concatenate([np.empty(0, complex), *poles]),
        float(k),
    )
