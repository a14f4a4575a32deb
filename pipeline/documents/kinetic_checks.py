"""Lines under a lot's kinetic constants: the residual check, the Km profile interval, the whole-curve Km."""

from __future__ import annotations

from typing import Any

from pipeline.documents.text import get, mpara, num


def kinetic_checks(k: dict[str, Any]) -> list[Any]:
    """The declared error model's residual check and the whole-curve Km cross-check, one line each."""
    out: list[Any] = []
    check = get(k, "residual_check")
    if isinstance(check, dict) and get(check, "text"):
        out.append(mpara("Error model {m}: {t}.", "note", m=get(k, "error_model"), t=get(check, "text")))
    profile = get(k, "km_profile_ci95")
    if isinstance(profile, list | tuple) and len(profile) == 2:
        high = "no upper limit" if profile[1] is None else f"{num(profile[1], 4)} mM"
        out.append(mpara("Km profile-likelihood 95 % interval: {lo} mM to {hi} (beside the Wald interval above).",
                         "note", lo=num(profile[0], 4), hi=high))
    whole = get(k, "integrated_check")
    if isinstance(whole, dict) and get(whole, "km_mm") is not None:
        out.append(mpara("Cross-check: Km from the whole progress curves (integrated Michaelis–Menten) {km} mM, "
                         "{d} % from the reported Km.", "note", km=num(get(whole, "km_mm"), 4),
                         d=num(get(whole, "difference_pct"), 2)))
    elif isinstance(whole, dict) and get(whole, "failed"):
        out.append(mpara("Cross-check: {f}.", "note", f=get(whole, "failed")))
    return out
