"""`nightplan plan why ID`: why a request is, or is not, in a plan: the words and the JSON.

Three answers:

* scheduled: when (UTC and local), at what airmass, image quality and merit (read from the plan);
* never feasible: the binding constraint, how close it came, the closest time
  (constraints/explain.py, in the constraint catalog's words);
* feasible but displaced: what holds its time and what it would take to win it
  (planning/explain.py).

The computation lives in those modules; this one formats their plain data.
"""

from __future__ import annotations

from datetime import datetime
from typing import Any, Callable
from zoneinfo import ZoneInfo

from scheduler.conditions.grid import ConditionsGrid
from scheduler.constraints.explain import Unobservable
from scheduler.model.config import ObservatoryConfig
from scheduler.model.request import CLOSED_STATUSES, RequestSpec, RequestStatus
from scheduler.model.timegrid import iso, parse_time, utc
from scheduler.planning.explain import Displacement, WhyNot, value_breakdown, why_not
from scheduler.sky.ephemeris import SkyGrid
from scheduler.sky.night import Night

MAX_BLOCKERS_SHOWN = 8
MAX_WINDOWS_SHOWN = 4


def time_formatter(timezone: str) -> Callable[[float | datetime], str]:
    """'HH:MM UTC (HH:MM local)' for a unix time or an aware datetime."""
    tz = ZoneInfo(timezone)

    def fmt_t(x: float | datetime) -> str:
        t = x if isinstance(x, datetime) else utc(x)
        return f"{t.strftime('%H:%M')} UTC ({t.astimezone(tz).strftime('%H:%M')} local)"

    return fmt_t


def _t(s: str) -> datetime:
    return parse_time(s, "time")


def value_line(f: dict[str, Any]) -> str:
    """One execution's value broken into its factors (planning.explain.value_breakdown)."""
    n = f.get("opportunities_left")
    left = "unknown" if n is None else f"{n} night{'s' if n != 1 else ''} left, tonight included"
    return (f"value {f['value']:.3f} = tier {f['tier']} | program weight {f['program_weight']:g} x priority weight "
            f"{f['priority_weight']:.3g} (priority {f['priority']}, ratio {f['priority_ratio']:g}) x exposure "
            f"{f['exposure_h']:.3f} h x merit {f['merit']:.3f} x urgency {f['urgency']:.3f} ({left}) x balance "
            f"{f['balance']:.3f}")


def explain(config: ObservatoryConfig, spec: RequestSpec, night: Night, sky: SkyGrid, cond: ConditionsGrid,
            doc: dict[str, Any], weights, solver_reason: str | None = None,
            later_opportunities: int | None = None) -> dict[str, Any]:
    """Why request ``spec`` is (not) in the plan ``doc`` (report.export.plan_document).

    ``sky`` holds this request's target alone (row 0) on the plan's night; ``cond`` the plan's
    conditions on the same grid. weights: the programs (ProgramState) or plain weights;
    later_opportunities: the request's opportunities after the plan's night (for a displaced
    request's urgency; a scheduled entry carries its own).
    """
    fmt_t = time_formatter(config.site.timezone)
    out: dict[str, Any] = {
        "request_id": spec.id, "target": spec.target, "program": spec.program, "band": spec.band,
        "status": spec.status, "plan_version": doc["plan"]["version"], "night": doc["night"]["date"],
        "solver_reason": solver_reason,
    }
    head = f"Request {spec.id} {spec.target} ({spec.program}, band {spec.band}, {spec.exposure_s:g} s)"
    mine = [e for e in doc["entries"] if e["request_id"] == spec.id]
    if mine:
        out.update(state="scheduled", entries=mine)
        factors = [value_breakdown(config, spec, weights, e["merit"], opportunities_left=e.get("opportunities_left"),
                                   tier=e.get("tier"), urgency=e.get("urgency"), balance=e.get("balance"),
                                   value=e.get("value"))
                   for e in mine]
        out["factors"] = factors
        out["explanation"] = _scheduled_lines(head, spec, doc, mine, solver_reason, fmt_t, factors)
        return out
    if spec.status in CLOSED_STATUSES:
        out["state"] = "not_in_queue"
        out["explanation"] = [f"{head} is {spec.status}: it is not in the queue, so no plan schedules it."]
        return out
    later = 0 if later_opportunities is None else int(later_opportunities)
    w = why_not(config, spec, sky, cond, _t(doc["plan"]["planned_from"]), doc["entries"], weights, fmt_t, later)
    out["duration_s"] = w.duration_steps * night.step_s
    if w.unobservable is not None:
        _never_feasible(out, head, doc, w, w.unobservable, night, fmt_t)
    else:
        f = value_breakdown(config, spec, weights, w.displaced.merit_at_best,
                            opportunities_left=None if later_opportunities is None else 1 + later)
        out["factors"] = [f]
        _displaced(out, head, doc, spec, w, w.displaced, night, fmt_t)
        out["explanation"].insert(1, "  at its best start: " + value_line(f))
    return out


def _scheduled_lines(head: str, spec: RequestSpec, doc: dict[str, Any], mine: list[dict[str, Any]],
                     solver_reason: str | None, fmt_t, factors: list[dict[str, Any]]) -> list[str]:
    lines = [f"{head} is scheduled in plan version {doc['plan']['version']}:"]
    for e, f in zip(mine, factors):
        lines.append(f"  execution {e['execution'] + 1}: {fmt_t(_t(e['start']))} to {fmt_t(_t(e['end']))}, "
                     f"airmass {e['airmass_start']:.2f}->{e['airmass_end']:.2f}, FWHM "
                     f"{e['predicted_fwhm_arcsec']:.2f}\", PWV {e['predicted_pwv_mm']:.1f} mm, merit {e['merit']:.2f}")
        lines.append(f"    {value_line(f)}")
    owed = spec.remaining_repeats
    if owed > len(mine) and spec.status != RequestStatus.DONE:
        lines.append(f"  {owed - len(mine)} more execution(s) owed do not fit tonight"
                     + (f" ({solver_reason})" if solver_reason else ""))
    return lines


def _never_feasible(out: dict[str, Any], head: str, doc: dict[str, Any], w: WhyNot, u: Unobservable,
                    night: Night, fmt_t) -> None:
    step = night.step_s
    out.update(state="never_feasible", binding=u.binding, binding_description=u.wording)
    out["closest"] = {"time": iso(utc(night.times_unix[u.closest_step])), "failing": u.closest_failing}
    out["details"] = dict(u.details)
    out["longest_ok_minutes"] = round(u.longest_ok_steps * step / 60.0, 1)
    lines = [f"{head} is never feasible on the night of {doc['night']['date']}"
             + (" after the plan's start" if w.now_step else "") + f": binding constraint {' and '.join(u.wording)}."]
    lines += [f"  {name}: {txt}" for name, txt in u.details]
    if u.alone_opens_starts:
        lines.append(f"  lifting {u.binding[0]} alone would open {u.alone_opens_starts * step / 60:.0f} "
                     f"min of start times")
    if u.longest_ok_steps:
        lines.append(f"  every constraint holds for at most {u.longest_ok_steps * step / 60:.0f} min in a row; it "
                     f"needs {w.duration_steps * step / 60:.0f} min (setup + exposure)")
    lines.append(f"  closest at {fmt_t(night.times_unix[u.closest_step])}; failing there: "
                 f"{', '.join(u.closest_failing) or 'nothing'}")
    out["explanation"] = lines


def _displaced(out: dict[str, Any], head: str, doc: dict[str, Any], spec: RequestSpec, w: WhyNot,
               d: Displacement, night: Night, fmt_t) -> None:
    step, t, ent = night.step_s, night.times_unix, doc["entries"]
    best_t = t[d.starts[d.best]]
    out.update(state="displaced", feasible_windows=d.windows, feasible_minutes=round(d.starts.size * step / 60.0, 1))
    out["displaced_by"] = [{k: ent[i][k] for k in ("request_id", "target", "start", "end", "value")}
                           for i in d.blockers]
    out.update(best_start=iso(utc(best_t)), value_at_best=round(d.own_value, 4),
               value_needed=round(d.value_needed, 4), priority_needed=d.priority_needed)

    win_txt = ", ".join(f"{fmt_t(_t(x['start']))[:5]}-{fmt_t(_t(x['last_start']))[:5]}"
                        for x in d.windows[:MAX_WINDOWS_SHOWN])
    more = ", ..." if len(d.windows) > MAX_WINDOWS_SHOWN else ""
    lines = [f"{head} is feasible but displaced: it could start in {out['feasible_minutes']:.0f} min of start "
             f"times (UTC {win_txt}{more}) and needs {w.duration_steps * step / 60:.0f} min."]
    lines += _blocker_lines([ent[i] for i in d.blockers])
    if d.at_best:
        need = d.value_needed
        names = ", ".join(f"#{ent[i]['request_id']}" for i in d.at_best)
        lines.append(f"  best chance at {fmt_t(best_t)}: it would push out {names} (value {need:.3f}); "
                     f"it has {d.own_value:.3f}, so it needs a value above {need:.3f} to win")
        lines.append("  " + (f"priority {d.priority_needed} would be enough there" if d.priority_needed else
                             "even priority 10 would not be enough there") +
                     " (local estimate; the solver weighs the whole night)")
    else:
        gap = doc["plan"]["gap"]
        lines.append(f"  at {fmt_t(best_t)} no entry overlaps it, but the free time there is too short "
                     f"once the slews in and out are counted"
                     + (f", or the solver stopped at a gap of {100 * gap:.1f} %" if gap else ""))
    out["explanation"] = lines


def _blocker_lines(blockers: list[dict[str, Any]]) -> list[str]:
    if not blockers:
        return []
    lines = [f"  entries that overlap its feasible starts ({len(blockers)}):"]
    for e in blockers[:MAX_BLOCKERS_SHOWN]:
        lines.append(f"    #{e['request_id']} {e['target']} ({e['program']}, {e['band']}) "
                     f"{_t(e['start']).strftime('%H:%M')}-{_t(e['end']).strftime('%H:%M')} UTC, value {e['value']:.3f}")
    if len(blockers) > MAX_BLOCKERS_SHOWN:
        lines.append(f"    ... and {len(blockers) - MAX_BLOCKERS_SHOWN} more")
    return lines
