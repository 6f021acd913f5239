"""The new physics through feasibility, merit, the checker and the pipeline.

Outside references are named in the physics tests (test_sky_adaptive_optics, test_sky_thermal,
test_sky_bodies); here the same physics must reach the plan. Telescopes and targets are invented.
"""

from __future__ import annotations

from dataclasses import replace
from datetime import date

import numpy as np
import pytest

from scheduler.conditions.grid import conditions_on_grid
from scheduler.constraints.feasibility import Reason, evaluate
from scheduler.model.config import Band, Instrument
from scheduler.model.request import RequestSpec
from scheduler.planning.pipeline import build_plan
from scheduler.sky import physics as ph
from scheduler.sky.bodies import EphemerisTable
from scheduler.sky.ephemeris import sky_for
from scheduler.sky.night import compute_night
from scheduler.solve.checker import check_plan

from test_feasibility import CFG, cond, req, sky
from test_solver import assert_clean, effort

N_T = 40


def _big_ao_config():
    """The starter site with an invented 8 m telescope and an AO camera with a 0.03" blur."""
    cam = Instrument(name="ao_cam", bands=("J", "H", "K"), setup_s=240, filter_change_s=45,
                     instrument_change_s=180, fwhm_arcsec=0.03, ao_actuator_pitch_m=0.2, ao_fitting_coeff=0.3,
                     ao_strehl_min=0.3, ao_servo_lag_ms=2.0, ao_min_wavelength_um=1.0)
    insts = tuple(i for i in CFG.instruments if i.name != "nir_camera") + (cam,)
    return replace(CFG, telescope=replace(CFG.telescope, aperture_m=8.0), instruments=insts)


def test_point08_arcsec_in_k_on_axis_but_not_40_arcsec_away():
    cfg = _big_ao_config()
    good = cond(N_T, seeing=0.5)
    on = req("K", id=1, resolution_arcsec=0.08, guide_star_sep_arcsec=0.0)
    off = req("K", id=2, resolution_arcsec=0.08, guide_star_sep_arcsec=40.0)
    f = evaluate([on, off], np.array([0, 0]), sky(np.full(N_T, 65.0)), good, cfg)
    assert f.ok[0].all() and f.start_ok[0, 0]
    assert f.strehl[0, 0] > 0.9 and f.fwhm_arcsec[0, 0] <= 0.08
    assert not f.ok[1].any()
    assert np.all((f.reasons[1] & ~np.uint16(Reason.NIGHT_END)) == Reason.AO_STREHL)
    assert f.strehl[1, 0] < 0.3 and f.halo_fwhm[1, 0] > 0.3
    # a short coherence time (fast turbulence) costs Strehl through the loop's 2 ms delay
    fast = replace(good, coherence_time_ms=np.full(N_T, 1.0))
    slow = replace(good, coherence_time_ms=np.full(N_T, 10.0))
    s_fast, s_slow = (float(evaluate([on], np.array([0]), sky(np.full(N_T, 65.0)), c, cfg).strehl[0, 0])
                      for c in (fast, slow))
    assert s_fast < s_slow < f.strehl[0, 0]
    # a request without a resolution need is not held back by a low Strehl
    loose = req("K", id=3, guide_star_sep_arcsec=40.0)
    assert evaluate([loose], np.array([0]), sky(np.full(N_T, 65.0)), good, cfg).ok[0].all()


def test_checker_catches_an_off_axis_ao_entry():
    from test_catalog import _entry
    cfg = _big_ao_config()
    off = req("K", id=1, resolution_arcsec=0.08, guide_star_sep_arcsec=40.0)
    on = replace(off, guide_star_sep_arcsec=0.0)
    sk, cd = sky(np.full(N_T, 65.0)), cond(N_T, seeing=0.5)
    d = int(evaluate([on], np.array([0]), sk, cd, cfg).duration_steps[0])
    assert check_plan([_entry(on, d)], {1: on}, {1: 0}, sk, cd, cfg) == []
    v = check_plan([_entry(off, d)], {1: off}, {1: 0}, sk, cd, cfg)
    assert any("AO Strehl under the instrument's 0.3" in x for x in v), v


def _thermal_merit(pwv: float) -> tuple[float, float]:
    r = req("N", id=1)
    f = evaluate([r], np.array([0]), sky(np.full(N_T, 60.0)), cond(N_T, pwv=pwv), CFG)
    return float(f.merit[0, 0]), float(f.transmission[0, 0])


def test_n_band_merit_falls_with_pwv_faster_than_transmission():
    assert CFG.band("N").thermal
    (m1, t1), (m4, t4) = _thermal_merit(1.0), _thermal_merit(4.0)
    assert m4 < m1 and t4 < t1
    assert m4 / m1 < t4 / t1  # the wetter sky is also brighter (Kirchhoff), not only less transparent
    # without the thermal flag the background term is absent
    cfg = replace(CFG, bands={**CFG.bands, "N": replace(CFG.band("N"), thermal=False)})
    plain = [float(evaluate([req("N", id=1)], np.array([0]), sky(np.full(N_T, 60.0)), cond(N_T, pwv=p), cfg).merit[0, 0])
             for p in (1.0, 4.0)]
    assert plain[1] / plain[0] > m4 / m1


def _dish():
    smm = Band(name="smm870", wavelength_um=870.0, extinction_mag=0.0, tau_dry=0.07, tau_per_mm_pwv=0.18,
               twilight="day", seeing_limited=False)
    mm = Band(name="mm1300", wavelength_um=1300.0, extinction_mag=0.0, tau_dry=0.017, tau_per_mm_pwv=0.04,
              twilight="day", seeing_limited=False)
    rx = Instrument(name="rx", bands=("mm1300", "smm870"), setup_s=60.0, filter_change_s=0.0, instrument_change_s=0.0)
    tel = replace(CFG.telescope, aperture_m=12.0, surface_rms_um=25.0, surface_rms_day_um=40.0,
                  surface_efficiency_floor=0.3)
    return replace(CFG, telescope=tel, bands={"mm1300": mm, "smm870": smm}, instruments=(rx,))


def test_submillimetre_dish_in_daytime_has_a_lower_merit_than_at_night():
    cfg = _dish()
    r = RequestSpec(program="P1", target="T", ra_deg=0.0, dec_deg=0.0, band="smm870", exposure_s=300.0, id=1)
    night_f = evaluate([r], np.array([0]), sky(np.full(N_T, 60.0), sun_alt=-20.0), cond(N_T), cfg)
    day_f = evaluate([r], np.array([0]), sky(np.full(N_T, 60.0), sun_alt=35.0), cond(N_T), cfg)
    assert night_f.ok[0].all() and day_f.ok[0].all()
    # Ruze 1966: 25 um at 870 um -> 0.878 at night, 40 um sunlit -> 0.717
    assert night_f.surface_eff[0, 0] == pytest.approx(ph.ruze_efficiency(25.0, 870.0), rel=1e-6)
    assert day_f.surface_eff[0, 0] == pytest.approx(ph.ruze_efficiency(40.0, 870.0), rel=1e-6)
    ratio = day_f.merit[0, 0] / night_f.merit[0, 0]
    assert ratio == pytest.approx(ph.ruze_efficiency(40.0, 870.0) / ph.ruze_efficiency(25.0, 870.0), rel=1e-5)
    # the longer band loses less
    r2 = replace(r, band="mm1300")
    d2 = evaluate([r2], np.array([0]), sky(np.full(N_T, 60.0), sun_alt=35.0), cond(N_T), cfg)
    n2 = evaluate([r2], np.array([0]), sky(np.full(N_T, 60.0), sun_alt=-20.0), cond(N_T), cfg)
    assert ratio < d2.merit[0, 0] / n2.merit[0, 0] < 1.0


# --------------------------------------------------------------------------- moving targets through the pipeline

NIGHT_DATE = date(2026, 12, 16)


@pytest.fixture(scope="module")
def moving_plan():
    night = compute_night(CFG.site, NIGHT_DATE, 60)
    t = night.times_unix
    # an invented comet-like target moving 0.5 deg/h through RA 0/360, 0.3 AU away
    ts = np.arange(t[0] - 3 * 3600, t[-1] + 3 * 3600, 3600.0)
    hours = (ts - ts[0]) / 3600.0
    tab = EphemerisTable(tuple(ts), tuple(((358.0 + 0.5 * hours) % 360.0).tolist()),
                         tuple((-30.0 + 0.1 * hours).tolist()), tuple(np.full(ts.size, 0.3).tolist()))
    reqs = [
        RequestSpec(program="P1", target="Saturn", ra_deg=0.0, dec_deg=0.0, band="K", exposure_s=600.0, id=1,
                    body="saturn"),
        RequestSpec(program="P1", target="C/Invented", ra_deg=0.0, dec_deg=0.0, band="R", exposure_s=1200.0, id=2,
                    ephemeris=tab),
        RequestSpec(program="P1", target="Fixed", ra_deg=60.0, dec_deg=-40.0, band="V", exposure_s=900.0, id=3),
        RequestSpec(program="P1", target="Saturn again", ra_deg=5.0, dec_deg=5.0, band="H", exposure_s=600.0, id=4,
                    body="saturn"),
    ]
    cd = conditions_on_grid((), t, CFG.defaults)
    res = build_plan(CFG, reqs, {"P1": 1.0}, night, cd, options=effort())
    return night, reqs, cd, res


def test_moving_targets_are_planned_at_their_position_then(moving_plan):
    night, reqs, cd, res = moving_plan
    assert_clean(res)
    by_id = {e.request_id: e for e in res.entries}
    assert {1, 2, 3} <= set(by_id), res.unscheduled
    sky, rows = sky_for(CFG.site, night, reqs)
    assert rows[0] == rows[3] and len(set(rows.tolist())) == 3  # two requests, one planet, one row
    for e in res.entries:
        spec = reqs[e.request_id - 1]
        row = int(rows[e.request_id - 1])
        ra, dec = sky.position_deg(row, e.start_step)
        assert (e.ra_deg, e.dec_deg) == pytest.approx((ra, dec))
        assert e.airmass_start == pytest.approx(float(sky.airmass[row, e.start_step]))
        if spec.moving:
            # not the position listed with the request (0, 0 here)
            assert abs(e.dec_deg - spec.dec_deg) + abs(e.ra_deg - spec.ra_deg) > 1.0
    # the comet's position at its entry is the table interpolated then
    c = by_id[2]
    hours = (c.start.timestamp() - reqs[1].ephemeris.start_unix) / 3600.0
    assert c.ra_deg == pytest.approx((358.0 + 0.5 * hours) % 360.0, abs=1e-6)
    assert c.dec_deg == pytest.approx(-30.0 + 0.1 * hours, abs=1e-6)


def test_transitions_slew_to_where_the_target_is(moving_plan):
    night, reqs, cd, res = moving_plan
    sky, rows = sky_for(CFG.site, night, reqs)
    from scheduler.solve.transitions import slew_s
    ents = sorted(res.entries, key=lambda e: e.start_step)
    for a, b in zip(ents, ents[1:]):
        ra_, rb = int(rows[a.request_id - 1]), int(rows[b.request_id - 1])
        end = min(a.end_step, night.n_times - 1)
        expect = slew_s(CFG, sky.alt_deg[ra_, end], sky.az_deg[ra_, end], sky.alt_deg[rb, b.start_step],
                        sky.az_deg[rb, b.start_step])
        assert b.slew_s == pytest.approx(float(expect))
    specs = {r.id: r for r in reqs}
    assert check_plan(res.entries, specs, {r.id: int(rows[i]) for i, r in enumerate(reqs)}, sky, cd, CFG) == []


def test_a_table_that_ends_mid_night_limits_the_window():
    night = compute_night(CFG.site, NIGHT_DATE, 60)
    t = night.times_unix
    half = t[night.n_times // 2]
    tab = EphemerisTable((t[0] - 3600.0, half), (30.0, 30.2), (-35.0, -35.1))
    spec = RequestSpec(program="P1", target="C/Short", ra_deg=30.0, dec_deg=-35.0, band="R", exposure_s=600.0, id=9,
                       ephemeris=tab)
    sky, rows = sky_for(CFG.site, night, [spec])
    f = evaluate([spec], rows, sky, conditions_on_grid((), t, CFG.defaults), CFG)
    after = np.arange(night.n_times) > night.n_times // 2
    assert np.all(f.reasons[0, after] & Reason.WINDOW) and not np.any(f.reasons[0, after] & Reason.ALTITUDE)
    assert not f.ok[0, after].any()
