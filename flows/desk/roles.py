"""Desk roles and what each may do (the server checks these on every action)."""

from __future__ import annotations

from enum import StrEnum

from pipeline.vocabulary import SignerRole


class DeskRole(StrEnum):
    VIEWER = "viewer"
    REVIEWER = "reviewer"
    INVESTIGATOR = "investigator"
    CHART_OWNER = "chart-owner"
    ADMINISTRATOR = "administrator"


class DeskAct(StrEnum):
    """Acts a person does at the desk; every signing act needs the password again."""

    APPROVE = "approve"  # a lot ready for release: the person's signature beside the system's
    RELEASE = "release"  # a held lot released by a person's decision (the certificate re-issued)
    REJECT = "reject"
    REBASELINE = "re-baseline"
    INVALIDATE = "invalidate"  # an OOS investigation's signed outcome (lotgate investigate)
    MANAGE_USERS = "manage users"


ROLE_ACTS: dict[DeskRole, frozenset[DeskAct]] = {
    DeskRole.VIEWER: frozenset(),
    DeskRole.REVIEWER: frozenset({DeskAct.APPROVE, DeskAct.RELEASE, DeskAct.REJECT}),
    DeskRole.INVESTIGATOR: frozenset({DeskAct.INVALIDATE}),
    DeskRole.CHART_OWNER: frozenset({DeskAct.REBASELINE}),
    DeskRole.ADMINISTRATOR: frozenset({DeskAct.MANAGE_USERS}),  # accounts only: an administrator never signs
}

# What a role signs, in the words of the register of authorised signers.
SIGNER_ROLES: dict[DeskRole, tuple[SignerRole, ...]] = {
    DeskRole.REVIEWER: (SignerRole.RELEASE_APPROVAL, SignerRole.REJECTION),
    DeskRole.INVESTIGATOR: (SignerRole.RESULT_INVALIDATION,),
    DeskRole.CHART_OWNER: (SignerRole.REBASELINE,),
}


def signs(role: DeskRole) -> bool:
    """Whether accounts of this role sign (and so must be linked to a signing identity)."""
    return role in SIGNER_ROLES


def may(role: str, act: DeskAct) -> bool:
    try:
        return act in ROLE_ACTS[DeskRole(role)]
    except ValueError:  # a role word this version does not know: nothing
        return False
