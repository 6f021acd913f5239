"""The science value in the plan: steep priorities, urgency across nights, strict tiers and
program balance, each with one right answer on a real night at the starter site."""

from __future__ import annotations

import dataclasses
from datetime import date, datetime, timedelta, timezone

import pytest

from scheduler.conditions.grid import conditions_on_grid
from scheduler.model.config import starter_config
from scheduler.model.request import RequestSpec
from scheduler.planning.pipeline import BuildOptions, build_plan
from scheduler.sky.night import night_for
from scheduler.solve.factors import ProgramState

NIGHT = date(2025, 12, 20)
T = datetime(2025, 12, 21, 3, 0, tzinfo=timezone.utc)  # about local midnight at the starter site
EFFORT = BuildOptions(effort=2, seed=1)


def _setup(**planning):
    config = starter_config()
    config = dataclasses.replace(config, planning=dataclasses.replace(config.planning, **planning))
    night = night_for(config.site, NIGHT, config.planning.step_s)
    cond = conditions_on_grid([], night.times_unix, config.defaults, None)
    return config, night, cond


def _req(i, program="A", exposure_min=60.0, start=T, minutes=70, priority=5, ra=90.0, dec=-40.0, **kw):
    kw.setdefault("not_before", start)
    kw.setdefault("not_after", start + timedelta(minutes=minutes))
    return RequestSpec(program=program, target=f"T{i}", ra_deg=ra, dec_deg=dec, band="V", exposure_s=exposure_min * 60,
                       priority=priority, id=i, **kw)


def _planned(res):
    assert not res.violations
    return {e.request_id for e in res.entries}


def test_two_priority_ten_requests_with_overlapping_windows_both_planned():
    config, night, cond = _setup()
    # 10 min in a 25-minute window inside the 30-min request's window; both fit in the night
    short = _req(1, exposure_min=10, minutes=25, priority=10)
    long_ = _req(2, exposure_min=30, start=T - timedelta(minutes=40), minutes=110, priority=10, ra=91.0)
    res = build_plan(config, [short, long_], {"A": ProgramState("A")}, night, cond, options=EFFORT)
    assert _planned(res) == {1, 2}


def test_priority_nine_for_ten_minutes_beats_priority_five_for_an_hour():
    config, night, cond = _setup()
    reqs = [_req(1, exposure_min=10, priority=9), _req(2, exposure_min=60, priority=5)]  # 13 + 63 min > 70
    res = build_plan(config, reqs, {"A": ProgramState("A")}, night, cond, options=EFFORT)
    assert _planned(res) == {1}


def test_the_request_whose_last_chance_is_tonight_wins():
    config, night, cond = _setup()
    # the same 70 minutes every night (a daily periodic window), the same target and exposure
    per = dict(period_epoch=T, period_days=1.0, phase_min=0.0, phase_max=70 / 1440, not_before=None)
    last = _req(1, not_after=datetime(2025, 12, 21, 8, 0, tzinfo=timezone.utc), **per)
    later = _req(2, not_after=datetime(2026, 2, 20, 8, 0, tzinfo=timezone.utc), **per)
    for order in ([last, later], [later, last]):  # not an accident of order
        res = build_plan(config, order, {"A": ProgramState("A")}, night, cond, options=EFFORT)
        assert _planned(res) == {1}
        byid = {e.request_id: e for e in res.entries}
        assert byid[1].opportunities_left == 1 and byid[1].urgency == pytest.approx(4.0)


def test_tier_one_priority_one_beats_tier_two_priority_ten():
    config, night, cond = _setup()
    reqs = [_req(1, program="LOW", priority=10), _req(2, program="TOP", priority=1)]
    progs = {"LOW": ProgramState("LOW", tier=2), "TOP": ProgramState("TOP", tier=1)}
    res = build_plan(config, reqs, progs, night, cond, options=EFFORT)
    assert _planned(res) == {2}
    assert {e.request_id: e.tier for e in res.entries} == {2: 1}
    assert [t["tier"] for t in res.stats["tiers"]] == [1, 2]


def test_tiers_are_strict_but_lower_tiers_fill_the_rest():
    config, night, cond = _setup()
    # tier 1 takes its slot; the tier-2 requests fill other free time
    reqs = [_req(1, program="TOP", priority=1), _req(2, program="LOW", priority=10),
            _req(3, program="LOW", priority=3, start=T + timedelta(hours=2), minutes=90)]
    progs = {"LOW": ProgramState("LOW", tier=2), "TOP": ProgramState("TOP", tier=1)}
    res = build_plan(config, reqs, progs, night, cond, options=EFFORT)
    assert _planned(res) == {1, 3}


def test_program_past_its_allocation_is_not_planned_unless_overfill():
    progs = {"A": ProgramState("A", hours_allocated=5.0, hours_charged=5.0)}
    reqs = [_req(1, minutes=200)]
    config, night, cond = _setup()
    res = build_plan(config, reqs, progs, night, cond, options=EFFORT)
    assert _planned(res) == set()
    assert any(rid == 1 and "allocation" in why for rid, why in res.unscheduled)
    config, night, cond = _setup(allow_overfill=True)
    res = build_plan(config, reqs, progs, night, cond, options=EFFORT)
    assert _planned(res) == {1}
