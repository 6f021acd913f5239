"""When can a request be observed tonight, and if never, which constraint binds. Pure.

``binding_constraint`` reads one request's reason bitmask row: the binding constraint is the
one that, if it alone were lifted, would open the most time (a constraint that is the only
failure somewhere); when every time fails two or more constraints, it is the one failing
most often. "Closest" is the time with the fewest failing constraints. The constraints and
their wording are the catalog's (constraints/catalog.py).
"""

from __future__ import annotations

from datetime import date
from typing import Any, Sequence

import numpy as np

from scheduler.conditions.grid import conditions_on_grid
from scheduler.constraints.catalog import CATALOG
from scheduler.constraints.feasibility import Feasibility, evaluate, reason_names
from scheduler.model.config import ObservatoryConfig
from scheduler.model.request import RequestSpec
from scheduler.model.timegrid import iso, runs, utc
from scheduler.sky.ephemeris import SkyGrid, sky_for
from scheduler.sky.night import Night, night_for


def binding_constraint(reasons_row: np.ndarray) -> dict[str, Any]:
    """The constraint that binds for one request over the night (see module docstring)."""
    r = np.asarray(reasons_row, dtype=np.int64)
    if r.size == 0:
        return {"constraint": None, "description": "the night has no grid times", "closest_index": None}
    best, best_opened = None, 0
    counts = {}
    for c in CATALOG:
        bit = int(c.reason)
        counts[c] = int(((r & bit) != 0).sum())
        opened = int(((r & ~bit) == 0).sum() - (r == 0).sum())
        if opened > best_opened:
            best, best_opened = c, opened
    if best is None:
        best = max(counts, key=lambda c: counts[c])
        if counts[best] == 0:
            return {"constraint": None, "description": "feasible", "closest_index": int(np.argmax(r == 0))}
    n_fail = np.array([bin(int(x)).count("1") for x in r])
    closest = int(np.argmin(n_fail))
    return {
        "constraint": best.name,
        "description": best.wording,
        "alone_opens_steps": best_opened,
        "closest_index": closest,
        "closest_failing": reason_names(int(r[closest])),
    }


def request_windows(spec: RequestSpec, feas: Feasibility, row: int, night: Night) -> dict[str, Any]:
    """Feasible start windows of one request (row of feas), or the binding constraint."""
    t = night.times_unix
    step = night.step_s
    dur = int(feas.duration_steps[row])
    out: dict[str, Any] = {"request_id": spec.id, "night": night.date.isoformat(), "duration_s": dur * step,
                           "windows": []}
    for a, b in runs(feas.start_ok[row]):
        out["windows"].append({
            "start": iso(utc(t[a])),  # earliest start
            "last_start": iso(utc(t[b - 1])),
            "end": iso(utc(t[b - 1] + dur * step)),  # latest end
            "best_merit": round(float(feas.merit[row, a:b].max()), 4),
        })
    if not out["windows"]:
        bc = binding_constraint(feas.reasons[row])
        out["binding"] = bc["description"]
        out["binding_constraint"] = bc["constraint"]
        if bc.get("closest_index") is not None and t.size:
            out["closest"] = {"time": iso(utc(t[bc["closest_index"]])), "failing": bc.get("closest_failing", [])}
    return out


def feasible_windows(config: ObservatoryConfig, spec: RequestSpec, night_date: date, samples: Sequence,
                     *, night: Night | None = None, sky: SkyGrid | None = None) -> dict[str, Any]:
    """Everything from scratch for one request (CLI `request show --night`)."""
    night = night or night_for(config.site, night_date, config.planning.step_s)
    sky = sky or sky_for(config.site, night, [spec])[0]
    cond = conditions_on_grid(samples, night.times_unix, config.defaults)
    feas = evaluate([spec], np.array([0]), sky, cond, config)
    out = request_windows(spec, feas, 0, night)
    out["conditions_covered_fraction"] = round(float(cond.covered.mean()), 3) if cond.covered.size else 0.0
    return out
