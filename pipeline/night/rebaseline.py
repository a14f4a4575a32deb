"""Re-baselining a control chart: new limits from chosen released lots, stored and audited as a new version.

The limits and their ``limits-rebaselined`` audit event are written in one store transaction
(the store is the audit trail's source of truth); the event is then mirrored to the decision
log, hash-chained like every record there. The night's run lock is held throughout, so a night
cannot judge lots while the limits change, and nothing is recorded on a broken trail.
"""

from __future__ import annotations

from dataclasses import dataclass

from pipeline.controlled.specs import Attribute
from pipeline.errors import InputError
from pipeline.night.seal import seal_after_act
from pipeline.records import audit, ledger
from pipeline.records.chart_queries import active_limits, released_count, released_points
from pipeline.records.run_lock import run_lock
from pipeline.records.signer_check import authorise_person
from pipeline.records.signer_register import register_in_force
from pipeline.records.signing import SigningIdentity, sign_record
from pipeline.records.store import Store
from pipeline.records.workspace import Workspace
from pipeline.release.chart_view import StoredLimits, propose_limits, select_baseline
from pipeline.release.signature import checked_reason
from pipeline.vocabulary import SignerRole


@dataclass(frozen=True)
class Rebaselined:
    """The limits before and after, the lots the new ones come from, and the lots on the chart in all."""

    before: StoredLimits | None
    after: StoredLimits
    baseline_lots: tuple[str, ...]
    released_total: int


def rebaseline(ws: Workspace, store: Store, product: str, attribute: Attribute, *, identity: SigningIdentity,
               reason: str, from_lot: str | None = None, count: int | None = None) -> Rebaselined:
    """New limits from ``count`` released lots from ``from_lot`` on (default: the last ones), signed by ``identity``.

    The person is identified by their own PKCS#12 (never a typed name) and must hold the role
    're-baseline' in the register of authorised signers now; the reason must say something.
    The audit event carries the person's signature over the new limits and the reason.
    """
    reason = checked_reason(reason, ws.reason_pattern)
    register, register_events = register_in_force(ws, store)
    check = authorise_person(identity, SignerRole.REBASELINE, anchor_path=ws.trust_root, register=register)
    by = identity.signer_name
    count = attribute.baseline_n if count is None else count
    if count < 2:
        raise InputError(f"--count must be at least 2 lots (one moving range), received {count}")
    with run_lock(ws.root, store):
        audit.sync_log(store, ws.log)  # mend a log left behind by an interrupted write
        trail = audit.verify_trail(store, ws.log)
        if not trail.valid:
            raise InputError(f"the audit trail is broken ({trail.reason}); no re-baseline is recorded on a broken trail")
        if from_lot is not None:
            points = released_points(store, product, attribute.code, from_lot=from_lot, count=count)
            if not points:
                raise InputError(f"lot {from_lot} is not among the released lots on the {product} "
                                 f"{attribute.code} chart")
        else:
            points = released_points(store, product, attribute.code, tail=count)
        proposal = propose_limits(select_baseline(points, from_lot, count))
        before = active_limits(store, product, attribute.code)
        lim = proposal.limits
        act = {"product": product, "attribute": attribute.code, "center": lim.center, "sigma": lim.sigma,
               "mr_bar": lim.mr_bar, "baseline_lots": list(proposal.lots), "by": by, "reason": reason}
        signature = sign_record(identity, ledger.canonical_json(act).encode("utf-8")).to_dict()
        event = audit.event("limits-rebaselined", time_zone=ws.time_zone, **act, person=check.person,
                            role=check.role.value, register_version=check.register_version,
                            register_sha256=check.register_sha256, person_signature=signature)
        after = store.freeze_limits(product, attribute.code, lim.center, lim.sigma, lim.mr_bar, list(proposal.lots),
                                    frozen_by=by, reason=reason, events=[*register_events, event])
        audit.sync_log(store, ws.log)
        seal_after_act(ws, store, f"limits-rebaselined {product} {attribute.code}")
        return Rebaselined(before, after, tuple(proposal.lots), released_count(store, product, attribute.code))
