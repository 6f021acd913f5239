"""Hours charged to a program by a recorded outcome. Pure; the storage layer applies it.

            default charge   charged when ``program``
  done      program          the entry's time as planned: setup + exposure (start to end)
                             plus the transition into it (slew, settle, instrument or filter
                             change); without a plan entry, the request's exposure
  partial   program          the exposure achieved
  failed    none             (``--charge program``: the time as planned, as for done) - a
                             failure is taken as the telescope's or the weather's unless the
                             operator says it was the program's (wrong coordinates, bad set-up)

``--charge none`` charges nothing whatever the result (time the observatory waives).
"""

from __future__ import annotations

from scheduler.model.errors import InputError

CHARGES = ("none", "program")
DEFAULT_CHARGE = {"done": "program", "partial": "program", "failed": "none"}


def resolve_charge(result: str, charge: str | None) -> str:
    if charge is None:
        return DEFAULT_CHARGE[result]
    if charge not in CHARGES:
        raise InputError("charge", f"{charge!r}; allowed {', '.join(CHARGES)}")
    return charge


def charged_hours(result: str, charge: str | None, *, planned_s: float | None, request_exposure_s: float,
                  achieved_exposure_s: float | None) -> float:
    """Hours to charge. planned_s: the plan entry's end - start + its transition (None without an entry)."""
    if resolve_charge(result, charge) == "none":
        return 0.0
    if result == "partial":
        return max(0.0, float(achieved_exposure_s or 0.0)) / 3600.0
    planned = planned_s if planned_s is not None else request_exposure_s
    return max(0.0, float(planned)) / 3600.0


def completion(done_executions: int, total_executions: int) -> float:
    """Share of a program's requests' executions done (0 when it has none)."""
    return 0.0 if total_executions <= 0 else min(1.0, done_executions / total_executions)
