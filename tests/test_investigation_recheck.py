"""Which held lots the next night decides again after an investigation outcome, and which wait for a person."""

from __future__ import annotations

import dataclasses

from pipeline.night.decide import earlier_decisions
from pipeline.records import audit
from pipeline.records.controlled_files import load_catalog  # the shipped specifications
from pipeline.records.lot_record_store import (
    InvestigationWrite,
    add_investigation,
    investigated_lots,
    load_histories,
)
from pipeline.records.store import Store
from pipeline.records.stored import DecisionWrite
from pipeline.release.lot_record import LotResult
from pipeline.release.pending import investigation_recheck, latest_assay_date
from pipeline.release.records import DecisionRecord, RecordedResult
from pipeline.vocabulary import (
    Disposition,
    HoldCategory,
    InvestigationOutcome,
    ResultStatus,
    Verdict,
)

OOS = HoldCategory.OUT_OF_SPECIFICATION
OOT = HoldCategory.OUT_OF_TREND


def _held(store: Store, lot: str, categories: tuple[str, ...], decided_by: str = "lotgate 0.1.0 (nightly job)") -> None:
    record = DecisionRecord(lot, "LLC-200", Disposition.HELD, categories, ("lead 7.0 mg/kg above ≤ 5.0",), "3.1",
                            "a" * 64, f"f-{lot}", "held: out of specification",
                            results=(RecordedResult("lead", 7.0, "7.0", "mg/kg", "fail"),))
    oos = LotResult("lead", ResultStatus.VALID, Verdict.FAIL, 7.0, "7.0", "mg/kg", None, "2026-11-24", "LIMS test PB",
                    "LIMS test PB", {"lims-1.csv": "c" * 64})
    store.add_decisions([dataclasses.replace(
        DecisionWrite(record, decided_by, night_id=None, manufactured_on="2026-11-22",
                      events=(audit.event("decision", time_zone="UTC", lot_id=lot),)), lot_results=(oos,))])


def _investigate(store: Store, lot: str) -> None:
    result = load_histories(store, [lot])[lot].results[0]
    add_investigation(store, InvestigationWrite(lot, "lead", result.result_id, InvestigationOutcome.RESULT_INVALIDATED,
                                                f"INV-{lot}", "digestion incomplete (bench record)", "retest in duplicate",
                                                "A. Person", {"signature": "test"}),
                      [audit.event("investigation-outcome", time_zone="UTC", lot_id=lot)])


def test_a_nightly_oos_hold_with_a_later_outcome_is_decided_again_and_a_trend_hold_still_waits(tmp_path):
    store = Store(f"sqlite:///{tmp_path / 'lotgate.db'}")
    _held(store, "LLC-1", (OOS,))          # OOS only: the record settles it
    _held(store, "LLC-2", (OOS, OOT))      # OOS and out of trend: a person reviews the trend signal
    _held(store, "LLC-3", (OOS,))          # no outcome yet: nothing new in its record
    _held(store, "LLC-4", (OOS,), decided_by="Mira Castellan")  # a person's hold stands
    for lot in ("LLC-1", "LLC-2", "LLC-4"):
        _investigate(store, lot)
    again = investigated_lots(store)
    assert [lot for lot, _, _ in again] == ["LLC-1", "LLC-2"]
    assert again[0] == ("LLC-1", "LLC-200", "2026-11-22")
    history = load_histories(store, ["LLC-1"])["LLC-1"]
    assert latest_assay_date(history, "2026-12-01") == "2026-11-24"  # judged as at its latest result
    spec = load_catalog().specification_for_lot("LLC-200", "2026-11-22", "2026-11-24")
    rechecks = [investigation_recheck(spec, lot, made, "2026-11-24") for lot, _, made in again]
    assert not any(e.record_only for e in rechecks)  # trend is judged from the record, as on a night with data
    notes = earlier_decisions(store, rechecks)
    assert set(notes) == {"LLC-2"}  # held for review: the nightly job does not release it on its own
