"""One simulated night, with the weather written by hand: plans from the forecast, executes
against the weather that came, applies the service's re-plan rule, records and charges.

The real pipeline plans every night (effort-bounded); the weather is a hand-made NightDraw so
each case knows what came. One invented target that transits near local midnight at the
starter config's fictional site."""

from __future__ import annotations

from datetime import date, datetime, timedelta, timezone
from pathlib import Path

import numpy as np
import pytest

from scheduler.conditions.grid import conditions_on_grid
from scheduler.model.config import starter_config
from scheduler.model.program import ProgramState
from scheduler.model.request import RequestSpec
from scheduler.planning.pipeline import BuildOptions, build_plan
from scheduler.season.engine import (
    NOWCAST_HOLD_S, SeasonSetup, apply_outcome, build_seed, expire, initial_state, replan_effort,
    report_at, run_night, simulate_nights,
)
from scheduler.season.weather import CLEAR, LOST, NightDraw, WeatherSeries, read_climatology_file
from scheduler.sky.ephemeris import SkyCache, compute_sky
from scheduler.sky.night import night_for

ROOT = Path(__file__).resolve().parents[1]
CFG = starter_config()
NIGHT_DATE = date(2026, 12, 16)
NIGHT = night_for(CFG.site, NIGHT_DATE, CFG.planning.step_s)
CLIM = read_climatology_file(ROOT / "scheduler" / "data" / "demo_queue" / "climatology.csv")


def _transiting_ra(dec: float) -> float:
    """RA (whole degrees) of the target highest at the middle of the night."""
    ras = np.arange(0.0, 360.0, 1.0)
    sky = compute_sky(CFG.site, NIGHT, ras, np.full(ras.size, dec))
    return float(ras[int(np.argmax(sky.alt_deg[:, NIGHT.n_times // 2]))])


RA = _transiting_ra(-30.0)


def spec(rid=1, **kw) -> RequestSpec:
    base = dict(program="ENG", target=f"T{rid}", ra_deg=RA, dec_deg=-30.0, band="V", exposure_s=3600.0,
                max_seeing_arcsec=1.0, id=rid)
    base.update(kw)
    return RequestSpec(**base)


def setup_for(specs, effort=1) -> SeasonSetup:
    return SeasonSetup(CFG, CLIM, tuple(specs), (ProgramState("ENG", 2, 1.0, 10.0),), (NIGHT_DATE,),
                       seed=3, effort=effort)


def series(seeing, *, dome=True, times=None) -> WeatherSeries:
    t = NIGHT.times_unix if times is None else times
    n = t.shape[0]

    def full(v, dtype=np.float64):
        return np.broadcast_to(np.asarray(v, dtype=dtype), (n,)).copy()

    return WeatherSeries(t, full(seeing), full(1.0), full(0.0), full(5.0), full(20.0), full(dome, bool))


def draw(actual: WeatherSeries, forecast: WeatherSeries, state=CLEAR, forecast_state=CLEAR) -> NightDraw:
    return NightDraw(NIGHT_DATE, state, forecast_state, actual, forecast)


def night_run(specs, actual, forecast, **kw):
    setup = setup_for(specs)
    return run_night(setup, 0, NIGHT, draw(actual, forecast, **kw), setup.specs, SkyCache())


def first_plan(specs, forecast):
    """The plan the night's first build makes (same inputs, effort and seed as run_night)."""
    cond = conditions_on_grid(forecast.samples(), NIGHT.times_unix, CFG.defaults)
    return build_plan(CFG, list(specs), setup_for(specs).planner_programs({}), NIGHT, cond,
                      options=BuildOptions(effort=1, seed=build_seed(3, 0, NIGHT_DATE, 0)))


def test_weather_as_forecast_the_entry_is_done_and_charged_its_planned_time():
    s = spec()
    plan = first_plan([s], series(0.6))
    assert len(plan.entries) == 1
    e = plan.entries[0]
    specs, out = night_run([s], series(0.6), series(0.6))
    assert out.done == {1: 1} and out.failed == {}
    assert specs[0].status == "done" and specs[0].completed_repeats == 1
    # charged: the entry's time as planned (setup + exposure), no transition for the night's first entry
    assert out.charged_h["ENG"] == pytest.approx((e.end - e.start).total_seconds() / 3600.0)
    assert out.hours_by_band == {"V": pytest.approx((e.end - e.start).total_seconds() / 3600.0)}
    assert out.builds == 1  # nothing changed: no re-plan
    assert out.weather_lost_h == 0.0
    dark_h = np.count_nonzero(compute_sky(CFG.site, NIGHT, [RA], [-30.0]).sun_alt_deg <= -18.0) * NIGHT.step_s / 3600
    assert out.idle_dark_h == pytest.approx(dark_h - (e.end_step - e.start_step) * NIGHT.step_s / 3600, abs=0.02)


def test_constraints_failing_when_the_time_comes_make_the_entry_failed_and_uncharged():
    s = spec()
    e = first_plan([s], series(0.6)).entries[0]
    bad_from = e.start_step + 10  # the seeing breaks 10 minutes into the exposure, between two reports
    seeing = np.where(np.arange(NIGHT.n_times) >= bad_from, 2.0, 0.6)
    specs, out = night_run([s], series(seeing), series(0.6))
    assert out.done == {} and out.failed.get(1, 0) >= 1
    assert out.charged_h == {} and out.hours_by_band == {}
    assert specs[0].status == "queued" and specs[0].completed_repeats == 0  # back in the queue
    assert out.builds >= 2  # the failure and the seeing change re-plan the night


def test_better_weather_than_forecast_is_used_after_a_replan():
    # half an hour of exposure: it fits in the hour a report holds the measured seeing
    s = spec(exposure_s=1800.0)
    half_hourly = series(2.0, times=NIGHT.times_unix[::30])
    assert first_plan([s], half_hourly).entries == ()  # the forecast rules the request out
    specs, out = night_run([s], series(0.6), half_hourly)
    assert out.done == {1: 1}
    assert out.builds >= 2


def test_a_night_lost_to_weather_observes_nothing_and_counts_its_dark_hours():
    s = spec()
    specs, out = night_run([s], series(0.6, dome=False), series(0.6), state=LOST)
    assert out.done == {} and out.charged_h == {}
    dark_h = np.count_nonzero(compute_sky(CFG.site, NIGHT, [RA], [-30.0]).sun_alt_deg <= -18.0) * NIGHT.step_s / 3600
    assert out.weather_lost_h == pytest.approx(dark_h)
    assert out.idle_dark_h == 0.0
    assert specs[0].status == "queued"


def test_report_holds_the_measured_conditions_then_follows_the_forecast():
    actual, forecast = series(0.5), series(1.5)
    samples = report_at((actual.samples(), forecast.samples()), NIGHT, 60)
    t_now = NIGHT.times_unix[60]
    measured = [x for x in samples if x.time.timestamp() <= t_now]
    assert len(measured) == 61 and all(x.seeing_arcsec == 0.5 and x.dome_open for x in measured)
    held = [x for x in samples if x.time.timestamp() == t_now + NOWCAST_HOLD_S]
    assert len(held) == 1 and held[0].seeing_arcsec == 0.5 and held[0].dome_open is None
    later = [x for x in samples if x.time.timestamp() > t_now + NOWCAST_HOLD_S]
    assert later and all(x.seeing_arcsec == 1.5 and x.dome_open is None for x in later)


def test_queue_rules_match_the_database_rules():
    s = spec(repeats=2)
    once = apply_outcome(s, "done")
    assert (once.completed_repeats, once.status) == (1, "queued")
    assert apply_outcome(once, "done").status == "done"
    assert apply_outcome(s.with_(status="planned"), "failed").status == "queued"
    when = datetime(2027, 1, 1, tzinfo=timezone.utc)
    old, new, done = spec(1, not_after=when - timedelta(hours=1)), spec(2, not_after=when), spec(3).with_(status="done")
    assert [x.status for x in expire([old, new, done], when)] == ["expired", "queued", "done"]


def test_replans_get_the_services_share_of_the_effort():
    # the service re-plans within min(time_limit_s, replan_time_limit_s): 4 s of 10 s in the starter config
    assert (CFG.planning.time_limit_s, CFG.planning.replan_time_limit_s) == (10.0, 4.0)
    assert [replan_effort(e, CFG) for e in (1, 2, 3, 5, 10)] == [1, 1, 1, 2, 4]


def test_a_realization_is_the_same_in_one_block_or_night_by_night():
    specs = [spec(1), spec(2, ra_deg=(RA + 40) % 360, band="R", exposure_s=1800.0),
             spec(3, ra_deg=(RA + 320) % 360, band="I", exposure_s=1200.0, max_seeing_arcsec=None)]
    setup = SeasonSetup(CFG, CLIM, tuple(specs), (ProgramState("ENG", 1, 1.0, 10.0),),
                        (NIGHT_DATE, NIGHT_DATE + timedelta(days=1)), seed=11, effort=1)
    whole = simulate_nights(setup, initial_state(setup, 1), [0, 1], SkyCache())
    step = simulate_nights(setup, initial_state(setup, 1), [0], SkyCache())
    step = simulate_nights(setup, step, [1], SkyCache())
    assert whole == step
    with pytest.raises(ValueError):
        simulate_nights(setup, initial_state(setup, 1), [1], SkyCache())  # nights run in order


def test_the_planner_sees_the_hours_charged_so_far():
    """Programs reach build_plan as a build from the database would see them: hours charged
    before the season plus those charged in it."""
    setup = SeasonSetup(CFG, CLIM, (spec(),), (ProgramState("ENG", 3, 1.5, 10.0, hours_charged=2.0),),
                        (NIGHT_DATE,), seed=3, effort=1)
    assert [(p.code, p.tier, p.allocated_h) for p in setup.program_infos()] == [("ENG", 3, 10.0)]
    assert setup.planner_programs({"ENG": 3.0}) == {"ENG": ProgramState("ENG", 3, 1.5, 10.0, 5.0)}
    assert setup.planner_programs({}) == {"ENG": ProgramState("ENG", 3, 1.5, 10.0, 2.0)}
