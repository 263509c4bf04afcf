"""The built-in playback curves, as data, each with its published source.

Tape curves are replay-amplifier responses for an ideal (velocity-sensitive)
head: H(s) ∝ (1 + s·T2)/(1 + s·T1), or (1 + s·T2)/s where the standard sets no
low-frequency time constant (T1 = ∞).  A transfer taken from a raw head gets
the whole curve; a transfer made through a machine set to the wrong standard
gets the ratio ``needed / used`` (see :func:`dspeq.curve`).

Disc curves are playback responses for a velocity-sensitive (magnetic) pickup:
zero at the turnover, pole at the low-frequency shelf (or at s = 0 when there
is none) and a pole for the high-frequency roll-off.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

from ._errors import CurveError
from .curves import DEFAULT_REFERENCE_HZ, Curve, rolloff_db_to_tc

__all__ = ["CatalogEntry", "CATALOG", "catalog_curve", "catalog_names", "disc_curve",
           "tape_curve", "suggest"]

_IASA_TAPE = "IASA TC-04 §5.4.10 Table 1 (magnetic tape replay equalisation)"
_NAB = _IASA_TAPE + "; NAB 1965"
_IEC = _IASA_TAPE + "; IEC 60094"
_IASA_DISC = "IASA TC-04 §5.3.6 Table 1 (equalisation curves by name)"
_RIAA = "RIAA 1954; IEC 60098 (RIAA playback time constants 3180/318/75 µs)"


@dataclass(frozen=True)
class CatalogEntry:
    """One named curve: its time constants (µs), kind, source and description."""

    name: str
    kind: str                      # "disc" or "tape"
    zeros_us: tuple[float | None, ...]
    poles_us: tuple[float | None, ...]
    source: str
    description: str
    aliases: tuple[str, ...] = field(default=())

    def curve(self, reference_hz: float = DEFAULT_REFERENCE_HZ) -> Curve:
        """The normalized :class:`Curve` of this entry."""
        return Curve.from_time_constants(self.zeros_us, self.poles_us, reference_hz=reference_hz,
                                         name=self.name, source=self.source, kind=self.kind,
                                         description=self.description)


def tape_curve(name: str, hf_us: float, lf_us: float | None, source: str, description: str,
               aliases: tuple[str, ...] = ()) -> CatalogEntry:
    """Tape replay curve (1 + s·T_hf)/(1 + s·T_lf), ``lf_us=None`` for T_lf = ∞."""
    return CatalogEntry(name, "tape", (hf_us,), (lf_us,), source, description, aliases)


def disc_curve(turnover_hz: float, rolloff_db: float, lf_shelf_hz: float | None = None,
               name: str | None = None, source: str = "parametric", description: str = "",
               aliases: tuple[str, ...] = ()) -> CatalogEntry:
    """Disc playback curve from turnover (Hz), roll-off at 10 kHz (dB) and LF shelf (Hz).

    Zero at the turnover (τ = 1/(2π·f)); pole at the LF shelf (or at s = 0 when
    ``lf_shelf_hz`` is None: constant-amplitude recording all the way down);
    HF pole from the roll-off converted exactly
    (τ = √(10^(X/10) − 1)/(2π·10 kHz)); no HF pole for 0 dB.
    """
    for label, val in (("turnover", turnover_hz), ("LF shelf", lf_shelf_hz)):
        if val is not None and not (val > 0 and math.isfinite(val)):
            raise CurveError(f"{label} frequency must be a positive number of Hz, got {val!r}")
    tau_t = 1e6 / (2 * math.pi * turnover_hz)
    poles: list[float | None] = [None if lf_shelf_hz is None else 1e6 / (2 * math.pi * lf_shelf_hz)]
    hf = rolloff_db_to_tc(rolloff_db)
    if hf is not None:
        poles.append(hf)
    if name is None:
        name = f"disc-{turnover_hz:g}-{abs(rolloff_db):g}"
        if lf_shelf_hz is not None:
            name += f"-lf{lf_shelf_hz:g}"
    text = (f"turnover {turnover_hz:g} Hz, roll-off -{abs(rolloff_db):g} dB at 10 kHz, "
            + (f"LF shelf {lf_shelf_hz:g} Hz" if lf_shelf_hz else "no LF shelf"))
    desc = f"{text}. {description}".strip()
    return CatalogEntry(name, "disc", (tau_t,), tuple(poles), source, desc, aliases)


def _entries() -> list[CatalogEntry]:
    e: list[CatalogEntry] = [
        CatalogEntry("riaa", "disc", (318.0,), (3180.0, 75.0), _RIAA,
                     "RIAA / IEC 60098 playback (discs from about 1955 on)."),
        CatalogEntry("riaa-iec", "disc", (318.0, None), (3180.0, 75.0, 7950.0),
                     _RIAA + "; IEC 60098 amendment (7950 µs playback low-cut)",
                     "RIAA playback with the IEC low-frequency roll-off sT/(1+sT), T = 7950 µs."),
        CatalogEntry("riaa-3.18us", "disc", (318.0, 3.18), (3180.0, 75.0),
                     _RIAA + "; extra 3.18 µs zero proposed in the literature and disputed "
                     "(K. Howard, Stereophile 2009)",
                     "RIAA playback plus a zero at 3.18 µs undoing an assumed cutting-amplifier pole. "
                     "Disputed: not part of any standard; use only with evidence."),
    ]
    # IASA TC-04 §5.3.6 Table 1, named by parameters; historical names in the description.
    iasa = [(400, 12, 50, "AES curve"), (250, 5, 40, "FFRR 1949"), (300, 14, None, "FFRR 1951"),
            (450, 11, 100, "FFRR 1953"), (500, 16, 100, "LP / Columbia"), (500, 16, None, "NAB disc"),
            (500, 11, 50, "Orthophonic (RCA)"), (629, 0, None, "'629' curve")]
    for turnover, rolloff, shelf, hist in iasa:
        e.append(disc_curve(turnover, rolloff, shelf, source=_IASA_DISC,
                            description=f"Listed in the table as {hist}."))
    # Tape: time constants per IASA TC-04 §5.4.10 Table 1 (via REFERENCES), NAB 1965, IEC 60094.
    e += [
        tape_curve("iec-30ips", 17.5, None, _IEC, "AES / IEC2 (1981), 30 ips (76 cm/s).",
                   ("aes-30ips",)),
        tape_curve("ccir-30ips", 35.0, None, _IEC, "CCIR / IEC1, 30 ips (76 cm/s)."),
        tape_curve("iec-15ips", 35.0, None, _IEC, "IEC1 / CCIR / DIN, 15 ips (38 cm/s).",
                   ("ccir-15ips",)),
        tape_curve("nab-15ips", 50.0, 3180.0, _NAB, "NAB, 15 ips (38 cm/s)."),
        tape_curve("iec-7.5ips", 70.0, None, _IEC, "IEC1 / CCIR, 7½ ips (19 cm/s).",
                   ("ccir-7.5ips",)),
        tape_curve("nab-7.5ips", 50.0, 3180.0, _NAB, "NAB / IEC2, 7½ ips (19 cm/s).",
                   ("iec2-7.5ips",)),
        tape_curve("ccir1950-7.5ips", 100.0, None, _IASA_TAPE, "Older CCIR, 7½ ips (19 cm/s)."),
        tape_curve("nab-3.75ips", 90.0, 3180.0, _NAB, "NAB / IEC2, 3¾ ips (9.5 cm/s).",
                   ("iec-3.75ips",)),
        tape_curve("din1962-3.75ips", 120.0, 3180.0, _IASA_TAPE, "DIN 1962, 3¾ ips (9.5 cm/s)."),
        tape_curve("iec1962-3.75ips", 140.0, 3180.0, _IEC, "IEC 1962-68, 3¾ ips (9.5 cm/s)."),
        tape_curve("nab-1.875ips", 120.0, 3180.0, "from memory (common practice: 1⅞ ips open reel "
                   "shares the 3180/120 µs cassette Type I values)", "NAB / IEC, 1⅞ ips (4.75 cm/s).",
                   ("iec-1.875ips",)),
        tape_curve("cassette-120us", 120.0, 3180.0, "IEC 60094-1:1981 (cassette Type I); "
                   "IASA TC-04 §5.4.10 Table 1", "Compact cassette, Type I (ferric), 1⅞ ips."),
        tape_curve("cassette-70us", 70.0, 3180.0, "IEC 60094-1:1981 (cassette Type II/IV); "
                   "IASA TC-04 §5.4.10 Table 1", "Compact cassette, Type II (chrome) and IV (metal)."),
    ]
    return e


CATALOG: dict[str, CatalogEntry] = {entry.name: entry for entry in _entries()}
_ALIASES: dict[str, str] = {a: entry.name for entry in CATALOG.values() for a in entry.aliases}


def catalog_names() -> list[str]:
    """Names of all catalog curves, in catalog order."""
    return list(CATALOG)


def suggest(name: str, n: int = 3) -> list[str]:
    """Closest catalog names to a misspelled ``name``."""
    import difflib

    return difflib.get_close_matches(name.lower(), list(CATALOG) + list(_ALIASES), n=n, cutoff=0.4)


def catalog_curve(name: str, reference_hz: float = DEFAULT_REFERENCE_HZ) -> Curve:
    """The catalog curve called ``name`` (case-insensitive; aliases accepted).

    Raises
    ------
    CurveError
        For an unknown name, with the closest names suggested.
    """
    key = name.strip().lower()
    key = _ALIASES.get(key, key)
    if key not in CATALOG:
        hint = suggest(key)
        more = f" (did you mean {', '.join(hint)}?)" if hint else ""
        raise CurveError(f"unknown curve {name!r}{more}; `dspeq curves` lists them")
    return CATALOG[key].curve(reference_hz)
