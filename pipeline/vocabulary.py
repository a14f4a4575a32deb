"""The words lotgate decides with: dispositions, hold categories, verdicts, trend status, Nelson
rules and the reasons an export is rejected.

Each is an enum that code compares. The string enums' values are the words stored and printed
(a member is a ``str``, so stored JSON and text read exactly as before); text for a person is
made from a member only where a person reads it.
"""

from __future__ import annotations

from collections.abc import Iterable
from enum import IntEnum, StrEnum


class Disposition(StrEnum):
    """What became of a lot."""

    RELEASED = "released"
    READY_FOR_RELEASE = "ready for release"  # every criterion met; awaits an authorised person
    PENDING = "pending"  # required results still due, none of them overdue
    HELD = "held"
    REJECTED = "rejected"  # by an authorised person


class HoldCategory(StrEnum):
    """Why a lot is held. Members are declared in the order a reviewer should read them."""

    OUT_OF_SPECIFICATION = "out of specification"
    INVALID_ASSAY = "invalid assay"
    UNDECIDED_RESULT = "undecided result"  # a qualified result ('< 50') that cannot be judged against its limit
    INCOMPLETE = "incomplete"
    OUT_OF_TREND = "out of trend"
    REVIEW_REQUIRED = "review required"  # an earlier hold or a person's decision stands
    OVERDUE = "overdue"  # a required result is past its expected turnaround

    @classmethod
    def in_reading_order(cls, found: Iterable[str]) -> tuple[HoldCategory, ...]:
        """The known categories among ``found``, each once, in reading order."""
        present = set(found)
        return tuple(category for category in cls if category in present)


class ReleaseMode(StrEnum):
    """How a lot meeting every criterion becomes released (per product, with a plant default)."""

    APPROVAL = "approval"  # ready for release, then an authorised person approves
    AUTOMATIC = "automatic"  # release by exception, where the plant's procedure allows it


class SignerRole(StrEnum):
    """What a person in the register of authorised signers may sign."""

    RELEASE_APPROVAL = "release approval"
    REJECTION = "rejection"
    RESULT_INVALIDATION = "result invalidation"
    REBASELINE = "re-baseline"
    SPECIFICATION_APPROVAL = "specification approval"


class ResultStatus(StrEnum):
    """The standing of one result in a lot's record."""

    VALID = "valid"
    INVALID = "invalid"  # the assay failed system suitability (the reason is recorded)
    SUPERSEDED = "superseded"  # an invalid result replaced by the next valid one of the same test
    INVALIDATED = "invalidated"  # by an authorised person, with the investigation reference


class InvestigationOutcome(StrEnum):
    """The signed outcome of an out-of-specification investigation."""

    RESULT_INVALIDATED = "assignable laboratory cause: result invalidated"
    CONFIRMED_OOS = "confirmed OOS"


class ReleaseBar(StrEnum):
    """Why a person may not release a lot's current revision (``pipeline.release.release_bars``)."""

    OPEN_OOS = "out of specification, no investigation outcome"
    CONFIRMED_OOS = "out of specification, confirmed by its investigation"
    INVALIDATED = "out-of-specification result invalidated, retest not yet decided"
    UNDECIDED = "undecided result"  # a qualified result that does not show the limit is met
    NO_VALID_RESULT = "no valid result"  # missing or invalid


class Verdict(StrEnum):
    """The verdict on one attribute of one lot."""

    PASS = "pass"
    FAIL = "fail"
    INVALID = "invalid"
    MISSING = "missing"
    REPORTED = "reported"  # reported without a limit
    UNDECIDED = "undecided"  # a qualified result whose meaning neither meets nor proves it fails the limit


class TrendStatus(StrEnum):
    """What the control chart said about one attribute of one lot."""

    IN_TREND = "in trend"
    OUT_OF_TREND = "out of trend"
    NOT_YET_ESTABLISHED = "not yet established"  # fewer released lots than the baseline needs
    NOT_EVALUATED = "not evaluated"  # no valid value to chart


class NelsonRule(IntEnum):
    """The eight Nelson run rules, by number (Nelson, J. Quality Technology 16(4), 1984)."""

    ONE_BEYOND_3_SIGMA = 1
    NINE_ON_ONE_SIDE = 2
    SIX_RISING_OR_FALLING = 3
    FOURTEEN_ALTERNATING = 4
    TWO_OF_THREE_BEYOND_2_SIGMA = 5
    FOUR_OF_FIVE_BEYOND_1_SIGMA = 6
    FIFTEEN_WITHIN_1_SIGMA = 7
    EIGHT_BEYOND_1_SIGMA = 8


class ProblemCode(StrEnum):
    """Every reason an export can be rejected for (``Problem.code``); the values are stable."""

    # the file as a whole
    FILE_NAME = "file-name"
    UNKNOWN_KIND = "unknown-kind"
    EXTENSION = "extension"
    TOO_LARGE = "too-large"
    BINARY = "binary"
    ENCODING = "encoding"
    LINE_ENDS = "line-ends"
    EMPTY = "empty"
    LINE_TOO_LONG = "line-too-long"
    DELIMITER = "delimiter"
    CSV = "csv"
    EMBEDDED_NEWLINE = "embedded-newline"
    CONTROL_CHARACTER = "control-character"
    MISSING_COLUMN = "missing-column"
    EXTRA_COLUMN = "extra-column"
    DUPLICATE_COLUMN = "duplicate-column"
    LAYOUT = "layout"
    FIELD_COUNT = "field-count"
    NO_FINAL_LINE_END = "no-final-line-end"
    NO_ROWS = "no-rows"
    TOO_MANY_ROWS = "too-many-rows"
    # every cell
    NOT_A_NUMBER = "not-a-number"
    DATE = "date"
    PATTERN = "pattern"
    NOT_ALLOWED = "not-allowed"
    OUT_OF_RANGE = "out-of-range"
    LENGTH = "length"
    MISSING_VALUE = "missing-value"
    DUPLICATE_VALUE = "duplicate-value"
    DUPLICATE_WELL = "duplicate-well"
    REPEATED_TIME = "repeated-time"
    DUPLICATE_TEST = "duplicate-test"
    DUPLICATE_KEY = "duplicate-key"
    VALUE = "value"
    # rows against each other
    WELL_OUTSIDE_PLATE = "well-outside-plate"
    ROLE_FIELDS = "role-fields"
    PLATE_INCONSISTENT = "plate-inconsistent"
    TIME_ORDER = "time-order"
    TOO_MANY_READS = "too-many-reads"  # a well with more reads than its layout's cap
    DATE_ORDER = "date-order"
    # a file against the controlled documents
    PLATE_FORMAT = "plate-format"  # a read of a plate format its method does not declare
    FUTURE_DATE = "future-date"  # a manufacturing, assay or test date after today
    CHANGED_WHILE_READ = "changed-while-read"  # the file's bytes changed between its reading and its archiving
    # the report itself, and lotgate's own defects
    MORE = "more"  # further problems of the kinds listed are not listed
    INTERNAL_ERROR = "internal-error"  # a defect of lotgate, never of the file


# --- how results are rounded and qualified (verdicts) -------------------------------------------
class Rounding(StrEnum):
    """How a specification rounds a result to its reported digits before comparing it."""

    HALF_UP = "half-up"  # halves away from zero (the default)
    HALF_EVEN = "half-even"  # halves to the even digit (ASTM E29)


class ReplicateScatter(StrEnum):
    """Whose scatter gives a protein result's replicate SE (a protein method's setting)."""

    POOLED_PER_PLATE = "pooled-per-plate"  # the plate's lots pooled (ISO 5725-2 repeatability)
    PER_LOT = "per-lot"  # each lot's own replicates only (n − 1 dof)


class ResultQualifier(StrEnum):
    """What a LIMS result says besides (or instead of) a plain number."""

    LESS_THAN = "<"  # the true value is below the number given
    GREATER_THAN = ">"  # the true value is above the number given
    NOT_DETECTED = "not detected"  # below the method's detection limit; no number
    TOO_NUMEROUS = "too numerous to count"  # a count above the countable range; no number
class SpecificationDate(StrEnum):
    """Which of a lot's dates chooses the specification version in force (a plant setting)."""

    ASSAY = "assay"  # the version in force on the day the lot was assayed (the default)
    MANUFACTURE = "manufacture"  # the version in force on the day the lot was made
