"""Results as entered and as reported: reading a LIMS result, rounding, showing a number (pure).

* A LIMS result is read exactly as entered (``EnteredResult``): a plain number (also in E
  notation, ``6.0E0``), a number qualified ``<`` or ``>``, or one of the words ``absent``,
  ``present``, ``not detected``, ``too numerous to count`` (``TNTC``). The number is kept as a
  ``Decimal`` of the digits typed, never through binary floating point.
* Rounding to the reported digits is done on that exact decimal, halves away from zero (the
  default) or halves to the even digit (ASTM E29, "Using Significant Digits in Test Data to
  Determine Conformance with Specifications", rounding method, from memory), as the
  specification says (``rounding``). The compendial convention — round the result to the digits
  of the limit, then compare — is USP General Notices 7.20 "Rounding Rules" (from memory), which
  rounds halves up; the half-even option is for plants whose procedures follow ASTM E29.
* A ``scientific`` attribute is shown and compared to ``SCIENTIFIC_FIGURES`` significant figures.
* Zero is never shown with a sign ("−0.0" is "0.0").
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from decimal import ROUND_HALF_EVEN, ROUND_HALF_UP, Context, Decimal, localcontext

from pipeline.controlled.limit_precision import SCIENTIFIC_FIGURES
from pipeline.vocabulary import ResultQualifier, Rounding

WORDS = ("absent", "present")  # qualitative results matched against a specification's ``expect``
_NUMBER = r"[+-]?(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?"
_ENTERED = re.compile(rf"(?P<q>[<>])?\s*(?P<n>{_NUMBER})")
_WORD_QUALIFIERS = {"not detected": ResultQualifier.NOT_DETECTED, "nd": ResultQualifier.NOT_DETECTED,
                    "too numerous to count": ResultQualifier.TOO_NUMEROUS, "tntc": ResultQualifier.TOO_NUMEROUS}
_MODES = {Rounding.HALF_UP: ROUND_HALF_UP, Rounding.HALF_EVEN: ROUND_HALF_EVEN}
MAX_EXPONENT = 100  # an entered number beyond 10^±100 is no laboratory result: refused, not rounded
_EXACT = Context(prec=1000)  # enough digits for any float (≤ 1.8e308) rounded to its reported digits, exactly
# The form a LIMS result cell must have (schemas/lims-results.yaml says the same in its pattern).
RESULT_PATTERN = (r"^(?:[<>] ?)?[+-]?(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?$"
                  r"|^(?i:absent|present|not detected|nd|too numerous to count|tntc)$")


@dataclass(frozen=True)
class EnteredResult:
    """A LIMS result as entered: its text, its qualifier, its exact number or its word."""

    text: str  # as entered, surrounding spaces removed
    number: Decimal | None  # the number typed (the bound of a '<' or '>' result)
    qualifier: ResultQualifier | None = None
    word: str | None = None  # 'absent' or 'present'

    @property
    def shown(self) -> str:
        """As entered, with one space after a '<' or '>': '<0.54' → '< 0.54' (never re-rounded)."""
        if self.qualifier in (ResultQualifier.LESS_THAN, ResultQualifier.GREATER_THAN):
            return f"{self.qualifier} {self.text[1:].strip()}"
        return self.text


def read_entered(text: str) -> EnteredResult:
    """Read one LIMS result cell; ValueError (with the text) when it is none of the allowed forms."""
    cleaned = text.strip()
    lowered = " ".join(cleaned.lower().split())
    if lowered in WORDS:
        return EnteredResult(cleaned, None, None, lowered)
    if lowered in _WORD_QUALIFIERS:
        return EnteredResult(cleaned, None, _WORD_QUALIFIERS[lowered])
    match = _ENTERED.fullmatch(cleaned)
    if match is None:
        raise ValueError(f"'{cleaned}' is not a LIMS result: a number (optionally after '<' or '>'), or absent, "
                         "present, not detected, too numerous to count")
    number = Decimal(match["n"])
    if not number.is_finite():
        raise ValueError(f"'{cleaned}' is not a finite number")
    if number != 0 and abs(number.adjusted()) > MAX_EXPONENT:
        raise ValueError(f"'{cleaned}' is outside the range of a laboratory result (10^-{MAX_EXPONENT} to "
                         f"10^{MAX_EXPONENT})")
    return EnteredResult(cleaned, number, ResultQualifier(match["q"]) if match["q"] else None)


def exact(value: float | Decimal) -> Decimal:
    """A float as the shortest decimal that reads back as it (``repr``), so 2.45 stays 2.45."""
    if isinstance(value, Decimal):
        if not value.is_finite():
            raise ValueError(f"cannot round a non-finite value {value!r}")
        return value
    if not math.isfinite(value):
        raise ValueError(f"cannot round a non-finite value {value!r}")
    return Decimal(repr(float(value)))


def _quantum(value: Decimal, digits: int, scientific: bool) -> Decimal:
    """The step results are rounded to: 10^−digits, or the third significant figure's place."""
    if scientific:
        if value == 0:
            return Decimal(1).scaleb(-(SCIENTIFIC_FIGURES - 1))
        return Decimal(1).scaleb(value.adjusted() - (SCIENTIFIC_FIGURES - 1))
    return Decimal(1).scaleb(-digits)


def round_reported(value: float | Decimal, digits: int, rounding: Rounding = Rounding.HALF_UP,
                   scientific: bool = False) -> Decimal:
    """Round to ``digits`` decimals (or to 3 significant figures) with the specification's rule.

    half-up: 2.45 → 2.5, −2.45 → −2.5; half-even (ASTM E29): 2.45 → 2.4, 2.55 → 2.6.
    A zero result loses its sign: −0.04 → 0.0.
    """
    d = exact(value)
    with localcontext(_EXACT):
        rounded = d.quantize(_quantum(d, digits, scientific), rounding=_MODES[Rounding(rounding)])
        if scientific and rounded != 0 and rounded.adjusted() > d.adjusted():  # 9.995 → 10.0: one figure too many
            rounded = rounded.quantize(_quantum(rounded, digits, scientific), rounding=_MODES[Rounding(rounding)])
    return rounded.copy_abs() if rounded == 0 else rounded


def round_half_up(value: float, digits: int) -> Decimal:
    """Round to ``digits`` decimals, halves away from zero: 2.45 → 2.5, −2.45 → −2.5."""
    return round_reported(value, digits, Rounding.HALF_UP)


def show_rounded(rounded: Decimal, scientific: bool = False) -> str:
    """The text of a rounded result: '7.0', '150', '0.0' (never '-0.0'); scientific: '123', '1.23e+04'."""
    if scientific:
        number = float(rounded)  # already at 3 significant figures: formatting adds no second rounding
        text = f"{number:.3g}" if abs(number) < 1e4 else f"{number:.2e}"
        return text[1:] if text.startswith("-") and float(text) == 0 else text
    return f"{rounded.copy_abs() if rounded == 0 else rounded:f}"


def sup_below(bound: Decimal, digits: int, rounding: Rounding, scientific: bool) -> Decimal:
    """The largest rounded value that a true value below ``bound`` can have: the rounding of bound − ε.

    ε is far below both the bound's own last digit and the rounding step, so bound − ε lies in the
    rounding interval just under the bound: '< 5.05' (one decimal, half-up) → 5.0; '< 5.06' → 5.1.
    """
    with localcontext(_EXACT):
        below = bound - _epsilon(bound, digits, scientific)
    return round_reported(below, digits, rounding, scientific)


def inf_above(bound: Decimal, digits: int, rounding: Rounding, scientific: bool) -> Decimal:
    """The smallest rounded value that a true value above ``bound`` can have: the rounding of bound + ε."""
    with localcontext(_EXACT):
        above = bound + _epsilon(bound, digits, scientific)
    return round_reported(above, digits, rounding, scientific)


def _epsilon(bound: Decimal, digits: int, scientific: bool) -> Decimal:
    exponent = bound.as_tuple().exponent
    assert isinstance(exponent, int)
    step = _quantum(bound, digits, scientific).as_tuple().exponent
    assert isinstance(step, int)
    return Decimal(1).scaleb(min(exponent, step) - 6)
