"""The factors of the science value and the charging rule, as pure functions."""

from __future__ import annotations

import math

import numpy as np
import pytest

from scheduler.model.charging import charged_hours, completion, resolve_charge
from scheduler.model.errors import InputError
from scheduler.solve.factors import (
    ProgramState, TierSolve, balance_factors, lexicographic, priority_weight, tier_budgets, tier_order,
    urgency_factor,
)


def test_priority_weight_is_geometric_and_one_at_five():
    assert priority_weight(5) == 1.0
    assert priority_weight(9) == 16.0
    assert priority_weight(1) == 1.0 / 16.0
    assert priority_weight(10, ratio=3.0) == 243.0
    assert np.allclose(priority_weight(np.array([4, 6])), [0.5, 2.0])
    # the defaults' promise: priority 9 for 10 minutes outweighs priority 5 for 60 minutes
    assert priority_weight(9) * (10 / 60) > priority_weight(5) * 1.0


def test_urgency_is_largest_on_the_last_opportunity_and_falls_to_one():
    u = urgency_factor(np.arange(1, 61), 4.0)
    assert u[0] == 4.0
    assert np.all(np.diff(u) < 0)
    assert u[1] == 2.5 and math.isclose(u[9], 1.3) and math.isclose(u[59], 1.05)
    assert urgency_factor(0, 4.0) == 4.0  # none found: shown at the largest
    assert urgency_factor(7, 1.0) == 1.0  # urgency switched off


def test_balance_follows_the_tier_pace_and_stops_past_allocation():
    progs = [
        ProgramState("A", 1, hours_allocated=10, hours_charged=5),  # tier fraction 0.5: at pace
        ProgramState("B", 1, hours_allocated=10, hours_charged=0),  # behind
        ProgramState("C", 1, hours_allocated=10, hours_charged=10),  # spent
        ProgramState("D", 1, hours_allocated=10, hours_charged=5),
        ProgramState("E", 2, hours_allocated=0, hours_charged=3),  # no allocation
        ProgramState("F", 2, hours_allocated=4, hours_charged=3.6),  # its own tier at 0.9
    ]
    b = balance_factors(progs)
    assert b["A"] == b["D"] == 1.0
    assert b["B"] == 2.0  # (1 - 0) / (1 - 0.5) = 2, the cap
    assert b["C"] == 0.0
    assert b["E"] == 1.0
    assert b["F"] == 1.0  # alone in its tier (with an allocation): its pace is the tier's
    over = balance_factors(progs, allow_overfill=True)
    assert over["C"] == 0.5 and over["B"] == 2.0
    # within the clip: tier fraction 0.25, a program at 0.4 -> 0.6 / 0.75 = 0.8
    b2 = balance_factors([ProgramState("X", 2, hours_allocated=10, hours_charged=4),
                          ProgramState("Y", 2, hours_allocated=10, hours_charged=1)], balance_max=3.0)
    assert math.isclose(b2["X"], 0.6 / 0.75) and math.isclose(b2["Y"], 0.9 / 0.75)


def test_lexicographic_gap_is_the_first_unproven_tier():
    proven = [TierSolve(1, 10.0, 10.0, "OPTIMAL"), TierSolve(2, 5.0, 5.0, "OPTIMAL")]
    assert lexicographic(proven) == (15.0, 15.0, 0.0, None)
    open2 = [TierSolve(1, 10.0, 10.0, "OPTIMAL"), TierSolve(2, 4.0, 5.0, "FEASIBLE")]
    obj, bound, gap, tier = lexicographic(open2)
    assert (obj, bound, tier) == (14.0, 15.0, 2) and math.isclose(gap, 0.2)
    open1 = [TierSolve(1, 9.0, 10.0, "FEASIBLE"), TierSolve(2, 4.0, 5.0, "FEASIBLE")]
    assert lexicographic(open1)[3] == 1 and math.isclose(lexicographic(open1)[2], 0.1)


def test_tier_order_and_budgets():
    assert tier_order([3, 1, 2, 1]) == [1, 2, 3]
    b = tier_budgets(10.0, {1: 10, 2: 30})
    assert math.isclose(b[1], 2.5) and math.isclose(b[2], 7.5)
    assert tier_budgets(1.0, {1: 0, 2: 100})[1] == 0.5


def test_charging_rule_per_outcome():
    assert resolve_charge("done", None) == "program" and resolve_charge("failed", None) == "none"
    with pytest.raises(InputError):
        resolve_charge("done", "telescope")
    kw = dict(planned_s=1800.0, request_exposure_s=1500.0)
    assert charged_hours("done", None, achieved_exposure_s=None, **kw) == 0.5
    assert charged_hours("done", "none", achieved_exposure_s=None, **kw) == 0.0
    assert charged_hours("partial", None, achieved_exposure_s=900.0, **kw) == 0.25
    assert charged_hours("failed", None, achieved_exposure_s=None, **kw) == 0.0
    assert charged_hours("failed", "program", achieved_exposure_s=None, **kw) == 0.5
    assert charged_hours("done", None, planned_s=None, request_exposure_s=1800.0, achieved_exposure_s=None) == 0.5
    assert completion(3, 4) == 0.75 and completion(0, 0) == 0.0


def test_request_factors_compose_the_base_value():
    from scheduler.model.request import RequestSpec
    from scheduler.solve.factors import request_factors

    specs = [RequestSpec(program="A", target="a", ra_deg=1.0, dec_deg=0.0, band="V", exposure_s=600.0, priority=9),
             RequestSpec(program="B", target="b", ra_deg=2.0, dec_deg=0.0, band="V", exposure_s=3600.0, priority=5),
             RequestSpec(program="Z", target="z", ra_deg=3.0, dec_deg=0.0, band="V", exposure_s=3600.0, priority=5)]
    progs = {"A": ProgramState("A", 1, weight=1.5, hours_allocated=10, hours_charged=0),
             "B": ProgramState("B", 3, hours_allocated=10, hours_charged=10)}
    f = request_factors(specs, progs, [1, 60, 3])
    assert list(f.tier) == [1, 3, 2]
    assert f.row(0) == {"tier": 1, "program_weight": 1.5, "priority_weight": 16.0, "exposure_h": 600 / 3600,
                        "opportunities_left": 1, "urgency": 4.0, "balance": 1.0}
    assert math.isclose(f.base[0], 1.5 * 16 * (1 / 6) * 4.0)
    assert f.base[1] == 0.0  # B is past its allocation
    assert math.isclose(f.base[2], 1.0 * 1.0 * 1.0 * 2.0)  # Z unknown: weight 1, tier 2, 3 nights left -> 2
