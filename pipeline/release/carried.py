"""Which plate on a lot's record a night re-reads when only the other plate was assayed again (pure).

Specific activity, Vmax per mg, kcat and kcat/Km need the lot's activity plate AND its protein
plate. A lab repeats only the assay that failed: when a lot's activity plate is repeated alone
(its first one was invalid), its protein stands on record from the earlier night, and the other
way round. The night then re-reads that earlier plate from the archive, evaluates it again as it
was evaluated then, and — when it gives exactly the value on record — derives the combined
results from tonight's plate and that one. The earlier plate's own results are not recorded a
second time: they are on record already (``CarriedPlate``; provenance says "carried").

Only a reportable result is carried: valid, within specification (or reported without limits),
from a plate, with no out-of-specification result of that test standing. An OOS protein is not
used to derive a specific activity while it stands; its investigation decides first.
"""

from __future__ import annotations

from dataclasses import dataclass, field

from pipeline.assay.method_kinds import Measures
from pipeline.controlled.specs import Specification
from pipeline.release.lot_record import LotHistory, choose
from pipeline.vocabulary import ResultStatus, Verdict

DERIVED_SOURCES = ("specific_activity", "vmax", "kcat", "kcat_over_km")  # on both plates
OWN_SOURCES = {Measures.ACTIVITY: ("activity", "km"), Measures.PROTEIN: ("protein",)}
KEY_SOURCE = {Measures.ACTIVITY: "activity", Measures.PROTEIN: "protein"}  # the value checked on re-reading
SAME_VALUE_REL = 1e-9  # the re-read plate must give the recorded value to this relative difference


@dataclass(frozen=True)
class CarriedPlate:
    """A plate of an earlier night that a lot's record holds, to re-read for tonight's derived results."""

    lot_id: str
    measures: Measures
    plate_id: str
    night_id: int
    tested_on: str
    recorded_value: float  # the key result on record (activity U/mL or protein mg/mL)
    files: dict[str, str] = field(default_factory=dict)  # the plate's files, name -> SHA-256


def needs_other_plate(spec: Specification, tonight: set[Measures]) -> Measures | None:
    """The kind of plate the lot lacks tonight for its derived results (None: both or neither came)."""
    if len(tonight) != 1 or not any(a.source in DERIVED_SOURCES for a in spec.attributes):
        return None
    (came,) = tonight
    return Measures.PROTEIN if came == Measures.ACTIVITY else Measures.ACTIVITY


def plate_to_carry(lot_id: str, spec: Specification, measures: Measures,
                   history: LotHistory) -> CarriedPlate | str | None:
    """The earlier plate whose reportable result of ``measures`` tonight may use; a reason when the record
    holds one that cannot be used; None when the record holds none."""
    key = next((a for a in spec.attributes if a.source == KEY_SOURCE[measures]), None)
    if key is None:
        return None
    results = tuple(r for r in history.results if r.attribute == key.code)
    if not results:
        return None
    investigations = tuple(i for i in history.investigations if i.attribute == key.code)
    _verdict, record, _changes, oos = choose(key, results, investigations, None)
    if oos is not None:
        return (f"{key.title}: an out-of-specification result stands in the lot's record; tonight's plate alone gives "
                "no derived result until its investigation is decided")
    if record.reportable_index is None:
        return None
    pick = record.results[record.reportable_index]
    if (pick.status != ResultStatus.VALID or pick.verdict not in (Verdict.PASS, Verdict.REPORTED)
            or not isinstance(pick.value, int | float) or pick.plate_id is None or pick.night_id is None):
        return None
    return CarriedPlate(lot_id, measures, pick.plate_id, pick.night_id, pick.tested_on, float(pick.value),
                        dict(pick.files))


def same_value(recomputed: float | None, recorded: float) -> bool:
    """Whether the re-read plate gives the value on record (to SAME_VALUE_REL)."""
    if recomputed is None:
        return False
    return abs(recomputed - recorded) <= SAME_VALUE_REL * max(abs(recorded), 1e-300)
