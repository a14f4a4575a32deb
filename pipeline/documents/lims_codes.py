"""The codes of the LIMS results files: dispositions, hold categories, verdicts and units (pure).

Documented for the plant's LIMS in docs/lims-results-layout.md; the codes are lotgate's own,
short, ASCII and stable across versions of the layout (a code is never reused for another
meaning). Units are written as UCUM codes (The Unified Code for Units of Measure, Regenstrief
Institute) where UCUM has one, else as the specification's own wording made ASCII, and a
column says which.
"""

from __future__ import annotations

import unicodedata
from collections.abc import Iterable

from pipeline.vocabulary import Disposition, HoldCategory

# A lot's disposition as one code. A held lot's code names its first hold category in reading order
# (pipeline.vocabulary.HoldCategory); every category of the hold is listed in its own column.
DISPOSITION_CODES: dict[Disposition, str] = {
    Disposition.RELEASED: "REL",
    Disposition.READY_FOR_RELEASE: "RFR",
    Disposition.PENDING: "PEN",
    Disposition.REJECTED: "REJ",
}
HOLD_CODES: dict[HoldCategory, str] = {
    HoldCategory.OUT_OF_SPECIFICATION: "OOS",
    HoldCategory.INVALID_ASSAY: "INV",
    HoldCategory.UNDECIDED_RESULT: "UND",
    HoldCategory.INCOMPLETE: "INC",
    HoldCategory.OUT_OF_TREND: "OOT",
    HoldCategory.REVIEW_REQUIRED: "REV",
    HoldCategory.OVERDUE: "OVD",
}
HELD_PREFIX = "HLD-"
HELD_UNSPECIFIED = "HLD-UNS"  # a hold recorded without a category lotgate knows (never expected)

# The units of the shipped specifications and of lotgate's results → UCUM codes. "1/(M·s)" is
# written L/mol/s: UCUM has no symbol for molar ("M" is the prefix mega), and mM is mmol/L.
UCUM_CODES: dict[str, str] = {
    "U/mL": "U/mL", "U/mg": "U/mg", "U/g": "U/g", "mg/mL": "mg/mL", "mg/kg": "mg/kg", "g/L": "g/L",
    "mM": "mmol/L", "M": "mol/L", "µM": "umol/L", "1/s": "/s", "/s": "/s", "1/(M·s)": "L/mol/s",
    "/M/s": "L/mol/s", "%": "%", "": "[pH]", "pH": "[pH]", "CFU/g": "{CFU}/g", "CFU/mL": "{CFU}/mL",
    "°C": "Cel", "nm": "nm", "min": "min", "h": "h", "d": "d",
}
UCUM, LOCAL = "UCUM", "local"
_ASCII_FOR = {"µ": "u", "μ": "u", "·": ".", "°": "deg", "–": "-", "—": "-", "≤": "<=", "≥": ">=", "×": "x"}


def ascii_text(text: str) -> str:
    """``text`` in printable ASCII: the usual letters spelled out, accents dropped, anything else '?'."""
    spelled = "".join(_ASCII_FOR.get(ch, ch) for ch in text)
    folded = unicodedata.normalize("NFKD", spelled).encode("ascii", "ignore").decode("ascii")
    return "".join(ch if 32 <= ord(ch) < 127 else "?" for ch in folded)


def unit_code(unit: str, attribute: str = "") -> tuple[str, str]:
    """(code, system) of a result's unit: the UCUM code where one exists, else the unit as ASCII text.

    A unitless result is pH ([pH]) only for the attribute ``ph``; any other unitless result has
    UCUM's unity "1".
    """
    if unit == "" and attribute not in ("ph", "pH"):
        return "1", UCUM
    code = UCUM_CODES.get(unit)
    return (code, UCUM) if code is not None else (ascii_text(unit), LOCAL)


def hold_codes(categories: Iterable[str]) -> list[str]:
    """The codes of a hold's categories, in reading order (unknown words are dropped, see HELD_UNSPECIFIED)."""
    return [HOLD_CODES[c] for c in HoldCategory.in_reading_order(categories)]


def disposition_code(disposition: str, categories: Iterable[str]) -> str:
    """REL, RFR, PEN, REJ, or HLD- and the first hold category's code (e.g. HLD-OOS)."""
    if disposition == Disposition.HELD:
        codes = hold_codes(categories)
        return HELD_PREFIX + codes[0] if codes else HELD_UNSPECIFIED
    return DISPOSITION_CODES[Disposition(disposition)]
