"""The independent plan checker: valid plans pass, deliberately broken plans fail with the
right complaint (overlap, short gap, infeasible time, outside the window, repeats)."""

from __future__ import annotations

from dataclasses import replace
from datetime import timedelta

import numpy as np
import pytest

from scheduler.planning.pipeline import build_plan
from scheduler.solve.checker import check_plan

from test_solver import CFG, T0, effort, make_cond, make_night, make_sky, req

N_T = 240


@pytest.fixture(scope="module")
def scene():
    night = make_night(N_T)
    alt = np.vstack([np.full(N_T, 60.0), np.full(N_T, 50.0),
                     np.concatenate([np.full(120, 45.0), np.full(120, 10.0)])])  # target 2 sets at step 120
    az = np.array([[0.0], [120.0], [240.0]]) * np.ones((1, N_T))
    sky = make_sky(night, alt, az)
    cond = make_cond(N_T, pwv=np.concatenate([np.full(120, 1.0), np.full(120, 6.0)]))
    reqs = [req(0, exposure_min=30, priority=9, not_before=T0, not_after=T0 + timedelta(minutes=150)),
            req(1, band="K", exposure_min=30, priority=8, max_pwv_mm=3.0),
            req(2, band="R", exposure_min=20, priority=7, repeats=2, min_spacing_s=1800)]
    res = build_plan(CFG, reqs, {"P1": 1.0}, night, cond, sky=sky, options=effort())
    specs = {r.id: r for r in reqs}
    rows = {r.id: i for i, r in enumerate(reqs)}
    return night, sky, cond, specs, rows, res


def check(scene, entries):
    night, sky, cond, specs, rows, _ = scene
    return check_plan(entries, specs, rows, sky, cond, CFG)


def move(e, night, start_step):
    d = e.end_step - e.start_step
    t = night.times_unix[start_step]
    from datetime import datetime, timezone
    st = datetime.fromtimestamp(float(t), tz=timezone.utc)
    return replace(e, start_step=start_step, end_step=start_step + d, start=st, end=st + timedelta(seconds=d * night.step_s))


def test_the_built_plan_passes(scene):
    res = scene[-1]
    assert len(res.entries) >= 3
    assert res.violations == ()
    assert check(scene, res.entries) == []


def test_overlap_fails(scene):
    night, res = scene[0], scene[-1]
    a, b = res.entries[0], res.entries[1]
    broken = [a, move(b, night, a.start_step + 2)] + list(res.entries[2:])
    v = check(scene, broken)
    assert any("overlap" in x for x in v)
    # the violation names the entry it blames (the later one), for callers that act on it
    ov = next(x for x in v if "overlap" in x)
    assert (ov.request_id, ov.execution) == (b.request_id, b.execution)


def test_gap_shorter_than_the_true_transition_fails(scene):
    night, res = scene[0], scene[-1]
    a, b = res.entries[0], res.entries[1]
    assert b.transition_s > 0
    tight = move(b, night, a.end_step)  # zero gap: the slew (60 s or more) cannot fit
    v = check(scene, [a, tight])
    assert any("shorter than the transition" in x for x in v), v


def test_infeasible_time_fails(scene):
    night, res = scene[0], scene[-1]
    r2 = [e for e in res.entries if e.request_id == 3][0]  # target 2 is below 20 deg after step 120
    v = check(scene, [move(r2, night, 150)])
    assert any("below the altitude limit" in x for x in v)
    k = [e for e in res.entries if e.request_id == 2][0]  # PWV over 3 mm after step 120
    v = check(scene, [move(k, night, 180)])
    assert any("PWV over the limit" in x for x in v)


def test_outside_window_fails(scene):
    night, res = scene[0], scene[-1]
    w = [e for e in res.entries if e.request_id == 1][0]  # not_after = T0 + 150 min
    v = check(scene, [move(w, night, 140)])
    assert any("after not_after" in x for x in v)


def test_repeats_spacing_and_count(scene):
    night, res = scene[0], scene[-1]
    rep = [e for e in res.entries if e.request_id == 3]
    assert len(rep) == 2
    close = [rep[0], move(rep[1], night, rep[0].end_step + 3)]
    assert any("min_spacing_s" in x for x in check(scene, close))
    third = replace(move(rep[1], night, rep[1].start_step + 31), execution=2)  # one more than the 2 repeats
    assert any("2 remain" in x for x in check(scene, rep + [third]))


def test_too_short_and_off_grid_entries_fail(scene):
    res = scene[-1]
    e = res.entries[0]
    short = replace(e, end_step=e.start_step + 3, end=e.start + timedelta(minutes=3))
    assert any("shorter than setup + exposure" in x for x in check(scene, [short]))
    off = replace(e, end_step=N_T + 5)
    assert any("outside the night grid" in x for x in check(scene, [off]))
    unknown = replace(e, request_id=999)
    assert any("unknown request" in x for x in check(scene, [unknown]))


def test_only_an_entry_in_progress_may_be_shorter_than_setup_plus_exposure(scene):
    """An entry in progress (held, begun before now) was sized when it began: the request may
    have been edited since, or it began before the grid's first step or ends after its last
    (pipeline.entries_on_grid holds the grid's part). Anything else that short fails."""
    night, sky, cond, specs, rows, res = scene
    e = move(res.entries[0], night, 10)
    short = replace(e, end_step=15, end=e.start + timedelta(minutes=5))
    assert short.end_step - short.start_step < e.end_step - e.start_step

    def complaints(entry, now_step):
        return [x for x in check_plan([entry], specs, rows, sky, cond, CFG, now_step=now_step)
                if "shorter than setup + exposure" in x]

    assert complaints(replace(short, fixed=True), now_step=12) == []
    assert complaints(replace(short, fixed=False), now_step=12) != []  # not held: it must be whole
    assert complaints(replace(short, fixed=True), now_step=10) != []  # frozen, not begun: whole too
    assert complaints(replace(short, fixed=True), now_step=0) != []


def test_closure_and_seeing_are_rechecked(scene):
    night, sky, cond, specs, rows, res = scene
    closed = replace(cond, dome_open=np.zeros(N_T, dtype=bool))
    v = check_plan(res.entries, specs, rows, sky, closed, CFG)
    assert len([x for x in v if "dome closed" in x]) == len(res.entries)
    strict = dict(specs)
    strict[1] = replace(specs[1], max_seeing_arcsec=0.5)  # the grid's seeing is 0.8
    v = check_plan(res.entries, strict, rows, sky, cond, CFG)
    assert any(x.startswith("request 1 ") and "seeing over the limit" in x for x in v)
