"""The JSON documents of stored rows (`request list/show --json`, `program list --json`, re-plan
orders): the contract's one home, for rows read through SQLAlchemy (store.py, plans.py) or
straight from the SQLite file (sqlite_direct.py). A row here is anything with the columns as
attributes, so this module imports no database library.
"""

from __future__ import annotations

from typing import Any

from scheduler.model.timegrid import iso

# request columns copied 1:1 between RequestSpec and the Request row
SPEC_FIELDS = (
    "target", "ra_deg", "dec_deg", "band", "instrument", "exposure_s", "repeats", "min_spacing_s",
    "resolution_arcsec", "max_seeing_arcsec", "max_pwv_mm", "max_airmass", "min_moon_sep_deg",
    "max_moon_illum", "min_sky_mag", "max_cloud_mag", "not_before", "not_after", "period_epoch",
    "period_days", "phase_min", "phase_max", "priority", "too", "status", "completed_repeats",
    "partial_exposure_s", "guide_star_sep_arcsec", "body",
)


def program_dict(p, used_hours: float | None = None) -> dict[str, Any]:
    d = {"code": p.code, "pi": p.pi, "hours": p.hours_allocated, "weight": p.weight, "tier": p.tier,
         "created_at": iso(p.created_at)}
    if used_hours is not None:
        d["hours_done"] = round(used_hours, 3)
    return d


def _table_rows(text: str | None) -> int | None:
    """Rows of a stored ephemeris table (its header is the first line), None without one."""
    return None if not text else max(text.count("\n") - 1, 0)


def request_dict(row) -> dict[str, Any]:
    """The JSON contract of `request list/show --json`: import column names for the limits."""
    return {
        "id": row.id,
        "program": row.program.code,
        "target": row.target,
        "ra_deg": row.ra_deg,
        "dec_deg": row.dec_deg,
        "band": row.band,
        "instrument": row.instrument,
        "exposure_s": row.exposure_s,
        "status": row.status,
        "resolution_arcsec": row.resolution_arcsec,
        "max_seeing_arcsec": row.max_seeing_arcsec,
        "max_pwv_mm": row.max_pwv_mm,
        "max_airmass": row.max_airmass,
        "min_moon_sep_deg": row.min_moon_sep_deg,
        "max_cloud_mag": row.max_cloud_mag,
        "not_before": iso(row.not_before),
        "not_after": iso(row.not_after),
        "priority": row.priority,
        "repeats": row.repeats,
        "min_spacing_s": row.min_spacing_s,
        "max_moon_illum": row.max_moon_illum,
        "min_sky_mag": row.min_sky_mag,
        "period_epoch": iso(row.period_epoch),
        "period_days": row.period_days,
        "phase_min": row.phase_min,
        "phase_max": row.phase_max,
        "too": row.too,
        "completed_repeats": row.completed_repeats,
        "partial_exposure_s": row.partial_exposure_s,
        "guide_star_sep_arcsec": row.guide_star_sep_arcsec,
        "body": row.body,
        "ephemeris_rows": _table_rows(row.ephemeris_csv),
        "created_at": iso(row.created_at),
        "updated_at": iso(row.updated_at),
    }


def order_dict(o) -> dict[str, Any]:
    return {"id": o.id, "reason": o.reason, "requested_by": o.requested_by, "requested_at": iso(o.requested_at),
            "taken_at": iso(o.taken_at), "done_at": iso(o.done_at), "result": o.result, "plan_version": o.plan_id}
