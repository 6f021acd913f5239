"""The plan document: one stored plan version as plain data, and its JSON/CSV files.

CONTRACT (other tools read the JSON; keep field names and meaning, add fields only):

    site {lat_deg, lon_deg, elevation_m, name, timezone}
    telescope {aperture_m, slew_rate_az_deg_s, slew_rate_alt_deg_s, settle_s, name}
    night {start, end, date, astronomical_dusk, astronomical_dawn, dark_hours}
    plan {version, created_at, reason, solver_status, objective, bound, gap, ...}
    entries [{request_id, target, ra_deg, dec_deg, band, band_wavelength_um, start, end, slew_s,
              setup_s, airmass_start, airmass_end, predicted_fwhm_arcsec, predicted_pwv_mm,
              transmission, merit, ...}]
    unscheduled [{request_id, reason, ...}]

``ra_deg``/``dec_deg`` are the target's ICRS position at the entry's start: for a moving target
(``body``, or an ephemeris table) its position then. ``strehl`` (predicted adaptive-optics
Strehl ratio) and ``surface_efficiency`` (a dish's Ruze efficiency) are null where they do not
apply.

Times are ISO-8601 UTC (``start_local``/``end_local`` add the site's local time with its
offset). One entry is one execution of the request's full exposure (or, for the next
execution after a partial outcome, of the exposure still owed: ``exposure_s`` says which).
``plan show --json`` prints this same document, so the two always agree.

Site and telescope are those the plan was built for (stored in the plan's summary); plans
stored without them fall back to the observatory.toml in use. The night's times are
recomputed from the site for the plan's date.
"""

from __future__ import annotations

import csv
import io
import json
import os
import secrets
from datetime import datetime
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

from scheduler.model.config import ObservatoryConfig, site_dict, telescope_dict
from scheduler.model.plan import StoredPlan
from scheduler.model.timegrid import iso
from scheduler.sky.night import Night

CAUTION = ("Advisory plan only: the observatory's interlocks and its licensed operators decide what the "
           "telescope does, and local safety rules prevail.")

# Entry fields in CSV column order: the contract fields first, then our additions.
ENTRY_FIELDS = (
    "request_id", "target", "ra_deg", "dec_deg", "band", "band_wavelength_um", "start", "end", "slew_s",
    "setup_s", "airmass_start", "airmass_end", "predicted_fwhm_arcsec", "predicted_pwv_mm", "transmission",
    "merit",
    "execution", "program", "instrument", "exposure_s", "transition_s", "moon_sep_deg", "value", "fixed",
    "start_local", "end_local", "strehl", "surface_efficiency", "body", "tier", "urgency", "opportunities_left",
    "balance",
)


def _r(x: float | None, nd: int) -> float | None:
    if x is None:
        return None
    x = float(x)
    if x != x or x in (float("inf"), float("-inf")):
        return None
    return round(x, nd)


def _local(t: datetime, tz: ZoneInfo) -> str:
    return t.astimezone(tz).isoformat(timespec="seconds")


def _hours_overlap(a0: datetime, a1: datetime, b0: datetime | None, b1: datetime | None) -> float:
    if b0 is None or b1 is None:
        return 0.0
    lo, hi = max(a0, b0), min(a1, b1)
    return max((hi - lo).total_seconds(), 0.0) / 3600.0


def plan_document(plan: StoredPlan, config: ObservatoryConfig, night: Night) -> dict[str, Any]:
    """The document of one stored plan version (read by storage: db.plans.stored_plan)."""
    tz = ZoneInfo(config.site.timezone)
    summary = plan.summary
    reqs = plan.requests

    entries = []
    for e in sorted(plan.entries, key=lambda x: x.start):
        r = reqs.get(e.request_id)
        band = config.bands.get(r.band) if r is not None else None
        entries.append({
            "request_id": e.request_id,
            "target": r.target if r else None,
            # the position at the entry's start (a moving target's own then); older plans: the request's
            "ra_deg": _r(e.ra_deg, 6) if e.ra_deg is not None else (r.ra_deg if r else None),
            "dec_deg": _r(e.dec_deg, 6) if e.dec_deg is not None else (r.dec_deg if r else None),
            "band": r.band if r else None,
            "band_wavelength_um": band.wavelength_um if band else None,
            "start": iso(e.start),
            "end": iso(e.end),
            "slew_s": _r(e.slew_s, 1),
            "setup_s": _r(e.setup_s, 1),
            "airmass_start": _r(e.airmass_start, 3),
            "airmass_end": _r(e.airmass_end, 3),
            "predicted_fwhm_arcsec": _r(e.fwhm_arcsec, 3),
            "predicted_pwv_mm": _r(e.pwv_mm, 2),
            "transmission": _r(e.transmission, 4),
            "merit": _r(e.merit, 4),
            "execution": e.execution,
            "program": r.program if r else None,
            "instrument": r.instrument if r else None,
            "exposure_s": _r(e.exposure_s, 1),
            "transition_s": _r(e.transition_s, 1),
            "moon_sep_deg": _r(e.moon_sep_deg, 1),
            "value": _r(e.value, 4),
            "fixed": bool(e.fixed),
            "strehl": _r(e.strehl, 3),  # predicted AO Strehl ratio where AO is modelled, else null
            "surface_efficiency": _r(e.surface_efficiency, 3),  # dish Ruze efficiency where it applies
            "body": r.body if r else None,
            "start_local": _local(e.start, tz),
            "end_local": _local(e.end, tz),
            "tier": int(e.tier),
            "urgency": _r(e.urgency, 4),
            "opportunities_left": e.opportunities_left,
            "balance": _r(e.balance, 4),
        })

    unscheduled = []
    for u in summary.get("unscheduled", []):
        r = reqs.get(int(u["request_id"]))
        unscheduled.append({"request_id": int(u["request_id"]), "reason": u.get("reason", ""),
                            "target": r.target if r else None, "program": r.program if r else None,
                            "band": r.band if r else None})

    # Night figures: darkness is the Sun below -18 deg.
    dusk, dawn = night.astronomical_dusk, night.astronomical_dawn
    dark_h = _hours_overlap(night.start, night.end, dusk, dawn)
    sched_h = sum((e.end - e.start).total_seconds() for e in plan.entries) / 3600.0
    dark_used_h = sum(_hours_overlap(e.start, e.end, dusk, dawn) for e in plan.entries)
    trans_h = sum(e.transition_s for e in plan.entries) / 3600.0
    slew_h = sum(e.slew_s for e in plan.entries) / 3600.0
    span_h = (night.end - max(plan.planned_from, night.start)).total_seconds() / 3600.0

    report = plan.conditions
    cover = summary.get("conditions_covered_fraction")
    conditions = {
        "report_id": plan.conditions_report_id,
        "source": report.source if report else None,
        "issued_at": iso(report.issued_at) if report else None,
        "covered_fraction": _r(cover, 3),
        "note": None if report else "no conditions report: the configuration's conservative defaults were assumed",
        # every report the plan used, newest first (per time the newest covering it), the share of
        # the night they cover and the warning when below planning.min_forecast_share
        "report_ids": summary.get("conditions_report_ids",
                                  [plan.conditions_report_id] if plan.conditions_report_id is not None else []),
        "forecast_share": _r(summary.get("forecast_share"), 3),
        "warning": summary.get("conditions_warning"),
    }
    return {
        "format": "nightplan-plan/1",
        "caution": CAUTION,
        # the site and telescope the plan was built for (stored with it), else the current config
        "site": summary.get("site") or site_dict(config),
        "telescope": summary.get("telescope") or telescope_dict(config),
        "night": {"date": plan.night.isoformat(), "start": iso(night.start), "end": iso(night.end),
                  "start_local": _local(night.start, tz), "end_local": _local(night.end, tz),
                  "astronomical_dusk": iso(dusk), "astronomical_dawn": iso(dawn), "dark_hours": round(dark_h, 3)},
        "plan": {
            "version": plan.version, "created_at": iso(plan.created_at), "reason": plan.reason,
            "solver_status": plan.solver_status, "objective": _r(plan.objective, 4), "bound": _r(plan.bound, 4),
            "gap": _r(plan.gap, 5), "greedy_objective": _r(plan.greedy_objective, 4),
            "runtime_s": _r(plan.runtime_s, 2), "active": bool(plan.active), "planned_from": iso(plan.planned_from),
            "previous_version": plan.previous_version, "superseded_at": iso(plan.superseded_at),
            "conditions": conditions,
            # what bounded the search: a time limit, or a deterministic effort (then the same
            # inputs, effort and seed give the same plan on any machine)
            "search": {k: (summary.get("stats") or {}).get(k) for k in ("time_limit_s", "effort", "seed")},
        },
        "summary": {
            "entries": len(entries),
            "scheduled_hours": round(sched_h, 3),
            "dark_hours": round(dark_h, 3),
            "dark_hours_used": round(dark_used_h, 3),
            "dark_fraction_used": round(dark_used_h / dark_h, 4) if dark_h > 0 else None,
            "transition_hours": round(trans_h, 3),
            "slew_hours": round(slew_h, 3),
            "idle_hours": round(max(span_h - sched_h - trans_h, 0.0), 3),
            "unscheduled": len(unscheduled),
            "queue_size": summary.get("queue_size"),
        },
        "entries": entries,
        "unscheduled": unscheduled,
    }


# --------------------------------------------------------------------------- files

def to_json(doc: dict[str, Any]) -> str:
    return json.dumps(doc, indent=2, ensure_ascii=False) + "\n"


def to_csv(doc: dict[str, Any]) -> str:
    """One row per entry with the entry fields (plan version and night date added in front)."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(("plan_version", "night") + ENTRY_FIELDS)
    for e in doc["entries"]:
        w.writerow([doc["plan"]["version"], doc["night"]["date"]] + ["" if e.get(k) is None else e.get(k)
                                                                      for k in ENTRY_FIELDS])
    return buf.getvalue()


def write_atomic(path: str | Path, data: bytes | str) -> Path:
    """Write via a temporary file in the same folder and rename: readers never see half a file.

    The file gets the mode any new file of the user gets (0666 less the umask): exports and
    charts are for other observers to read, unlike the database and the service log (0600).
    """
    p = Path(path)
    p.parent.mkdir(parents=True, exist_ok=True)
    raw = data.encode("utf-8") if isinstance(data, str) else data
    tmp = str(p.parent / f".{p.name}.{secrets.token_hex(8)}.tmp")
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)  # the kernel applies the umask (mkstemp: 0600)
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(raw)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, p)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise
    return p
