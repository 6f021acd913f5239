"""`nightplan plan why ID`: why a request is, or is not, in a plan. Pure (numpy over one request).

Three answers:

* scheduled: when (UTC and local), at what airmass, image quality and merit.
* never feasible: no start time of the night (after the plan's ``planned_from``) has every
  constraint hold for the whole setup + exposure. The BINDING constraint is the one that, lifted
  alone, opens the most start times (feasibility.Reason bits, windows of the full duration).
  When no single constraint would open a window, two or more bind together: the ones failing
  most often are named. "Closest" is the time with the fewest failing constraints, and the
  constraint's own numbers say how close it came (highest altitude, best seeing, driest air...).
* feasible but displaced: it has feasible starts, and the plan uses that time for other
  entries. For every feasible start we sum the values of the plan entries that overlap it
  (including their transition in); the start with the best margin (own value minus what it
  would push out) is its best chance. Winning there needs a value above that sum; the
  priority that would give it is shown. This is the local trade only: the solver weighs the
  whole night at once (and stops at its gap), so the figure is a guide, not a promise.

Value of one execution (solve/problem.py): weight x priority/5 x exposure_h x merit.
"""

from __future__ import annotations

import math
from datetime import datetime
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np

from scheduler.conditions.grid import ConditionsGrid
from scheduler.model.config import ObservatoryConfig
from scheduler.constraints.feasibility import TRANSMISSION_FLOOR, Reason, evaluate, reason_names, start_windows
from scheduler.model.request import CLOSED_STATUSES, RequestSpec, RequestStatus
from scheduler.model.timegrid import iso
from scheduler.sky.ephemeris import SkyGrid
from scheduler.sky.night import Night
from scheduler.constraints.windows import DESCRIPTION
from scheduler.model.timegrid import runs, utc

_NIGHT_END = int(Reason.NIGHT_END)


def _t(s: str) -> datetime:
    return datetime.fromisoformat(s.replace("Z", "+00:00"))


def base_value(spec: RequestSpec, weights: dict[str, float]) -> float:
    from scheduler.solve.objective import science_base_value

    return float(science_base_value(spec, weights))


def binding(reasons: np.ndarray, duration: int, now_step: int) -> dict[str, Any]:
    """Which Reason bit, lifted alone, opens the most start times of the full duration."""
    r = np.asarray(reasons, dtype=np.int64) & ~_NIGHT_END
    counts: dict[Reason, int] = {}
    opened: dict[Reason, int] = {}
    for bit in Reason:
        if bit == Reason.NIGHT_END:
            continue
        counts[bit] = int(np.count_nonzero(r[now_step:] & int(bit)))
        if counts[bit] == 0:
            continue
        ok = ((r & ~int(bit)) == 0)[None, :]
        so, _ = start_windows(ok, np.array([duration]))
        opened[bit] = int(np.count_nonzero(so[0, now_step:]))
    best = max(opened, key=lambda b: (opened[b], counts[b]), default=None)
    if best is not None and opened[best] > 0:
        return {"constraints": [best.name], "alone_opens_starts": opened[best]}
    ranked = sorted((b for b in counts if counts[b]), key=lambda b: -counts[b])
    if not ranked:  # every step is fine, yet no window: the night ends too soon
        return {"constraints": ["NIGHT_END"], "alone_opens_starts": 0}
    return {"constraints": [b.name for b in ranked[:2]], "alone_opens_starts": 0}


def _closest(reasons: np.ndarray, now_step: int) -> int:
    r = np.asarray(reasons[now_step:], dtype=np.int64) & ~_NIGHT_END
    nbits = np.zeros(r.shape, dtype=np.int64)
    for bit in Reason:
        nbits += (r & int(bit)) != 0
    return now_step + int(np.argmin(nbits))


def _detail(name: str, spec: RequestSpec, config: ObservatoryConfig, sky: SkyGrid, cond: ConditionsGrid,
            feas, now_step: int, fmt_t, focus: np.ndarray | None = None) -> tuple[str, int | None]:
    """How close the named constraint came, in its own units, and the grid step where it did.

    ``focus`` (bool over the steps from now_step): look only there when any is True (the times
    when nothing but the binding constraints fail), so "closest" is a time that would work.
    """
    t = sky.night.times_unix
    sl = slice(now_step, None)
    use = focus if focus is not None and focus.any() else None

    def at(i: int) -> str:
        return fmt_t(t[now_step + i])

    def best(v, mode: str) -> int:
        v = np.asarray(v, dtype=np.float64)
        if mode == "min":
            v = np.where(np.isnan(v), np.inf, v)
            return int(np.argmin(np.where(use, v, np.inf) if use is not None else v))
        v = np.where(np.isnan(v), -np.inf, v)
        return int(np.argmax(np.where(use, v, -np.inf) if use is not None else v))

    if name == "ALTITUDE":
        alt = np.asarray(sky.alt_deg[0, sl], dtype=np.float64)
        i = best(alt, "max")
        tel = config.telescope
        txt = (f"highest altitude {alt[i]:.1f} deg at {at(i)}; the telescope needs "
               f"{tel.min_altitude_deg:g} to {tel.max_altitude_deg:g} deg")
        if spec.max_airmass is not None:
            am = np.asarray(sky.airmass[0, sl], dtype=np.float64)
            j = int(np.argmin(np.where(np.isfinite(am), am, np.inf)))
            best = f"{am[j]:.2f}" if np.isfinite(am[j]) else "none (below the horizon)"
            txt += f"; lowest airmass {best}, its max_airmass is {spec.max_airmass:g}"
        return txt, now_step + i
    if name == "SEEING":
        i = best(cond.seeing_arcsec[sl], "min")
        return (f"best seeing {cond.seeing_arcsec[now_step + i]:.2f}\" at {at(i)}; its max_seeing_arcsec is "
                f"{spec.max_seeing_arcsec:g}"), now_step + i
    if name == "PWV":
        i = best(cond.pwv_mm[sl], "min")
        return f"driest {cond.pwv_mm[now_step + i]:.2f} mm at {at(i)}; its max_pwv_mm is {spec.max_pwv_mm:g}", now_step + i
    if name == "RESOLUTION":
        v = np.where(np.isfinite(feas.fwhm_arcsec[0, sl]), feas.fwhm_arcsec[0, sl], np.inf)
        i = best(v, "min")
        return (f"sharpest predicted image {v[i]:.3f}\" in band {spec.band} at {at(i)}; its resolution_arcsec is "
                f"{spec.resolution_arcsec:g}"), now_step + i
    if name == "TRANSMISSION":
        v = np.nan_to_num(feas.transmission[0, sl], nan=0.0)
        i = best(v, "max")
        return f"best transmission {v[i]:.3f} at {at(i)}; the floor is {TRANSMISSION_FLOOR:g}", now_step + i
    if name == "CLOUD":
        i = best(cond.cloud_mag[sl], "min")
        return (f"least cloud {cond.cloud_mag[now_step + i]:.2f} mag at {at(i)}; its max_cloud_mag is "
                f"{spec.max_cloud_mag:g}"), now_step + i
    if name == "MOON_SEP":
        up = sky.moon_alt_deg[sl] > 0
        sep = np.where(up, sky.moon_sep_deg[0, sl], np.nan)
        if np.all(np.isnan(sep)):
            return "the Moon is down all night", None
        i = best(sep, "max")
        if np.isnan(sep[i]):
            i = int(np.nanargmax(sep))
        return (f"largest Moon separation while the Moon is up {sep[i]:.1f} deg at {at(i)}; its min_moon_sep_deg "
                f"is {spec.min_moon_sep_deg:g}"), now_step + i
    if name == "SKY_BRIGHTNESS":
        parts, idx = [], None
        if spec.max_moon_illum is not None:
            parts.append(f"Moon illuminated fraction {float(np.max(sky.moon_illum)):.2f} while up; "
                         f"its max_moon_illum is {spec.max_moon_illum:g}")
        if spec.min_sky_mag is not None:
            v = np.nan_to_num(feas.sky_mag[0, sl], nan=-99)
            i = best(v, "max")
            idx = now_step + i
            parts.append(f"darkest sky {v[i]:.2f} mag/arcsec^2 at {at(i)}; its min_sky_mag is {spec.min_sky_mag:g}")
        return "; ".join(parts) or "sky too bright", idx
    if name == "WINDOW":
        parts = []
        if spec.not_before or spec.not_after:
            parts.append(f"its window is {iso(spec.not_before) or '-'} to {iso(spec.not_after) or '-'}")
        if spec.period_days is not None:
            parts.append(f"periodic window phase {spec.phase_min:g}-{spec.phase_max:g} of {spec.period_days:g} d "
                         f"from {iso(spec.period_epoch)}")
        return "; ".join(parts) + f"; the night runs {fmt_t(t[0])} to {fmt_t(t[-1] + sky.night.step_s)}", None
    if name == "CLOSURE":
        closed = np.count_nonzero(feas.reasons[0, sl] & int(Reason.CLOSURE)) * sky.night.step_s / 3600.0
        return f"dome closed (operator, wind or humidity) for {closed:.1f} h of the night", None
    if name == "TWILIGHT":
        return f"band {spec.band} needs the Sun below {config.band(spec.band).sun_alt_limit_deg:g} deg", None
    if name == "SUN":
        return f"within {config.safety.sun_avoidance_deg:g} deg of the Sun", None
    return "", None


def explain(config: ObservatoryConfig, spec: RequestSpec, night: Night, sky: SkyGrid, cond: ConditionsGrid,
            doc: dict[str, Any], weights: dict[str, float], solver_reason: str | None = None) -> dict[str, Any]:
    """Why request ``spec`` is (not) in the plan ``doc`` (report.export.plan_document).

    ``sky`` holds this request's target alone (row 0) on the plan's night; ``cond`` the plan's
    conditions on the same grid.
    """
    tz = ZoneInfo(config.site.timezone)

    def fmt_t(x: float | datetime) -> str:
        t = utc(x) if not isinstance(x, datetime) else x
        return f"{t.strftime('%H:%M')} UTC ({t.astimezone(tz).strftime('%H:%M')} local)"

    out: dict[str, Any] = {
        "request_id": spec.id, "target": spec.target, "program": spec.program, "band": spec.band,
        "status": spec.status, "plan_version": doc["plan"]["version"], "night": doc["night"]["date"],
        "solver_reason": solver_reason,
    }
    mine = [e for e in doc["entries"] if e["request_id"] == spec.id]
    lines: list[str] = []
    head = f"Request {spec.id} {spec.target} ({spec.program}, band {spec.band}, {spec.exposure_s:g} s)"
    if mine:
        out["state"] = "scheduled"
        out["entries"] = mine
        lines.append(f"{head} is scheduled in plan version {doc['plan']['version']}:")
        for e in mine:
            lines.append(f"  execution {e['execution'] + 1}: {fmt_t(_t(e['start']))} to {fmt_t(_t(e['end']))}, "
                         f"airmass {e['airmass_start']:.2f}->{e['airmass_end']:.2f}, FWHM "
                         f"{e['predicted_fwhm_arcsec']:.2f}\", PWV {e['predicted_pwv_mm']:.1f} mm, merit {e['merit']:.2f}")
        owed = spec.remaining_repeats
        if owed > len(mine) and spec.status != RequestStatus.DONE:
            lines.append(f"  {owed - len(mine)} more execution(s) owed do not fit tonight"
                         + (f" ({solver_reason})" if solver_reason else ""))
        out["explanation"] = lines
        return out
    if spec.status in CLOSED_STATUSES:
        out["state"] = "not_in_queue"
        out["explanation"] = [f"{head} is {spec.status}: it is not in the queue, so no plan schedules it."]
        return out

    feas = evaluate([spec], np.array([0]), sky, cond, config)
    n_t = night.n_times
    planned_from = _t(doc["plan"]["planned_from"])
    now_step = night.step_of(planned_from)
    d = int(feas.duration_steps[0])
    step = night.step_s
    starts = np.flatnonzero(feas.start_ok[0, now_step:]) + now_step
    out["duration_s"] = d * step

    if starts.size == 0:
        out["state"] = "never_feasible"
        b = binding(feas.reasons[0], d, now_step)
        out["binding"] = b["constraints"]
        out["binding_description"] = [DESCRIPTION[Reason[n]] for n in b["constraints"]]
        bits = 0
        for n in b["constraints"]:
            bits |= int(Reason[n])
        only = ((np.asarray(feas.reasons[0, now_step:], dtype=np.int64) & ~bits & ~_NIGHT_END) == 0)
        details = [(n, *_detail(n, spec, config, sky, cond, feas, now_step, fmt_t, only)) for n in b["constraints"]]
        # Closest: where the binding constraint itself came closest, else the fewest failing constraints.
        c = next((i for _, _, i in details if i is not None), None)
        if c is None:
            c = _closest(feas.reasons[0], now_step) if n_t else 0
        out["closest"] = {"time": iso(utc(sky.night.times_unix[c])),
                          "failing": reason_names(int(feas.reasons[0, c]) & ~_NIGHT_END)}
        out["details"] = {n: txt for n, txt, _ in details if txt}
        ok_runs = [(a, z) for a, z in runs(feas.ok[0, now_step:])]
        longest = max((z - a for a, z in ok_runs), default=0)
        out["longest_ok_minutes"] = round(longest * step / 60.0, 1)
        both = " and ".join(out["binding_description"])
        lines.append(f"{head} is never feasible on the night of {doc['night']['date']}"
                     + (" after the plan's start" if now_step else "") + f": binding constraint {both}.")
        for n, txt, _ in details:
            if txt:
                lines.append(f"  {n}: {txt}")
        if b["alone_opens_starts"]:
            lines.append(f"  lifting {b['constraints'][0]} alone would open {b['alone_opens_starts'] * step / 60:.0f} "
                         f"min of start times")
        if longest:
            lines.append(f"  every constraint holds for at most {longest * step / 60:.0f} min in a row; it needs "
                         f"{d * step / 60:.0f} min (setup + exposure)")
        lines.append(f"  closest at {fmt_t(sky.night.times_unix[c])}; failing there: "
                     f"{', '.join(out['closest']['failing']) or 'nothing'}")
        out["explanation"] = lines
        return out

    # Feasible, yet not in the plan: what holds its time.
    out["state"] = "displaced"
    t = sky.night.times_unix
    ent = list(doc["entries"])
    e0 = np.array([_t(e["start"]).timestamp() - float(e.get("transition_s") or 0.0) for e in ent])
    e1 = np.array([_t(e["end"]).timestamp() for e in ent])
    ev = np.array([float(e.get("value") or 0.0) for e in ent])
    s0 = t[starts]
    s1 = s0 + d * step
    if ent:
        overlap = (e0[None, :] < s1[:, None]) & (e1[None, :] > s0[:, None])  # [starts, entries]
        cost = overlap.astype(np.float64) @ ev
    else:
        overlap = np.zeros((starts.size, 0), dtype=bool)
        cost = np.zeros(starts.size)
    base = base_value(spec, weights)
    own = base * feas.merit[0, starts].astype(np.float64)
    best = int(np.argmax(own - cost))
    need = float(cost[best])
    windows = _start_runs(starts, t)
    blockers = sorted({i for i in np.flatnonzero(overlap.any(axis=0))}, key=lambda i: e0[i])
    at_best = [ent[i] for i in np.flatnonzero(overlap[best])] if ent else []
    out["feasible_windows"] = windows
    out["feasible_minutes"] = round(starts.size * step / 60.0, 1)
    out["displaced_by"] = [{"request_id": ent[i]["request_id"], "target": ent[i]["target"], "start": ent[i]["start"],
                            "end": ent[i]["end"], "value": ent[i]["value"]} for i in blockers]
    out["best_start"] = iso(utc(t[starts[best]]))
    out["value_at_best"] = round(float(own[best]), 4)
    out["value_needed"] = round(need, 4)
    merit_b = float(feas.merit[0, starts[best]])
    need_prio = None
    if base > 0 and merit_b > 0:
        p = math.floor(spec.priority * need / (base * merit_b)) + 1
        need_prio = p if p <= 10 else None
    out["priority_needed"] = need_prio

    win_txt = ", ".join(f"{fmt_t(_t(w['start']))[:5]}-{fmt_t(_t(w['last_start']))[:5]}" for w in windows[:4])
    lines.append(f"{head} is feasible but displaced: it could start in {out['feasible_minutes']:.0f} min of start "
                 f"times (UTC {win_txt}{', ...' if len(windows) > 4 else ''}) and needs {d * step / 60:.0f} min.")
    if blockers:
        lines.append(f"  entries that overlap its feasible starts ({len(blockers)}):")
        for i in blockers[:8]:
            e = ent[i]
            lines.append(f"    #{e['request_id']} {e['target']} ({e['program']}, {e['band']}) "
                         f"{_t(e['start']).strftime('%H:%M')}-{_t(e['end']).strftime('%H:%M')} UTC, value {e['value']:.3f}")
        if len(blockers) > 8:
            lines.append(f"    ... and {len(blockers) - 8} more")
    if at_best:
        names = ", ".join(f"#{e['request_id']}" for e in at_best)
        lines.append(f"  best chance at {fmt_t(t[starts[best]])}: it would push out {names} (value {need:.3f}); "
                     f"it has {own[best]:.3f} (weight x priority {spec.priority}/5 x {spec.exposure_s / 3600:.2f} h x "
                     f"merit {merit_b:.2f}), so it needs a value above {need:.3f} to win")
        lines.append("  " + (f"priority {need_prio} would be enough there" if need_prio else
                             "even priority 10 would not be enough there") +
                     " (local estimate; the solver weighs the whole night)")
    else:
        lines.append(f"  at {fmt_t(t[starts[best]])} no entry overlaps it, but the free time there is too short "
                     f"once the slews in and out are counted"
                     + (f", or the solver stopped at a gap of {100 * doc['plan']['gap']:.1f} %" if doc["plan"]["gap"] else ""))
    out["explanation"] = lines
    return out


def _start_runs(starts: np.ndarray, t: np.ndarray) -> list[dict[str, str]]:
    """Runs of consecutive start steps as {start, last_start} (UTC ISO)."""
    if starts.size == 0:
        return []
    cut = np.flatnonzero(np.diff(starts) != 1) + 1
    return [{"start": iso(utc(t[g[0]])), "last_start": iso(utc(t[g[-1]]))} for g in np.split(starts, cut)]
