"""May a person release this lot now? The one check ``lotgate decide --release`` and the desk share.

The rule is ``pipeline.release.release_bars`` (out-of-specification results without an
outcome, confirmed OOS, an invalidated result whose retest is not yet decided, undecided and
missing results); here it is read against the store (the lot's record and investigations) and
worded for the chemist: the lot, each result with its value and limit, and what to do next.
"""

from __future__ import annotations

from pipeline.controlled.specs import Attribute
from pipeline.errors import InputError, LotgateError
from pipeline.records.controlled_files import controlled_folders, load_catalog
from pipeline.records.lot_record_store import load_histories
from pipeline.records.store import Store
from pipeline.records.stored import StoredDecision
from pipeline.records.workspace import Workspace
from pipeline.release.lot_record import LotHistory
from pipeline.release.records import DecisionRecord
from pipeline.release.release_bars import BarredResult, release_bars
from pipeline.vocabulary import ReleaseBar


def _attributes(ws: Workspace, record: DecisionRecord) -> dict[str, Attribute]:
    """The attributes of the specification version the revision was judged against (empty if not on file)."""
    try:
        catalog = load_catalog(controlled_folders(ws), ws.specification_date)
    except LotgateError:  # the limits are then named by the specification's version only
        return {}
    chosen = [s for s in catalog.all_specifications(record.product) if s.document.version == record.spec_version]
    exact = [s for s in chosen if s.document.sha256 == record.spec_sha256]
    spec = (exact or chosen or [None])[0]
    return {} if spec is None else {a.code: a for a in spec.attributes}


def _with_unit(text: str | None, unit: str) -> str:
    return f"{text} {unit}".strip() if text else ""


def _result_text(bar: BarredResult, attribute: Attribute | None, record: DecisionRecord) -> str:
    title = attribute.title if attribute is not None else bar.attribute
    unit = attribute.unit if attribute is not None else bar.unit
    limit = (f"limit {_with_unit(attribute.limit_text, unit)}" if attribute is not None
             else f"limit in specification {record.product} {record.spec_version}")
    value = _with_unit(bar.reported, unit)
    if bar.bar == ReleaseBar.OPEN_OOS:
        return f"{title} {value} is out of specification ({limit}) and no investigation outcome is recorded"
    if bar.bar == ReleaseBar.CONFIRMED_OOS:
        return (f"{title} {value} is out of specification ({limit}), confirmed under investigation "
                f"{bar.reference or '(no reference)'}")
    if bar.bar == ReleaseBar.INVALIDATED:
        return (f"{title} {value} ({limit}) was invalidated under investigation {bar.reference or '(no reference)'} "
                "and its retest is not yet decided")
    if bar.bar == ReleaseBar.UNDECIDED:
        return f"{title} {value} does not show that the {limit} is met (undecided result)"
    return f"no valid result for {title}"


def _next_step(lot_id: str, bars: tuple[BarredResult, ...]) -> str:
    kinds = {b.bar for b in bars}
    reject = f"lotgate decide {lot_id} --reject"
    if kinds == {ReleaseBar.CONFIRMED_OOS}:
        return f"a confirmed out-of-specification result allows only the lot's rejection ({reject})"
    steps = []
    open_oos = [b.attribute for b in bars if b.bar == ReleaseBar.OPEN_OOS]
    if open_oos:
        steps.append(f"record the investigation outcome (lotgate investigate {lot_id} --test {open_oos[0]} "
                     "--outcome invalidated|confirmed --reference INV-… --reason …, or at the desk)")
    if ReleaseBar.INVALIDATED in kinds:
        steps.append("let the next night decide the lot again from its record (with the retest's result, once "
                     "it has arrived)")
    if kinds & {ReleaseBar.UNDECIDED, ReleaseBar.NO_VALID_RESULT}:
        steps.append("have the test done again (the night that receives its result decides the lot again)")
    return f"{' and '.join(steps)}, or reject the lot ({reject})"


def refusal(lot_id: str, bars: tuple[BarredResult, ...], record: DecisionRecord,
            attributes: dict[str, Attribute]) -> str:
    """The one line that refuses a person's release of ``lot_id`` for ``bars``."""
    results = "; ".join(_result_text(b, attributes.get(b.attribute), record) for b in bars)
    return (f"lot {lot_id} cannot be released: {results}. A certificate needs every result to show the lot meets "
            f"its specification: {_next_step(lot_id, bars)}.")


def release_refusal(ws: Workspace, store: Store, latest: StoredDecision) -> str | None:
    """Why a person may not release the lot at its current revision ``latest``; None when they may."""
    history = load_histories(store, [latest.lot_id]).get(latest.lot_id) or LotHistory()
    bars = release_bars(latest.record.results, history)
    if not bars:
        return None
    return refusal(latest.lot_id, bars, latest.record, _attributes(ws, latest.record))


def check_release(ws: Workspace, store: Store, latest: StoredDecision) -> None:
    """Refuse, before anything is written, a person's release that ``release_refusal`` bars."""
    why = release_refusal(ws, store, latest)
    if why is not None:
        raise InputError(f"{why} Nothing was recorded.")
