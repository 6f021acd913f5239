"""The plan contract: one planned entry and a built plan; a stored plan version as read back.
Storage, reports, the service and the web page read these types; they never import the solver.
Imports nothing of ours."""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import date, datetime


@dataclass(frozen=True)
class PlanEntry:
    """One planned execution of a request. Times are aware UTC; steps index the night grid.

    The entry occupies grid steps [start_step, end_step): setup (acquisition) then exposure.
    The transition before it (slew + settle + instrument/filter change from the previous
    entry) happens in the gap before start_step; ``transition_s`` is that time, ``slew_s``
    its axis-motion part. Predicted values are at the start step unless named _end.
    """

    request_id: int
    execution: int  # 0 = the next execution still owed, 1 = the one after, ...
    start: datetime
    end: datetime
    start_step: int
    end_step: int
    slew_s: float  # axis motion from the previous entry's target (0 for the first entry)
    transition_s: float  # slew + settle + instrument or filter change (0 for the first entry)
    setup_s: float  # acquisition and set-up on this target, inside [start, end)
    airmass_start: float
    airmass_end: float  # at the last step the entry covers
    predicted_fwhm_arcsec: float
    predicted_pwv_mm: float
    transmission: float
    merit: float  # merit at the start step
    moon_sep_deg: float
    value: float  # science value counted in the objective (see module docstring)
    program: str = ""
    target: str = ""
    band: str = ""
    instrument: str = ""
    fixed: bool = False  # kept from the previous plan (in progress or inside the freeze horizon)
    # Factors of ``value`` (docs/solver.md): program tier, urgency and the remaining
    # opportunities it came from (nights, tonight included), the program's balance factor.
    tier: int = 2
    urgency: float = 1.0
    opportunities_left: int | None = None
    balance: float = 1.0
    ra_deg: float | None = None  # ICRS position at the start (a moving target's position then)
    dec_deg: float | None = None
    strehl: float | None = None  # predicted AO Strehl ratio at the start, where AO is modelled
    surface_efficiency: float | None = None  # dish Ruze efficiency at the start, where it applies


@dataclass(frozen=True)
class PlanResult:
    """A built night plan and how it was found. ``violations`` must be empty to store it.

    objective/bound/gap are in science-value units on the model objective: the sum of the
    entries' values plus ``stability_bonus`` (non-zero only when re-planning against a previous
    plan). gap = (bound - objective) / max(bound, tiny); 0 when proven optimal.
    """

    entries: tuple[PlanEntry, ...]
    unscheduled: tuple[tuple[int, str], ...]  # (request_id, short reason)
    solver_status: str  # OPTIMAL, FEASIBLE, or GREEDY (best heuristic plan kept, greedy or better), or EMPTY
    objective: float
    bound: float
    gap: float
    runtime_s: float  # CP-SAT wall time
    greedy_objective: float
    used_greedy: bool
    timings: dict  # seconds: sky, feasibility, model, solve, check
    violations: tuple[str, ...]
    stability_bonus: float = 0.0
    now_step: int = 0
    message: str = ""
    stats: dict = field(default_factory=dict)  # model size: requests, executions, arcs, buckets

    @property
    def science_value(self) -> float:
        return self.objective - self.stability_bonus


# --------------------------------------------------------------------------- a stored plan, read back

@dataclass(frozen=True)
class StoredEntry:
    """One entry of a stored plan version as storage reads it back (no grid steps: the night's
    grid is not stored). ``exposure_s`` is what the entry exposes (less than the request's after
    a partial outcome)."""

    request_id: int
    execution: int
    start: datetime
    end: datetime
    slew_s: float
    transition_s: float
    setup_s: float
    exposure_s: float
    airmass_start: float
    airmass_end: float
    fwhm_arcsec: float
    pwv_mm: float
    transmission: float
    merit: float
    moon_sep_deg: float | None
    value: float
    fixed: bool
    tier: int = 2
    urgency: float = 1.0
    opportunities_left: int | None = None
    balance: float = 1.0
    ra_deg: float | None = None  # position at the start (moving targets: theirs then); None in older plans
    dec_deg: float | None = None
    strehl: float | None = None  # predicted AO Strehl ratio at the start
    surface_efficiency: float | None = None  # dish Ruze efficiency at the start


@dataclass(frozen=True)
class RequestLabel:
    """What readers of a plan show of a request: its name, program, where it points, its band."""

    id: int
    program: str
    target: str
    ra_deg: float
    dec_deg: float
    band: str
    instrument: str | None
    body: str | None = None  # a moving target's body name (tables: see the request)


@dataclass(frozen=True)
class ConditionsLabel:
    """The conditions report a plan was built on."""

    id: int
    source: str
    issued_at: datetime


@dataclass(frozen=True)
class StoredPlan:
    """One stored plan version with what its reports need, read in one go by storage
    (db.plans.stored_plan). Reports take this and never query."""

    version: int
    night: date
    created_at: datetime
    reason: str
    planned_from: datetime
    solver_status: str
    objective: float
    bound: float
    gap: float
    runtime_s: float
    greedy_objective: float | None
    active: bool
    superseded_at: datetime | None
    previous_version: int | None
    summary: dict  # unscheduled, timings, site, telescope, conditions_covered_fraction, queue_size, ...
    diff: dict  # added / dropped / moved against the previous version
    entries: tuple[StoredEntry, ...]  # in start order
    requests: dict[int, RequestLabel]  # every request named by an entry or in the summary's unscheduled
    conditions_report_id: int | None
    conditions: ConditionsLabel | None  # None: no report, or it was deleted
