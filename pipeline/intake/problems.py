"""What is wrong with an export: one ``Problem`` per finding, ``ExportRejected`` for the file.

Every problem is stated as file, line, column and what was expected, in the analyst's words,
with a stable ``ProblemCode`` that code compares (the text is for the analyst only).
"""

from __future__ import annotations

import unicodedata
from collections import defaultdict
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from pipeline.errors import InputError
from pipeline.vocabulary import ProblemCode

MAX_PROBLEMS_LISTED = 20
MAX_PER_KIND = 50  # problems of one code kept per file (a broken file is not listed row by row)


@dataclass(frozen=True)
class Problem:
    """One thing wrong with an export. ``line`` is the file's line number (header = 1)."""

    code: ProblemCode
    message: str
    line: int | None = None
    column: str | None = None

    def __str__(self) -> str:
        where = []
        if self.line is not None:
            where.append(f"line {self.line}")
        if self.column is not None:
            where.append(f"column '{self.column}'")
        return f"{', '.join(where)}: {self.message}" if where else self.message


class ExportRejected(InputError):
    """The export cannot be used; ``problems`` lists every reason found."""

    def __init__(self, file_name: str, problems: list[Problem]):
        self.file_name = file_name
        self.problems = tuple(problems)
        shown = "; ".join(str(p) for p in problems[:MAX_PROBLEMS_LISTED])
        more = len(problems) - MAX_PROBLEMS_LISTED
        tail = f"; and {more} more" if more > 0 else ""
        super().__init__(f"{printable(file_name, 200)}: {shown}{tail}")

    def __reduce__(self) -> tuple[Any, ...]:
        # Verdicts come back from worker processes by pickling (the default would call __init__ with the message).
        return (ExportRejected, (self.file_name, list(self.problems)))

    @property
    def codes(self) -> frozenset[ProblemCode]:
        return frozenset(p.code for p in self.problems)

    def report(self) -> str:
        lines = [f"File {printable(self.file_name, 200)} was set aside (quarantined) and not used.", ""]
        lines += [f"- {p}" for p in self.problems[:MAX_PROBLEMS_LISTED * 10]]
        more = len(self.problems) - MAX_PROBLEMS_LISTED * 10
        if more > 0:
            lines.append(f"- and {more} more")
        return "\n".join(lines) + "\n"


def printable(text: str, limit: int = 40) -> str:
    """``text`` with every unprintable character shown as '?', cut to ``limit`` characters."""
    cleaned = "".join(ch if ch.isprintable() else "?" for ch in text)
    return cleaned if len(cleaned) <= limit else cleaned[: limit - 1] + "…"


def hidden_character(text: str) -> str | None:
    """The first control or invisible formatting character in ``text`` (tab included), or None."""
    for ch in text:
        category = unicodedata.category(ch)
        if category in ("Cc", "Cf", "Zl", "Zp", "Cs", "Co"):
            name = unicodedata.name(ch, "a control character")
            return f"U+{ord(ch):04X} ({name.lower()})"
    return None


def reject(name: str, code: ProblemCode, message: str, line: int | None = None) -> ExportRejected:
    """The file ``name`` rejected for one problem."""
    return ExportRejected(name, [Problem(code, message, line=line)])


def internal_error(name: str, exc: Exception) -> ExportRejected:
    """An unforeseen failure while reading ``name``: a defect of lotgate, never of the file."""
    return reject(name, ProblemCode.INTERNAL_ERROR, f"lotgate could not read this file ({type(exc).__name__}: "
                  f"{printable(str(exc), 120)}); this is a defect of lotgate, please report it")


def in_file_order(problems: Sequence[Problem], columns: Sequence[str]) -> list[Problem]:
    """Problems by line, then column in layout order; at most ``MAX_PER_KIND`` of each code."""
    order = {c: i for i, c in enumerate(columns)}
    ordered = sorted(problems, key=lambda p: (p.line or 0, order.get(p.column or "", -1)))
    kept: list[Problem] = []
    count: dict[ProblemCode, int] = defaultdict(int)
    for problem in ordered:
        count[problem.code] += 1
        if count[problem.code] <= MAX_PER_KIND:
            kept.append(problem)
    dropped = sum(max(0, n - MAX_PER_KIND) for n in count.values())
    if dropped:
        kept.append(Problem(ProblemCode.MORE, f"{dropped} further problem(s) of the same kinds are not listed"))
    return kept
