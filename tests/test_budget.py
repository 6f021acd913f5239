"""Work budgets and the fast paths of the build: none of these tests depends on the machine's
speed (no test asserts a duration; budgets are exhausted on purpose or bounded by effort), and
every vectorised or chunked computation is compared with a plain reference written here."""

from __future__ import annotations

import time
from dataclasses import fields, replace
from datetime import timedelta

import numpy as np
import pytest

from scheduler.constraints.feasibility import evaluate
from scheduler.model.timegrid import consecutive_runs
from scheduler.planning import pipeline
from scheduler.planning.pipeline import BuildOptions, build_plan
from scheduler.solve import bounds, budget
from scheduler.solve.budget import StageClock, WorkBudget
from scheduler.solve.greedy import greedy_plan
from scheduler.solve.objective import VALUE_SCALE, merit_buckets, plan_value, value_coef
from scheduler.solve.transitions import pair_transition_steps

from test_solver import CFG, T0, assert_clean, effort, exact_solve, problem_for, random_scene


# --------------------------------------------------------------------------- the budget

def test_the_limit_counts_from_the_start_of_planning():
    b = WorkBudget(10.0, started=time.perf_counter() - 4.0)  # 4 s already spent before the build
    assert b.left() <= 10.0 - 4.0 - b.finish_reserve_s + 1e-6
    stage = b.ruin_and_recreate()
    assert stage.time_limit_s <= b.left() + 1e-6 and stage.time_limit_s == pytest.approx(budget.RUIN_RECREATE_SHARE * b.left(), rel=0.05)


def test_a_spent_budget_gives_every_stage_nothing():
    b = WorkBudget(1.0, started=time.perf_counter() - 50.0)
    assert b.left() == 0.0
    for stage in (b.randomized_dispatch(), b.lagrangian(), b.ruin_and_recreate(), b.sequence(),
                  b.ruin_and_recreate_2()):
        assert stage.time_limit_s == 0.0
    assert not b.cpsat_can_pay(10)


def test_effort_budget_reads_no_clock_and_decides_cpsat_by_size_alone():
    b = WorkBudget(0.001, effort=3, started=time.perf_counter() - 1e6)  # the clock is irrelevant
    assert b.ruin_and_recreate().iterations == 3 * budget.RUIN_RECREATE_PER_EFFORT
    assert b.ruin_and_recreate().time_limit_s is None
    assert b.cpsat_can_pay(budget.CPSAT_MAX_LITERALS)
    assert not b.cpsat_can_pay(budget.CPSAT_MAX_LITERALS + 1)
    assert b.cpsat().deterministic_time_s == pytest.approx(3 * budget.CPSAT_DETERMINISTIC_PER_EFFORT)


def test_stage_clock():
    assert not any(StageClock(None).out_of_time() for _ in range(100))  # deterministic: never stops
    assert StageClock(0.0).out_of_time()  # nothing left: stops before the first iteration
    c = StageClock(1e6)
    assert not c.out_of_time() and c.spent() < 0.01


def test_a_build_started_past_its_limit_still_returns_a_checked_plan():
    """Every stage gets nothing (the limit is long gone): the build still answers with the
    greedy-or-better plan, checked, and says CP-SAT did not run."""
    night, sky, cond, reqs, w = random_scene(4, 10, 240)
    res = build_plan(CFG, reqs, w, night, cond, sky=sky,
                     options=BuildOptions(time_limit_s=0.5, started=time.perf_counter() - 100.0))
    assert_clean(res)
    assert res.objective >= res.greedy_objective - 1e-9 and res.entries
    assert res.stats["cpsat"].startswith("skipped") and not res.stats["cpsat_improved"]


def test_small_problem_under_effort_runs_cpsat_and_reports_it():
    night, sky, cond, reqs, w = random_scene(5, 8, 200)
    res = build_plan(CFG, reqs, w, night, cond, sky=sky, options=effort())
    assert_clean(res)
    decision = res.stats["cpsat"]
    assert decision.startswith("ran") or "within the gap tolerance" in decision
    assert isinstance(res.stats["cpsat_improved"], bool) and res.stats["cpsat_gain"] >= 0.0


def test_cpsat_skipped_for_a_large_model_under_effort_gives_its_share_to_the_search(monkeypatch):
    night, sky, cond, reqs, w = random_scene(6, 10, 240)
    monkeypatch.setattr(budget, "CPSAT_MAX_LITERALS", 0)
    called = []
    monkeypatch.setattr(pipeline, "solve_problem", lambda *a, **k: called.append(1))
    a = build_plan(CFG, reqs, w, night, cond, sky=sky, options=effort(seed=3))
    b = build_plan(CFG, reqs, w, night, cond, sky=sky, options=effort(seed=3))
    assert not called
    assert_clean(a)
    assert a.entries == b.entries and a.objective == b.objective  # still deterministic
    if a.stats["cpsat"].startswith("skipped: model"):
        assert a.stats["ruin_recreate_iterations"] > budget.RUIN_RECREATE_PER_EFFORT * 1 or a.gap <= 0.01
        assert a.solver_status in ("FEASIBLE", "OPTIMAL") and not a.used_greedy
        assert "CP-SAT skipped" in a.message


# --------------------------------------------------------------------------- vectorised = reference

def _reference_programme(dp, val):
    """The sequence DP one grid step at a time (the plain form of _SequenceDP._programme)."""
    n_t, K, NEG = dp.n_t, dp.K, -1e18
    F = np.full((n_t + 1, K), NEG)
    R = np.full((n_t + 1, K), NEG)
    for s in range(dp.t0, n_t + 1):
        R[s] = np.maximum(R[s - 1], F[s]) if s > dp.t0 else F[s]
        lo, hi = dp.by_start[s], dp.by_start[s + 1] if s < n_t else len(dp.S)
        for c in range(lo, hi):
            k2 = dp.CL[c]
            best = 0.0
            for k in range(K):
                t = s - dp.Lc[k, k2]
                if t >= dp.t0 and R[t, k] > best:
                    best = R[t, k]
            F[dp.END[c], k2] = max(F[dp.END[c], k2], best + val[c])
    return float(max(0.0, R[n_t].max()))


@pytest.mark.parametrize("seed, sectors", [(1, 8), (2, 8), (3, 8), (1, 0)])
def test_blocked_sequence_dp_equals_the_step_by_step_programme(seed, sectors):
    night, sky, cond, reqs, w = random_scene(seed, 9, 150)
    P, _ = problem_for(night, sky, cond, reqs, w)
    dp = bounds._SequenceDP(P, sectors)
    assert dp.block >= 1
    rng = np.random.default_rng(seed)
    for _ in range(3):
        mu = rng.uniform(0, 0.5, dp.n_exec) * float(dp.C.max())
        val = dp.C - mu[dp.E]
        fast, _ = dp.best_sequence(mu)
        assert fast == pytest.approx(_reference_programme(dp, val), rel=1e-12, abs=1e-6)


def test_request_classes_are_a_tighter_relaxation_than_sector_classes(monkeypatch):
    """Every request its own class: Lc is T itself, never below a class's smallest T, so the best
    sequence at any prices is worth no more, and the bound that refines with it is no weaker."""
    night, sky, cond, reqs, w = random_scene(4, 12, 150)
    P, _ = problem_for(night, sky, cond, reqs, w)
    coarse, fine = bounds._SequenceDP(P, 16), bounds._SequenceDP(P, 0)
    assert fine.K > coarse.K
    rng = np.random.default_rng(4)
    for _ in range(4):
        mu = rng.uniform(0, 0.5, coarse.n_exec) * float(coarse.C.max())
        assert fine.best_sequence(mu)[0] <= coarse.best_sequence(mu)[0] + 1e-6
    # the refined bound (9 class passes, then 3 with request classes) against the 9 class passes
    # alone: on this scene the request classes cut it (the refinement runs and helps)
    lower = plan_value(P, greedy_plan(P))
    refined = bounds.sequence_bound(P, lower, sectors=16, iterations=12, time_limit_s=None)
    monkeypatch.setattr(bounds, "REQUEST_CLASSES_MAX", -1)
    class_only = bounds.sequence_bound(P, lower, sectors=16, iterations=9, time_limit_s=None)
    assert refined.iterations == 12 and class_only.iterations == 9
    assert lower <= refined.bound < class_only.bound
    # under four iterations there is no refinement; with no time left, no slow pass either
    monkeypatch.setattr(bounds, "REQUEST_CLASSES_MAX", 400)
    assert bounds.sequence_bound(P, lower, sectors=16, iterations=3, time_limit_s=None).iterations == 3
    assert bounds.sequence_bound(P, lower, sectors=16, iterations=12, time_limit_s=0.0).iterations == 1
    # a request-class pass judged not to fit (a huge margin) is never built: the class passes
    # use its iterations instead (a limit of 1000 s, so the iteration counts decide)
    monkeypatch.setattr(bounds, "PASS_COST_MARGIN", 1e12)

    def never(*_a):
        raise AssertionError("request-class programme built")
    monkeypatch.setattr(bounds, "_requests_as_classes", never)
    sb = bounds.sequence_bound(P, lower, sectors=16, iterations=12, time_limit_s=1000.0)
    b, its = sb.bound, sb.iterations
    assert its == 12 and lower <= b <= class_only.bound


def _repeat_scene(seed: int):
    """Six requests, four of them repeated 2-3 times with 40-70 minutes between starts and
    10-20-minute exposures: a relaxation that ignores the spacing can stack the repeats."""
    night, sky, cond, reqs, w = random_scene(seed, 6, 200)
    rng = np.random.default_rng(seed)
    reqs = [replace(r, exposure_s=60.0 * float(rng.integers(10, 21)), repeats=int(rng.integers(2, 4)),
                    min_spacing_s=60.0 * float(rng.integers(40, 71))) if i < 4 else r
            for i, r in enumerate(reqs)]
    return night, sky, cond, reqs, w


@pytest.mark.parametrize("seed", [5, pytest.param(6, marks=pytest.mark.slow)])
def test_request_classes_keep_repeats_apart_and_stay_a_valid_bound(seed):
    """A request's repeat cannot follow it closer than spacing - its longest execution (the
    model's repeat rule, start to start >= max(duration, spacing)). The bound with that rule
    stays at or above CP-SAT's proven optimum (a solver that enforces spacing on its own), and
    is strictly tighter than the same programme with the model's bare T on the diagonal."""
    P = problem_for(*_repeat_scene(seed), bucket_steps=1)[0]
    assert sum(1 for x in P.execs if x.k > 0) >= 4
    out = exact_solve(P, hint=greedy_plan(P), k_best=50)
    assert out.status == "OPTIMAL"
    opt = round(out.objective * VALUE_SCALE)
    fine, bare = bounds._SequenceDP(P, 0), bounds._SequenceDP(P, 0)
    used = np.unique([x.req for x in P.execs])
    k = np.arange(used.size)
    bare.Lc[k, k] = P.T[used, used]
    assert (fine.Lc[k, k] > bare.Lc[k, k]).any()
    rng = np.random.default_rng(seed)
    for _ in range(4):  # never looser at any prices
        mu = rng.uniform(0, 0.5, fine.n_exec) * float(fine.C.max())
        assert fine.best_sequence(mu)[0] <= bare.best_sequence(mu)[0] + 1e-6
    mu = np.zeros(fine.n_exec)
    ruled = bounds._subgradient(fine, opt, mu, 80, StageClock(None), None, 1.0)[0]
    loose = bounds._subgradient(bare, opt, mu, 80, StageClock(None), None, 1.0)[0]
    assert opt <= ruled + 1e-6 < loose
    assert bounds.sequence_bound(P, opt, sectors=0, iterations=80, time_limit_s=None).bound >= opt


def test_repeat_rule_holds_with_a_repeated_request_in_progress():
    """Re-planning while the first execution of a repeated request runs (kept, its spacing still
    owed by the next): the request-class bound stays at or above CP-SAT's proven optimum."""
    scene = _repeat_scene(5)
    night, sky, cond, reqs, w = scene
    first = build_plan(CFG, reqs, w, night, cond, sky=sky, options=effort())
    repeated = {r.id for r in reqs if r.repeats > 1}
    entry = next(e for e in first.entries if e.request_id in repeated)
    P = problem_for(*scene, now_step=entry.start_step + 2, previous=list(first.entries), bucket_steps=1)[0]
    running = [x for x in P.execs if x.in_progress]
    assert running and any(x.req == running[0].req and x.k > 0 for x in P.execs)
    out = exact_solve(P, hint=greedy_plan(P), k_best=50)
    assert out.status == "OPTIMAL"
    opt = round(out.objective * VALUE_SCALE)
    assert bounds.sequence_bound(P, opt, sectors=0, iterations=60, time_limit_s=None).bound >= opt


def test_repeats_that_just_fit_their_window_stay_inside_the_bound():
    """Three 10-minute repeats at least 25 minutes apart, in a window where they fit only at
    that smallest spacing, back to back: the rule must allow exactly that gap (spacing -
    duration), no more (the bound with spacing - duration + 1 falls below the optimum)."""
    night, sky, cond, reqs, w = random_scene(7, 1, 200)
    start = T0 + timedelta(minutes=60)
    one = replace(reqs[0], exposure_s=600.0, repeats=3, min_spacing_s=1500.0)
    d = problem_for(night, sky, cond, [one], w)[0].execs[0].duration  # exposure and overheads, 1-minute steps
    one = replace(one, not_before=start, not_after=start + timedelta(minutes=2 * 25 + d + 1))
    P = problem_for(night, sky, cond, [one], w, bucket_steps=1)[0]
    assert len(P.execs) == 3 and int(np.ptp(P.execs[0].starts)) == 50  # one way to fit: 25 and 25 apart
    out = exact_solve(P, hint=greedy_plan(P), k_best=50)
    assert out.status == "OPTIMAL" and len(out.placements) == 3
    opt = round(out.objective * VALUE_SCALE)
    assert bounds.sequence_bound(P, opt, sectors=0, iterations=40, time_limit_s=None).bound >= opt


def test_transition_matrix_is_the_same_whatever_the_chunk():
    night, sky, cond, reqs, w = random_scene(7, 12, 180)
    P, feas = problem_for(night, sky, cond, reqs, w)
    rows = P.feas_rows
    start_ok = np.zeros((len(rows), P.n_t), dtype=bool)
    end_ok = np.zeros_like(start_ok)
    for ex in P.execs:
        start_ok[ex.req, ex.starts] = True
        ends = ex.starts + ex.duration
        end_ok[ex.req, ends[ends < P.n_t]] = True
    args = (CFG, P.step_s, sky.alt_deg[rows], sky.az_deg[rows], P.instruments, P.bands, end_ok, start_ok)
    one, tmax = pair_transition_steps(*args, chunk=10_000)
    for chunk in (1, 5):
        other, _ = pair_transition_steps(*args, chunk=chunk)
        assert np.array_equal(one, other)
    assert np.array_equal(one, P.T) and (one <= tmax[None, :]).all()


def test_merit_buckets_equal_the_bucket_by_bucket_minimum():
    rng = np.random.default_rng(11)
    for _ in range(50):
        mask = rng.random(300) < rng.uniform(0.05, 0.95)
        merit = rng.random(300).astype(np.float32)
        width = int(rng.integers(1, 13))
        lo, hi, coef = merit_buckets(mask, merit, 1.7, width)
        ref = [(b0, min(h, b0 + width - 1)) for a, h in consecutive_runs(np.flatnonzero(mask))
               for b0 in range(a, h + 1, width)]
        assert [(int(x), int(y)) for x, y in zip(lo, hi)] == ref
        assert coef.tolist() == [value_coef(1.7, float(np.min(merit[a:b + 1]))) for a, b in ref]


def test_feasibility_in_chunks_equals_one_evaluation(monkeypatch):
    night, sky, cond, reqs, w = random_scene(8, 11, 120)
    rows = np.arange(len(reqs))
    whole = evaluate(reqs, rows, sky, cond, CFG)
    monkeypatch.setattr(pipeline, "FEASIBILITY_CHUNK", 4)
    parts = pipeline._evaluate(reqs, rows, sky, cond, CFG, None)
    for f in fields(whole):
        assert np.array_equal(getattr(whole, f.name), getattr(parts, f.name), equal_nan=True), f.name


# --------------------------------------------------------------------------- one night per build

@pytest.mark.slow
def test_a_plan_build_computes_the_night_once(workdir):
    """`plan build`'s path (Planner.build_and_store with a real SQLite queue) asks for the
    night many times (the command, the planner, the stored document) and computes it once."""
    from datetime import date

    from conftest import run_cli
    from scheduler.db.session import open_db
    from scheduler.model.config import load_config
    from scheduler.planning.planner import Planner
    from scheduler.sky.night import night_for

    for i, (ra, band) in enumerate([(40.0, "V"), (80.0, "R"), (120.0, "J")]):
        run_cli("request", "add", "--program", "STAR-1", "--target", f"N{i}", "--ra", str(ra), "--dec", "-30",
                "--band", band, "--exposure", "900", cwd=workdir, check=True)
    config = load_config(workdir / "observatory.toml")
    db = open_db(str(workdir / "nightplan.sqlite"))
    night_for.cache_clear()
    planner = Planner(config)
    built = planner.build_and_store(db, night_date=date(2026, 12, 5), reason="test", time_limit_s=0.5)
    planner.night(date(2026, 12, 5))
    assert built.version is not None and built.result.violations == ()
    assert night_for.cache_info().misses == 1


# --------------------------------------------------------------------------- effort and seed from the command line

@pytest.mark.slow
def test_plan_build_with_an_effort_and_a_seed_repeats_its_plan(workdir, tmp_path_factory):
    """`plan build --effort N --seed S` on two copies of the same queue: the same entries at the
    same times and the same objective (nothing reads the clock); the plan document says what
    bounded the search."""
    import shutil

    from conftest import cli_json, run_cli

    for i, (ra, band, exp) in enumerate([(40.0, "V", 900), (60.0, "R", 1200), (80.0, "J", 600), (100.0, "I", 1500),
                                         (55.0, "B", 300), (70.0, "K", 1800)]):
        run_cli("request", "add", "--program", "STAR-1", "--target", f"E{i}", "--ra", str(ra), "--dec", "-30",
                "--band", band, "--exposure", str(exp), "--priority", str(3 + i), cwd=workdir, check=True)
    twin = tmp_path_factory.mktemp("twin")
    for name in ("observatory.toml", "nightplan.sqlite"):
        shutil.copy2(workdir / name, twin / name)
    docs = []
    for folder in (workdir, twin):
        out = run_cli("plan", "build", "--night", "2026-12-05", "--now", "2026-12-05T18:00:00Z", "--effort", "2",
                      "--seed", "7", cwd=folder, check=True).stdout
        assert "effort 2, seed 7" in out, out
        docs.append(cli_json("plan", "show", cwd=folder))
    a, b = ([(e["request_id"], e["start"], e["end"]) for e in d["entries"]] for d in docs)
    assert a and a == b
    assert docs[0]["plan"]["objective"] == docs[1]["plan"]["objective"]
    assert docs[1]["plan"]["search"] == {"time_limit_s": None, "effort": 2, "seed": 7}
    # a time limit from the command line takes the place of the configured effort
    run_cli("plan", "build", "--night", "2026-12-05", "--now", "2026-12-05T18:00:00Z", "--time-limit", "1",
            cwd=twin, check=True)
    assert cli_json("plan", "show", cwd=twin)["plan"]["search"] == {"time_limit_s": 1.0, "effort": None, "seed": 0}
    for args, field in [(["--effort", "2", "--time-limit", "3"], "effort"), (["--seed", "-1"], "seed")]:
        p = run_cli("plan", "build", "--night", "2026-12-05", *args, cwd=workdir)
        assert p.returncode == 2 and p.stderr.startswith(f"nightplan: error: {field}: "), p.stderr
        assert len(p.stderr.strip().splitlines()) == 1
