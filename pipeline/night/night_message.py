"""What a night tells people: the end-of-night and failure messages, composed purely from its records.

The imperative shell (``flows/nightly.py``) gathers the night's summary and each lot's latest
stored decision, calls these functions and hands the result to the sender
(``pipeline/records/notify.py``) and to Prefect's artifacts. Nothing here reads a file or the
store, and nothing here holds a secret: a secret lives only in the URLs the sender fills in.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass

from pipeline.vocabulary import Disposition, HoldCategory

CAUTION = ("This message summarises the night's records for the QC reviewers; it releases nothing. A lot is "
           "released only as the plant's procedures and local GMP regulations require; the signed records "
           "and documents in the workspace are authoritative.")
MAX_LISTED = 40  # lots and files listed per section; the rest are counted


@dataclass(frozen=True)
class LotStanding:
    """One lot the night looked at, as its latest stored decision reads."""

    lot_id: str
    product: str
    disposition: Disposition
    hold_categories: tuple[HoldCategory, ...]
    reasons: tuple[str, ...]
    decided_tonight: bool  # False: its inputs were decided earlier, the decision stands unchanged


@dataclass(frozen=True)
class NightFacts:
    """Everything the end-of-night message says, gathered by the shell."""

    plant_name: str
    workspace: str
    night_id: int
    files_received: int
    files_archived: int
    quarantined: tuple[tuple[str, str], ...]  # (file name, first line of its reason)
    lots: tuple[LotStanding, ...]
    not_decided: tuple[str, ...]
    review_page: str  # the workspace path of the night's review page
    review_url: str | None  # the same page on the review desk, when the desk's address is set


@dataclass(frozen=True)
class NightMessage:
    title: str
    body: str
    failed: bool
    counts: tuple[tuple[Disposition, int], ...]  # every Disposition member, in declaration order


def review_page(night_id: int) -> str:
    """The night's review page, relative to the workspace (written by the review desk)."""
    return f"review/night-{night_id:04d}.html"


def review_url(desk_url: str | None, night_id: int) -> str | None:
    return None if desk_url is None else f"{desk_url.rstrip('/')}/{review_page(night_id)}"


def disposition_counts(lots: Iterable[LotStanding]) -> tuple[tuple[Disposition, int], ...]:
    """How many lots stand at each disposition; every member of Disposition is counted, zeros included."""
    standing = [lot.disposition for lot in lots]
    return tuple((member, standing.count(member)) for member in Disposition)


def _lot_line(lot: LotStanding) -> str:
    """``- LOT (PRODUCT): categories — reasons`` (at most three reasons, the rest counted)."""
    reasons = "; ".join(lot.reasons[:3]) + (f"; and {len(lot.reasons) - 3} more" if len(lot.reasons) > 3 else "")
    detail = " — ".join(part for part in (", ".join(lot.hold_categories), reasons) if part)
    unchanged = "" if lot.decided_tonight else " (unchanged, decided earlier)"
    return f"- {lot.lot_id} ({lot.product}){unchanged}" + (f": {detail}" if detail else "")


def _section(title: str, lines: Sequence[str]) -> list[str]:
    if not lines:
        return []
    shown = list(lines[:MAX_LISTED])
    if len(lines) > MAX_LISTED:
        shown.append(f"… and {len(lines) - MAX_LISTED} more (see the review page)")
    return ["", f"{title} ({len(lines)}):", *shown]


def night_message(facts: NightFacts) -> NightMessage:
    """The end-of-night message: counts by disposition, held and overdue lots with their reasons,
    lots ready for approval, quarantined files, and where to review the night."""
    counts = disposition_counts(facts.lots)
    held = [lot for lot in facts.lots if lot.disposition == Disposition.HELD]
    overdue = [lot for lot in held if HoldCategory.OVERDUE in lot.hold_categories]
    ready = [lot for lot in facts.lots if lot.disposition == Disposition.READY_FOR_RELEASE]
    needs_person = len(held) + len(ready) + len(facts.quarantined) + len(facts.not_decided)
    title = (f"{facts.plant_name}: night {facts.night_id} done — {len(facts.lots)} lots"
             + (f", {needs_person} items for a person" if needs_person else ", nothing for a person"))
    body = [f"Night {facts.night_id} of {facts.plant_name} finished (workspace {facts.workspace}).",
            f"Files received {facts.files_received} = archived {facts.files_archived} + quarantined "
            f"{len(facts.quarantined)}.",
            "Lots by disposition: " + ", ".join(f"{member.value} {n}" for member, n in counts) + "."]
    body += _section("Held lots", [_lot_line(lot) for lot in held])
    body += _section("Overdue results", [_lot_line(lot) for lot in overdue])
    body += _section("Ready for approval by an authorised person", [_lot_line(lot) for lot in ready])
    body += _section("Quarantined files", [f"- {name}: {reason}" for name, reason in facts.quarantined])
    body += _section("Not decided", [f"- {note}" for note in facts.not_decided])
    body += ["", f"Review page: {facts.review_url or facts.review_page}"
             + (f" (in the workspace: {facts.review_page})" if facts.review_url else ""), "", CAUTION]
    return NightMessage(title, "\n".join(body), False, counts)


def failure_message(plant_name: str, workspace: str, night_id: int | None, why: str,
                    desk_url: str | None = None) -> NightMessage:
    """The message of a night that failed: what failed, that its records stand, and what to do."""
    night = f"night {night_id}" if night_id is not None else "the night"
    body = [f"The nightly run of {plant_name} failed (workspace {workspace}): {why}",
            f"What {night} stored before it stopped stands; it is recorded as interrupted and the next run "
            "(scheduled, or 'lotgate run --workspace DIR') completes it. Lots not yet decided tonight are neither "
            "released nor held: they wait for that run.",
            "Check 'lotgate status --workspace DIR' and the run's log in Prefect before the next scheduled night."]
    if night_id is not None:
        link = review_url(desk_url, night_id)
        body += ["", f"Review page: {link or review_page(night_id)}"]
    body += ["", CAUTION]
    return NightMessage(f"{plant_name}: {night} FAILED — needs a person", "\n".join(body), True,
                        tuple((member, 0) for member in Disposition))


def first_line(reason: str) -> str:
    """The first problem of a quarantine reason file's text, for a one-line listing."""
    problems = [line.lstrip("- ").strip() for line in reason.splitlines() if line.startswith("- ")]
    lines = problems or [line.strip() for line in reason.splitlines() if line.strip()]
    return lines[0] if lines else "set aside"
