"""Independent plan checker.

Re-verifies a finished plan from first principles: the SkyGrid (positions, Sun, Moon), the
ConditionsGrid, the RequestSpecs, the observatory config and the band physics functions.
It deliberately does not read the Feasibility arrays, the solver's Problem or its transition
bounds: every constraint is recomputed here, at every grid step each entry covers, and every
gap is compared with the TRUE transition (slew at the configured per-axis rates from the
previous target's alt/az when its entry ends to the next target's alt/az when it starts,
plus settle, plus instrument or filter change).

Returns a list of human-readable violations; an empty list means the plan is valid.
"""

from __future__ import annotations

import math
from typing import Mapping, Sequence

import numpy as np

from scheduler.conditions.grid import ConditionsGrid
from scheduler.model.config import ObservatoryConfig
from scheduler.model.request import RequestSpec
from scheduler.sky import physics
from scheduler.sky.ephemeris import SkyGrid
from scheduler.model.plan import PlanEntry

# The policy floor on transmission: under a tenth of the light an exposure is not worth taking
# (common practice, no published source). Written here, not imported from the constraint
# catalog, so that the checker shares no code with what it checks; tests/test_catalog.py fails
# until both numbers agree, so a change is made in both places.
TRANSMISSION_FLOOR = 0.1

_TOL_S = 1e-6  # float slack when comparing seconds


class Violation(str):
    """A violation's text, carrying the entry it is blamed on (request id, execution), so that
    callers act on it without parsing the words."""

    request_id: int | None
    execution: int | None

    def __new__(cls, text: str, request_id: int | None = None, execution: int | None = None):
        obj = super().__new__(cls, text)
        obj.request_id, obj.execution = request_id, execution
        return obj


def _steps_failing(name: str, bad: np.ndarray, steps: np.ndarray) -> str | None:
    if not np.any(bad):
        return None
    first = int(steps[np.argmax(bad)])
    return f"{name} at step {first} ({int(np.count_nonzero(bad))} of {len(steps)} steps)"


def _entry_constraints(e: PlanEntry, spec: RequestSpec, row: int, sky: SkyGrid, cond: ConditionsGrid,
                       config: ObservatoryConfig, lo: int) -> list[str]:
    """Every constraint of the request at every step in [lo, end_step)."""
    steps = np.arange(lo, e.end_step)
    if steps.size == 0:
        return []
    tel = config.telescope
    band = config.band(spec.band)
    inst = config.instrument_for(spec.band, spec.instrument)
    times = sky.night.times_unix[steps].astype(np.float64)
    step_s = float(sky.night.step_s)
    alt = sky.alt_deg[row, steps]
    x = sky.airmass[row, steps].astype(np.float64)
    sun_alt = sky.sun_alt_deg[steps]
    moon_up = sky.moon_alt_deg[steps] > 0.0
    seeing = cond.seeing_arcsec[steps].astype(np.float64)
    pwv = cond.pwv_mm[steps].astype(np.float64)
    cloud = cond.cloud_mag[steps].astype(np.float64)
    out: list[str | None] = []
    out.append(_steps_failing("below the altitude limit", alt < tel.min_altitude_deg, steps))
    out.append(_steps_failing("in the zenith blind spot", alt > tel.max_altitude_deg, steps))
    out.append(_steps_failing("below the horizon", ~np.isfinite(x), steps))
    if spec.max_airmass is not None:
        out.append(_steps_failing(f"airmass over {spec.max_airmass:g}", x > spec.max_airmass, steps))
    out.append(_steps_failing(f"Sun above {band.sun_alt_limit_deg:g} deg ({band.twilight} twilight)",
                              sun_alt > band.sun_alt_limit_deg, steps))
    out.append(_steps_failing("inside sun avoidance", sky.sun_sep_deg[row, steps] < config.safety.sun_avoidance_deg,
                              steps))
    if spec.min_moon_sep_deg is not None:
        out.append(_steps_failing("too close to the Moon",
                                  moon_up & (sky.moon_sep_deg[row, steps] < spec.min_moon_sep_deg), steps))
    if spec.max_moon_illum is not None:
        out.append(_steps_failing("Moon too illuminated", moon_up & (sky.moon_illum[steps] > spec.max_moon_illum),
                                  steps))
    if spec.min_sky_mag is not None:
        sky_mag = np.asarray(physics.sky_brightness_mag(band, sky.moon_phase_angle_deg[steps],
                                                        sky.moon_sep_deg[row, steps], sky.moon_alt_deg[steps],
                                                        alt, sun_alt), dtype=np.float64)
        with np.errstate(invalid="ignore"):
            out.append(_steps_failing("sky too bright", sky_mag < spec.min_sky_mag, steps))
    if spec.max_seeing_arcsec is not None:
        out.append(_steps_failing("seeing over the limit", seeing > spec.max_seeing_arcsec, steps))
    strehl = _ao_strehl(spec, band, inst, config, seeing, x, cond, steps)
    if spec.resolution_arcsec is not None:
        with np.errstate(invalid="ignore", over="ignore"):
            fwhm = np.asarray(physics.delivered_fwhm_arcsec(seeing, x, band, inst, tel.aperture_m, strehl=strehl),
                              dtype=np.float64)
        out.append(_steps_failing("delivered FWHM over the resolution needed", ~(fwhm <= spec.resolution_arcsec),
                                  steps))
        if strehl is not None:
            # the core would meet the resolution, the uncorrected image would not, and too little
            # light is in the core
            diff = 1.03 * band.wavelength_um * 1e-6 / tel.aperture_m * _RAD_ARCSEC
            core = math.hypot(diff, inst.fwhm_arcsec)
            with np.errstate(invalid="ignore", over="ignore"):
                halo = np.sqrt(np.asarray(physics.seeing_fwhm_arcsec(seeing, band.wavelength_um, x)) ** 2
                               + diff**2 + inst.fwhm_arcsec**2)
                lost = (core <= spec.resolution_arcsec) & (halo > spec.resolution_arcsec) & (strehl < inst.ao_strehl_min)
            out.append(_steps_failing(f"AO Strehl under the instrument's {inst.ao_strehl_min:g}", lost, steps))
    if not band.seeing_limited and tel.surface_rms_um is not None:
        sigma = np.where(sun_alt > 0.0, tel.surface_rms_day_um if tel.surface_rms_day_um is not None
                         else tel.surface_rms_um, tel.surface_rms_um)
        eff = np.exp(-((4.0 * math.pi * sigma / band.wavelength_um) ** 2))  # Ruze 1966
        out.append(_steps_failing(f"dish surface efficiency under {tel.surface_efficiency_floor:g}",
                                  eff < tel.surface_efficiency_floor, steps))
    if sky.is_moving(row):
        out.append(_steps_failing("no position (outside the ephemeris table)", ~np.isfinite(alt), steps))
    if spec.max_pwv_mm is not None:
        out.append(_steps_failing("PWV over the limit", pwv > spec.max_pwv_mm, steps))
    trans = np.asarray(physics.transmission(band, pwv, x, cloud), dtype=np.float64)
    out.append(_steps_failing(f"transmission under {TRANSMISSION_FLOOR:g}", trans < TRANSMISSION_FLOOR, steps))
    if spec.max_cloud_mag is not None:
        out.append(_steps_failing("cloud over the limit", cloud > spec.max_cloud_mag, steps))
    closed = ~np.asarray(cond.dome_open[steps], dtype=bool) | (cond.wind_ms[steps] > config.safety.max_wind_ms) \
        | (cond.humidity_pct[steps] > config.safety.max_humidity_pct)
    out.append(_steps_failing("dome closed (closure, wind or humidity)", closed, steps))
    if spec.not_before is not None:
        out.append(_steps_failing("before not_before", times < spec.not_before.timestamp(), steps))
    if spec.not_after is not None:
        out.append(_steps_failing("after not_after", times + step_s > spec.not_after.timestamp(), steps))
    if spec.period_days is not None and spec.period_epoch is not None:
        per = spec.period_days * 86400.0
        lo_ph, hi_ph = float(spec.phase_min), float(spec.phase_max)
        bad = np.zeros(steps.size, dtype=bool)
        for edge in (times, times + step_s):  # the phase must be inside at both ends of every step
            ph = np.mod((edge - spec.period_epoch.timestamp()) / per, 1.0)
            inside = (ph >= lo_ph) & (ph <= hi_ph) if lo_ph <= hi_ph else (ph >= lo_ph) | (ph <= hi_ph)
            bad |= ~inside
        out.append(_steps_failing("outside the periodic window", bad, steps))
    return [Violation(f"request {e.request_id} x{e.execution}: {msg}", e.request_id, e.execution) for msg in out if msg]


_RAD_ARCSEC = 180.0 / math.pi * 3600.0


def _ao_strehl(spec: RequestSpec, band, inst, config: ObservatoryConfig, seeing: np.ndarray, x: np.ndarray,
               cond: ConditionsGrid, steps: np.ndarray) -> np.ndarray | None:
    """Predicted Strehl ratio, written out here on its own (Fried parameter from the seeing,
    Kolmogorov fitting, anisoplanatic and servo-lag variances, extended Marechal), or None where
    the instrument's AO is not modelled from the turbulence."""
    if inst.ao_actuator_pitch_m is None or not band.seeing_limited or band.wavelength_um < inst.ao_min_wavelength_um:
        return None
    scale = (band.wavelength_um / 0.5) ** 1.2
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
        xf = np.where(np.isfinite(x), x, 1.0)
        r0 = 0.98 * 0.5e-6 / (seeing / _RAD_ARCSEC) * scale * xf**-0.6
        var = inst.ao_fitting_coeff * (inst.ao_actuator_pitch_m / r0) ** (5.0 / 3.0)
        theta0 = 0.314 * r0 / (config.site.turbulence_height_m * xf) * _RAD_ARCSEC
        var = var + ((spec.guide_star_sep_arcsec or 0.0) / theta0) ** (5.0 / 3.0)
        if inst.ao_servo_lag_ms is not None and cond.coherence_time_ms is not None:
            tau = np.asarray(cond.coherence_time_ms, dtype=np.float64)[steps] * scale * xf**-0.6
            lag = (inst.ao_servo_lag_ms / tau) ** (5.0 / 3.0)
            var = var + np.where(np.isfinite(lag), lag, 0.0)
        return np.where(np.isfinite(x), np.exp(-var), 0.0)


def _position(sky: SkyGrid, row: int, step: int) -> tuple[float, float]:
    s = min(max(step, 0), sky.night.n_times - 1)
    return float(sky.alt_deg[row, s]), float(sky.az_deg[row, s])


def true_transition_s(config: ObservatoryConfig, sky: SkyGrid, prev: PlanEntry, prev_spec: RequestSpec,
                      prev_row: int, nxt: PlanEntry, nxt_spec: RequestSpec, nxt_row: int) -> float:
    """Slew (short way in azimuth, both axes at once) + settle + instrument/filter change, seconds."""
    tel = config.telescope
    a1, z1 = _position(sky, prev_row, prev.end_step)
    a2, z2 = _position(sky, nxt_row, nxt.start_step)
    daz = abs(z1 - z2) % 360.0
    daz = min(daz, 360.0 - daz)
    slew = max(daz / tel.slew_rate_az_deg_s, abs(a2 - a1) / tel.slew_rate_alt_deg_s)
    i1 = config.instrument_for(prev_spec.band, prev_spec.instrument)
    i2 = config.instrument_for(nxt_spec.band, nxt_spec.instrument)
    if i1.name != i2.name:
        change = i2.instrument_change_s
    elif prev_spec.band != nxt_spec.band:
        change = i2.filter_change_s
    else:
        change = 0.0
    return slew + tel.settle_s + change


def check_plan(entries: Sequence[PlanEntry], requests: Mapping[int, RequestSpec], target_rows: Mapping[int, int],
               sky: SkyGrid, cond: ConditionsGrid, config: ObservatoryConfig, *, now_step: int = 0) -> list[str]:
    """All violations of a plan (empty = valid).

    requests / target_rows: by request id. Steps before ``now_step`` (the past part of an entry in
    progress) are not re-checked: they were observed under the conditions of their time.
    """
    v: list[str] = []
    n_t = sky.night.n_times
    step_s = int(sky.night.step_s)
    times = sky.night.times_unix
    ordered = sorted(entries, key=lambda e: (e.start_step, e.end_step))
    for e in ordered:
        tag = f"request {e.request_id} x{e.execution}"
        spec = requests.get(e.request_id)
        if spec is None or e.request_id not in target_rows:
            v.append(Violation(f"{tag}: unknown request", e.request_id, e.execution))
            continue
        if not (0 <= e.start_step < e.end_step <= n_t):
            v.append(Violation(f"{tag}: steps [{e.start_step}, {e.end_step}) outside the night grid [0, {n_t})",
                               e.request_id, e.execution))
            continue
        if abs(e.start.timestamp() - float(times[e.start_step])) > 1e-3 or \
                abs(e.end.timestamp() - (float(times[e.start_step]) + (e.end_step - e.start_step) * step_s)) > 1e-3:
            v.append(Violation(f"{tag}: start/end times do not match steps {e.start_step}..{e.end_step}",
                               e.request_id, e.execution))
        inst = config.instrument_for(spec.band, spec.instrument)
        exposure = spec.next_exposure_s if e.execution == 0 else spec.exposure_s
        need = math.ceil((inst.setup_s + exposure) / step_s - 1e-9)
        # an entry in progress was sized when it began: the request or the instrument may have
        # been edited since, and one that began before the grid's first step or ends after its
        # last is held on the grid's part of it alone (pipeline.entries_on_grid)
        in_progress = e.fixed and e.start_step < now_step
        if e.end_step - e.start_step < need and not in_progress:
            v.append(Violation(f"{tag}: {e.end_step - e.start_step} steps is shorter than setup + exposure "
                               f"({need} steps)", e.request_id, e.execution))
        if e.start_step < now_step and not e.fixed:
            v.append(Violation(f"{tag}: starts at step {e.start_step}, before now (step {now_step})",
                               e.request_id, e.execution))
        v.extend(_entry_constraints(e, spec, target_rows[e.request_id], sky, cond, config,
                                    max(e.start_step, now_step)))
    for a, b in zip(ordered, ordered[1:]):
        if b.start_step < a.end_step:
            v.append(Violation(f"request {a.request_id} x{a.execution} and request {b.request_id} x{b.execution} "
                               "overlap", b.request_id, b.execution))
            continue
        sa, sb = requests.get(a.request_id), requests.get(b.request_id)
        if sa is None or sb is None or a.request_id not in target_rows or b.request_id not in target_rows:
            continue
        need_s = true_transition_s(config, sky, a, sa, target_rows[a.request_id], b, sb, target_rows[b.request_id])
        gap_s = (b.start_step - a.end_step) * step_s
        if gap_s + _TOL_S < need_s:
            v.append(Violation(f"gap of {gap_s:.0f} s before request {b.request_id} x{b.execution} is shorter "
                               f"than the transition {need_s:.0f} s from request {a.request_id} x{a.execution}",
                               b.request_id, b.execution))
    by_req: dict[int, list[PlanEntry]] = {}
    for e in ordered:
        by_req.setdefault(e.request_id, []).append(e)
    for rid, lst in by_req.items():
        spec = requests.get(rid)
        if spec is None:
            continue
        in_progress = sum(1 for e in lst if e.start_step < now_step)
        if len(lst) > max(spec.remaining_repeats, in_progress):
            v.append(Violation(f"request {rid}: {len(lst)} executions planned, {spec.remaining_repeats} remain",
                               rid, lst[-1].execution))
        if spec.min_spacing_s:
            for a, b in zip(lst, lst[1:]):
                if (b.start_step - a.start_step) * step_s + _TOL_S < spec.min_spacing_s:
                    v.append(Violation(f"request {rid}: executions {a.execution} and {b.execution} closer than "
                                       f"min_spacing_s {spec.min_spacing_s:g}", rid, b.execution))
    return v
