"""What the observer's page shows, as plain data for its templates. Reads the database only.

Everything comes from the documents the command line prints (``plan_document`` for the plan,
``status_document`` for the service, ``almanac_for`` for the night, ``what_next`` for what is
in progress) plus the night's plan versions with their stored diffs and the outcomes recorded
against the plan's entries. This module only selects and formats.
"""

from __future__ import annotations

import threading
from datetime import datetime, timezone
from typing import Any
from zoneinfo import ZoneInfo

from sqlalchemy import func, select

from scheduler.model.config import ObservatoryConfig
from scheduler.model.timegrid import iso


def _t(s: str | None) -> datetime | None:
    return None if s is None else datetime.fromisoformat(s.replace("Z", "+00:00"))


def ra_hms(ra_deg: float | None) -> str:
    """Right ascension as hh:mm:ss.s (rounded to a tenth of a second of time, carried)."""
    if ra_deg is None:
        return "-"
    tenths = int(round((ra_deg % 360.0) / 15.0 * 36000.0)) % (24 * 36000)
    h, rem = divmod(tenths, 36000)
    m, rem = divmod(rem, 600)
    return f"{h:02d}:{m:02d}:{rem // 10:02d}.{rem % 10}"


def dec_dms(dec_deg: float | None) -> str:
    """Declination as ±dd:mm:ss (rounded to the arcsecond, carried)."""
    if dec_deg is None:
        return "-"
    sign = "-" if dec_deg < 0 else "+"
    secs = int(round(abs(dec_deg) * 3600.0))
    d, rem = divmod(secs, 3600)
    m, s = divmod(rem, 60)
    return f"{sign}{d:02d}:{m:02d}:{s:02d}"


def when(iso_text: str | None, tz: ZoneInfo | timezone) -> str:
    """'YYYY-MM-DD HH:MM' of an ISO time in the given zone."""
    t = _t(iso_text)
    return "-" if t is None else t.astimezone(tz).strftime("%Y-%m-%d %H:%M")


def hm(iso_text: str | None, tz: ZoneInfo | timezone) -> str:
    t = _t(iso_text)
    return "--:--" if t is None else t.astimezone(tz).strftime("%H:%M")


def _num(x: float | None, fmt: str) -> str:
    return "-" if x is None else fmt.format(x)


def _duration(seconds: float | None) -> str:
    if seconds is None:
        return "-"
    s = int(round(seconds))
    if s < 60:
        return f"{s} s"
    m, s = divmod(s, 60)
    if m < 60:
        return f"{m} min {s:02d} s" if s else f"{m} min"
    h, m = divmod(m, 60)
    return f"{h} h {m:02d} min"


class AlmanacCache:
    """almanac_for per night date, computed once (the Sun and Moon do not change)."""

    def __init__(self, config: ObservatoryConfig):
        self.config = config
        self._by_date: dict = {}
        self._lock = threading.Lock()

    def get(self, night_date) -> dict[str, Any]:
        from scheduler.sky.almanac import almanac_for

        with self._lock:
            if night_date not in self._by_date:
                self._by_date[night_date] = almanac_for(self.config, night_date)
            return self._by_date[night_date]


def _entry_outcomes(s, plan, doc) -> dict[tuple[int, int], dict[str, Any]]:
    """(request id, index among its entries) -> the outcome recorded for that entry, if any.

    An outcome names the plan entry it was recorded against when there was one; an outcome of
    an earlier plan version belongs to the entry of this plan that covers its time."""
    from scheduler.db.models import Outcome

    rids = {e["request_id"] for e in doc["entries"]}
    if not rids:
        return {}
    night_start = _t(doc["night"]["start"])
    outs = list(s.scalars(select(Outcome).where(Outcome.request_id.in_(rids), Outcome.recorded_at >= night_start)
                          .order_by(Outcome.id)))
    ids = {e.id: (e.request_id, e.start) for e in plan.entries}
    by_req: dict[int, list] = {}
    for e in doc["entries"]:
        by_req.setdefault(e["request_id"], []).append(e)
    found: dict[tuple[int, int], dict[str, Any]] = {}
    for o in outs:
        es = by_req.get(o.request_id, [])
        k = None
        if o.plan_entry_id in ids:
            start = iso(ids[o.plan_entry_id][1])
            k = next((i for i, e in enumerate(es) if e["start"] == start), None)
        if k is None:  # the entry started last before the record
            started = [i for i, e in enumerate(es) if _t(e["start"]) <= o.recorded_at]
            k = started[-1] if started else None
        if k is not None:
            found[(o.request_id, k)] = {"result": o.result, "at": iso(o.recorded_at), "note": o.note,
                                        "exposure_s": o.exposure_s}
    return found


def _versions(s, night_date) -> list[dict[str, Any]]:
    from scheduler.db import plans
    from scheduler.db.models import Plan

    rows = list(s.scalars(select(Plan).where(Plan.night == night_date).order_by(Plan.id.desc())))
    n_entries = dict(s.execute(select(Plan.id, func.count()).select_from(Plan).join(Plan.entries)
                               .where(Plan.night == night_date).group_by(Plan.id)).all())
    out = []
    for p in rows:
        diff = plans.plan_diff_of(p)
        out.append({
            "version": p.id, "created_at": iso(p.created_at), "active": bool(p.active), "reason": p.reason,
            "solver_status": p.solver_status, "gap": p.gap, "entries": n_entries.get(p.id, 0),
            "previous_version": p.previous_id, "planned_from": iso(p.planned_from),
            "added": [d["request_id"] for d in diff.get("added", [])],
            "dropped": [d["request_id"] for d in diff.get("dropped", [])],
            "moved": [{"request_id": d["request_id"], "minutes": d["minutes"]} for d in diff.get("moved", [])],
        })
    return out


def _conditions_now(samples: list, measured: list, now: datetime, config: ObservatoryConfig) -> dict[str, Any]:
    """The forecast value at ``now`` (linear between samples) and the newest measured sample."""
    import numpy as np

    from scheduler.conditions.grid import conditions_on_grid

    out: dict[str, Any] = {"forecast": None, "measured": None}
    if samples:
        g = conditions_on_grid(samples, np.array([now.timestamp()]), config.defaults)
        out["forecast"] = {"seeing_arcsec": float(g.seeing_arcsec[0]), "pwv_mm": float(g.pwv_mm[0]),
                           "cloud_mag": float(g.cloud_mag[0]), "wind_ms": float(g.wind_ms[0]),
                           "humidity_pct": float(g.humidity_pct[0]), "dome_open": bool(g.dome_open[0]),
                           "covered": bool(g.covered[0])}
    past = [m for m in measured if m.time <= now]
    if past:
        m = past[-1]
        out["measured"] = {"time": iso(m.time), "seeing_arcsec": m.seeing_arcsec, "pwv_mm": m.pwv_mm,
                           "cloud_mag": m.cloud_mag, "wind_ms": m.wind_ms, "humidity_pct": m.humidity_pct,
                           "dome_open": m.dome_open}
    return out


def change_key(s) -> dict[str, Any]:
    """What the page's live updates watch: cheap maxima, the service lock row and the orders."""
    from scheduler.db.models import ConditionsReport, Outcome, Plan, ReplanOrder, Request, ServiceLock
    from scheduler.service.lock import LOCK_NAME, LockInfo

    lock = s.get(ServiceLock, LOCK_NAME)
    if lock is None:
        service = "stopped"
    else:
        service = "running" if LockInfo.of(lock).stale_reason() is None else "dead"
    return {
        "plan": s.scalar(select(func.max(Plan.id))),
        "outcome": s.scalar(select(func.max(Outcome.id))),
        "conditions": s.scalar(select(func.max(ConditionsReport.id))),
        "requests": iso(s.scalar(select(func.max(Request.updated_at)))),
        "service": service,
        "holder": lock.holder if lock is not None else None,
        "orders": s.scalar(select(func.max(ReplanOrder.id))),
        "orders_pending": s.scalar(select(func.count()).select_from(ReplanOrder).where(ReplanOrder.done_at.is_(None))),
        "orders_done": iso(s.scalar(select(func.max(ReplanOrder.done_at)))),
        "heartbeat": iso(lock.heartbeat_at) if lock is not None else None,
    }


def page_view(db, config: ObservatoryConfig, night_of, almanacs: AlmanacCache, now: datetime) -> dict[str, Any]:
    """Everything the page shows at ``now`` (the service's clock when it runs a rehearsal)."""
    from scheduler.db import plans, store
    from scheduler.report.chart import entry_state
    from scheduler.report.export import plan_document
    from scheduler.report.next import what_next
    from scheduler.service.status import status_document

    status = status_document(db)
    view: dict[str, Any] = {"now": iso(now), "status": status, "doc": None, "site_name": config.site.name,
                            "timezone": config.site.timezone}
    with db.session() as s:
        key = change_key(s)
        plan = plans.active_plan(s)
        if plan is None:
            view["key"] = key
            return view
        night = night_of(plan.night)
        doc = plan_document(plans.stored_plan(s, plan), config, night)
        outcomes = _entry_outcomes(s, plan, doc)
        versions = _versions(s, plan.night)
        samples = store.report_samples(s, doc["plan"]["conditions"]["report_id"])
        measured = store.measured_samples(s, night.start, night.end)
        statuses = {}
        if doc["entries"]:
            from scheduler.db.models import Request

            rids = {e["request_id"] for e in doc["entries"]}
            statuses = dict(s.execute(select(Request.id, Request.status).where(Request.id.in_(rids))).all())
    tz = ZoneInfo(doc["site"].get("timezone") or config.site.timezone)
    utc = timezone.utc
    n0, n1 = _t(doc["night"]["start"]), _t(doc["night"]["end"])
    span = max((n1 - n0).total_seconds(), 1.0)

    def pct(t: datetime) -> float:
        return round(min(max((t - n0).total_seconds() / span, 0.0), 1.0) * 100.0, 3)

    rows, seen = [], {}
    for e in doc["entries"]:
        k = seen.get(e["request_id"], 0)
        seen[e["request_id"]] = k + 1
        state = entry_state(e, now)
        out = outcomes.get((e["request_id"], k))
        rows.append({
            **e,
            "ra_hms": ra_hms(e["ra_deg"]), "dec_dms": dec_dms(e["dec_deg"]),
            "start_utc": when(e["start"], utc), "end_utc": when(e["end"], utc),
            "start_loc": when(e["start"], tz), "end_loc": when(e["end"], tz),
            "airmass": f"{_num(e['airmass_start'], '{:.2f}')}–{_num(e['airmass_end'], '{:.2f}')}",
            "fwhm": _num(e["predicted_fwhm_arcsec"], "{:.2f}"), "pwv": _num(e["predicted_pwv_mm"], "{:.1f}"),
            "trans": _num(e["transmission"], "{:.2f}"),
            "state": state, "outcome": out, "request_status": statuses.get(e["request_id"]),
            "left_pct": pct(_t(e["start"])), "width_pct": max(round(pct(_t(e["end"])) - pct(_t(e["start"])), 3), 0.15),
        })
    nxt = what_next(doc, now)
    current = nxt["current"]
    upcoming = [{**u, "slew": _duration(u["slew_s"]), "transition": _duration(u["transition_s"]),
                 "start_hm": hm(u["start"], utc), "start_loc_hm": hm(u["start"], tz),
                 "ra_hms": ra_hms(u["ra_deg"]), "dec_dms": dec_dms(u["dec_deg"])} for u in nxt["upcoming"]]
    alm = almanacs.get(plan.night)
    twilight = []
    for key_, label in (("sunset", "sunset"), ("civil_dusk", "civil dusk"), ("nautical_dusk", "nautical dusk"),
                        ("astronomical_dusk", "astronomical dusk"), ("astronomical_dawn", "astronomical dawn"),
                        ("nautical_dawn", "nautical dawn"), ("civil_dawn", "civil dawn"), ("sunrise", "sunrise")):
        twilight.append({"label": label, "utc": hm(alm.get(key_), utc), "local": hm(alm.get(key_), tz),
                         "pct": pct(_t(alm[key_])) if alm.get(key_) else None, "key": key_})
    gap = doc["plan"]["gap"]
    view.update({
        "doc": doc, "rows": rows, "versions": versions, "next": nxt, "upcoming": upcoming,
        "current": current, "current_row": next((r for r in rows if current and r["start"] == current["start"]
                                                  and r["request_id"] == current["request_id"]), None),
        "almanac": alm, "twilight": twilight, "key": key,
        "gap_text": "-" if gap is None else f"{100 * gap:.1f} %",
        "conditions_now": _conditions_now(samples, measured, now, config),
        "now_pct": pct(now) if n0 <= now <= n1 else None,
        "night_start": doc["night"]["start"], "night_end": doc["night"]["end"],
        "hours": _hour_marks(n0, n1, tz, pct),
        "tz": tz,
        "colours_day": _css_colours(config, "day"), "colours_night": _css_colours(config, "night"),
    })
    return view


def _css_colours(config: ObservatoryConfig, style: str) -> dict[str, str]:
    """The chart's band colours (one palette for the page and the chart) as CSS hex."""
    from matplotlib.colors import to_hex

    from scheduler.report.chart import band_colours

    return {b: to_hex(c) for b, c in band_colours(config, style).items()}


def _hour_marks(n0: datetime, n1: datetime, tz, pct) -> list[dict[str, Any]]:
    from datetime import timedelta

    t = n0.replace(minute=0, second=0, microsecond=0) + timedelta(hours=1)
    out = []
    while t < n1:
        out.append({"pct": pct(t), "utc": t.strftime("%H"), "local": t.astimezone(tz).strftime("%H:%M")})
        t += timedelta(hours=1)
    return out
