"""The season outlook's data: what one realization records, and the aggregation over realizations.

A realization is one weather history through the season: night after night the planner plans
from the forecast, the plan meets the weather that came, and the night's outcome is recorded
(``NightOutcome``). ``aggregate`` turns the realizations' outcomes into the outlook document
(the JSON of `nightplan season simulate`); ``outlook_tables`` gives its CSV tables. Both are
pure and independent of the order in which realizations arrive (they are sorted first), so
the document is the same whatever the number of workers that produced them.

Definitions (docs/season.md):

- charged hours: the hours a program is charged for its executed entries that night;
- completion of a program: the share of its queued work done in the season, work counted in
  exposure hours: sum over its requests of min(done, needed) x hours per execution, divided by
  the sum of needed x hours per execution (a program with nothing queued: null);
- a request completes when its executions done reach those needed at the season's start (the
  simulation stops executing a request once it expires past ``not_after``);
- spreads over realizations: mean, and 10th / 90th percentiles with numpy's linear
  interpolation between order statistics.
"""

from __future__ import annotations

import csv
import io
from dataclasses import dataclass, field
from datetime import date
from typing import Any, Mapping, Sequence

import numpy as np

HOURS_DIGITS = 3  # 3.6 s: far below any exposure; stable text for identical results
FRACTION_DIGITS = 4


@dataclass(frozen=True)
class ProgramInfo:
    code: str
    tier: int | None
    allocated_h: float


@dataclass(frozen=True)
class RequestInfo:
    id: int
    program: str
    needed: int  # executions still needed at the season's start
    hours_per_execution: float  # exposure hours of one execution


@dataclass(frozen=True)
class NightOutcome:
    """One night of one realization."""

    date: date
    charged_h: Mapping[str, float] = field(default_factory=dict)  # program code -> hours charged
    done: Mapping[int, int] = field(default_factory=dict)  # request id -> executions done that night
    hours_by_band: Mapping[str, float] = field(default_factory=dict)  # band -> hours observed
    weather_lost_h: float = 0.0  # dark hours with the dome closed for weather
    idle_dark_h: float = 0.0  # dark hours open to the sky with nothing executing
    failed: Mapping[int, int] = field(default_factory=dict)  # request id -> executions failed that night
    builds: int = 0  # plans built that night (the first one and the re-plans)


@dataclass(frozen=True)
class RealizationOutcome:
    realization: int
    nights: tuple[NightOutcome, ...]


# --------------------------------------------------------------------------- spreads

def spread(values: Sequence[float] | np.ndarray, digits: int = HOURS_DIGITS) -> dict[str, float | None]:
    """Mean, 10th and 90th percentile over realizations (None for an empty sequence)."""
    v = np.asarray(values, dtype=np.float64)
    if v.size == 0 or not np.all(np.isfinite(v)):
        return {"mean": None, "p10": None, "p90": None}
    p10, p90 = np.percentile(v, [10.0, 90.0])
    return {"mean": round(float(v.mean()), digits), "p10": round(float(p10), digits), "p90": round(float(p90), digits)}


def _sorted(outcomes: Sequence[RealizationOutcome]) -> list[RealizationOutcome]:
    out = sorted(outcomes, key=lambda o: o.realization)
    if not out:
        raise ValueError("no realizations to aggregate")
    dates = [n.date for n in out[0].nights]
    for o in out:
        if [n.date for n in o.nights] != dates:
            raise ValueError(f"realization {o.realization} covers other nights than realization {out[0].realization}")
    if len({o.realization for o in out}) != len(out):
        raise ValueError("a realization appears twice")
    return out


# --------------------------------------------------------------------------- per realization totals

def done_executions(outcome: RealizationOutcome) -> dict[int, int]:
    total: dict[int, int] = {}
    for night in outcome.nights:
        for rid, k in night.done.items():
            total[rid] = total.get(rid, 0) + int(k)
    return total


def charged_hours(outcome: RealizationOutcome) -> dict[str, float]:
    total: dict[str, float] = {}
    for night in outcome.nights:
        for code, h in sorted(night.charged_h.items()):
            total[code] = total.get(code, 0.0) + float(h)
    return total


def completion(program: str, requests: Sequence[RequestInfo], done: Mapping[int, int]) -> float | None:
    mine = [r for r in requests if r.program == program and r.needed > 0]
    need = sum(r.needed * r.hours_per_execution for r in mine)
    if need <= 0:
        return None
    got = sum(min(done.get(r.id, 0), r.needed) * r.hours_per_execution for r in mine)
    return got / need


# --------------------------------------------------------------------------- the document

def aggregate(programs: Sequence[ProgramInfo], requests: Sequence[RequestInfo],
              outcomes: Sequence[RealizationOutcome], *, start: date, end: date, seed: int) -> dict[str, Any]:
    """The outlook document (`season.json`, `--json`)."""
    runs = _sorted(outcomes)
    done = [done_executions(o) for o in runs]
    charged = [charged_hours(o) for o in runs]
    return {
        "from": start.isoformat(),
        "to": end.isoformat(),
        "realizations": len(runs),
        "seed": seed,
        "nights": len(runs[0].nights),
        "programs": [_program_row(p, requests, done, charged) for p in sorted(programs, key=_program_key)],
        "requests": [_request_row(r, done) for r in sorted(requests, key=lambda r: r.id)],
        "hours_by_band": _by_band(runs),
        "weather_lost_h": spread([sum(n.weather_lost_h for n in o.nights) for o in runs]),
        "idle_dark_h": spread([sum(n.idle_dark_h for n in o.nights) for o in runs]),
        "failed_executions": spread([sum(sum(n.failed.values()) for n in o.nights) for o in runs]),
        "builds_per_night": spread([sum(n.builds for n in o.nights) / max(len(o.nights), 1) for o in runs]),
        "cumulative_charged_h_by_tier": _cumulative_by_tier(programs, runs),
    }


def _program_key(p: ProgramInfo) -> tuple:
    return (p.tier is None, p.tier or 0, p.code)


def _program_row(p: ProgramInfo, requests, done, charged) -> dict[str, Any]:
    comp = [completion(p.code, requests, d) for d in done]
    return {
        "code": p.code,
        "tier": p.tier,
        "allocated_h": round(float(p.allocated_h), HOURS_DIGITS),
        "charged_h": spread([c.get(p.code, 0.0) for c in charged]),
        "completion": spread([] if comp and comp[0] is None else comp, FRACTION_DIGITS),
    }


def _request_row(r: RequestInfo, done: list[dict[int, int]]) -> dict[str, Any]:
    ok = [d.get(r.id, 0) >= r.needed for d in done]
    return {"id": r.id, "program": r.program, "p_complete": round(sum(ok) / len(ok), FRACTION_DIGITS)}


def _by_band(runs: list[RealizationOutcome]) -> dict[str, dict]:
    bands = sorted({b for o in runs for n in o.nights for b in n.hours_by_band})
    return {b: spread([sum(n.hours_by_band.get(b, 0.0) for n in o.nights) for o in runs]) for b in bands}


def _cumulative_by_tier(programs: Sequence[ProgramInfo], runs: list[RealizationOutcome]) -> dict[str, Any]:
    """Per tier, the charged hours summed from the season's first night to each night: spread per night."""
    tier_of = {p.code: ("none" if p.tier is None else str(p.tier)) for p in programs}
    tiers = sorted(set(tier_of.values()), key=lambda t: (t == "none", int(t) if t != "none" else 0))
    dates = [n.date.isoformat() for n in runs[0].nights]
    out: dict[str, Any] = {"dates": dates, "tiers": {}}
    for t in tiers:
        nightly = np.array([[sum(h for code, h in sorted(n.charged_h.items()) if tier_of.get(code) == t)
                             for n in o.nights] for o in runs])  # [realizations, nights]
        cum = np.cumsum(nightly, axis=1)
        if cum.shape[1] == 0:
            out["tiers"][t] = {"mean": [], "p10": [], "p90": []}
            continue
        p10, p90 = np.percentile(cum, [10.0, 90.0], axis=0)
        out["tiers"][t] = {k: [round(float(x), HOURS_DIGITS) for x in v]
                           for k, v in (("mean", cum.mean(axis=0)), ("p10", p10), ("p90", p90))}
    return out


# --------------------------------------------------------------------------- CSV tables

def outlook_tables(doc: Mapping[str, Any]) -> dict[str, str]:
    """CSV text per file name: programs.csv, requests.csv, bands.csv."""
    def table(header: list[str], rows: list[list[Any]]) -> str:
        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        w.writerow(header)
        w.writerows([["" if v is None else v for v in row] for row in rows])
        return buf.getvalue()

    stats = ("mean", "p10", "p90")
    programs = table(
        ["code", "tier", "allocated_h"] + [f"charged_h_{s}" for s in stats] + [f"completion_{s}" for s in stats],
        [[p["code"], p["tier"], p["allocated_h"]] + [p["charged_h"][s] for s in stats]
         + [p["completion"][s] for s in stats] for p in doc["programs"]])
    requests = table(["id", "program", "p_complete"], [[r["id"], r["program"], r["p_complete"]] for r in doc["requests"]])
    bands = table(["band"] + [f"hours_{s}" for s in stats],
                  [[b] + [v[s] for s in stats] for b, v in doc["hours_by_band"].items()])
    return {"programs.csv": programs, "requests.csv": requests, "bands.csv": bands}
