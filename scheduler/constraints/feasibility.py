"""Per request x grid time: allowed? why not? how good?

CONTRACT: Feasibility is the solver's, the checker's and `plan why`'s input.

Every constraint is one entry of constraints/catalog.py (its Reason bit, mask, wording and
explanation); this module evaluates the catalog in two layers, plain numpy over
[requests x times] (no loop over time):

``static_layer`` (once per night and queue): the STATIC constraints, which depend only on
  geometry and the clock (altitude, twilight, Moon, Sun, sky brightness, time window).
``evaluate`` adds the CONDITIONS constraints (seeing, resolution, PWV, transmission, cloud,
  closure), then the START one (NIGHT_END: set at start times whose duration runs past the end
  of the grid; it explains a False in start_ok and does not clear ``ok``, which is about the
  step itself).

duration_steps = ceil((instrument.setup_s + request.next_exposure_s) / step);
start_ok[r, t] = ok at every grid instant of [t, t + duration], both ends included, so an
exposure is also allowed at the instant it ends (cumulative sums, no loop).

Merit, in (0, 1] where ok (0 where not ok), a product of three factors:

  merit = (X_min / X) * (T / T_ideal) * (1 - 0.5 w_seeing) * (1 - 0.25 w_water)

  X / X_min   airmass now over the target's lowest airmass on this grid: observe targets near
              their best, without punishing targets that never climb high at this site.
  T / T_ideal transmission now (extinction, water vapour, cloud at this airmass) over the band's
              transmission at zenith with no water and no cloud.
  w_seeing    waste of image quality = 1 - r, r = the largest of: seeing / max_seeing_arcsec,
              delivered FWHM / resolution_arcsec; for a request with neither limit
              r = seeing / defaults.seeing_arcsec (the site's ordinary-to-poor seeing from the
              config). r clipped to [0, 1]. A request that needs about what the sky gives has
              w = 0; one with a loose or no limit in excellent seeing has w near 1.
  w_water     the same with PWV: pwv / max_pwv_mm, or pwv / defaults.pwv_mm without a limit.

Two more factors, 1 where they do not apply (sources in docs/physics.md):

  thermal     bands marked thermal: sqrt(B_best / B), the background-limited sensitivity of
              the sky now (emissivity 1 - t at the air temperature, Kirchhoff) relative to the
              band's best sky (zenith, no water, no cloud); with T / T_ideal this is the
              signal-to-noise ratio of a fixed exposure relative to the best sky.
  surface     dishes (bands not seeing-limited): Ruze efficiency now / at night (a sunlit
              dish is less accurate).

The waste factors steer rare good conditions to the requests that need them (a request with
no seeing limit scores lower in excellent seeing than in ordinary seeing) while never making
an allowed time worthless: merit >= (T_floor / T_ideal) * 0.5 * 0.75 * X_min / X > 0. Weights
0.5 and 0.25 are design choices (water matters to fewer bands than seeing); we have no site
climatology, so "rare" is measured against the request's own need, not by frequency.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np

from scheduler.conditions.grid import ConditionsGrid
from scheduler.constraints import catalog
from scheduler.constraints.catalog import MOON_UP_ALT_DEG, TRANSMISSION_FLOOR, Grid, Reason  # noqa: F401 (re-exported)
from scheduler.model.config import Band, Instrument, ObservatoryConfig
from scheduler.model.request import RequestSpec
from scheduler.sky import adaptive_optics, physics
from scheduler.sky import thermal as thermal_sky
from scheduler.sky.ephemeris import SkyGrid


@dataclass(frozen=True)
class Feasibility:
    request_ids: np.ndarray  # [n_r] ids of the RequestSpecs evaluated, in row order
    target_row: np.ndarray  # [n_r] row of each request in the SkyGrid
    ok: np.ndarray  # [n_r, n_t] bool: every constraint holds at this time
    reasons: np.ndarray  # [n_r, n_t] uint16 bitmask of Reason
    merit: np.ndarray  # [n_r, n_t] float32 in (0, 1]; meaningful where ok
    duration_steps: np.ndarray  # [n_r] int: setup + remaining exposure, in grid steps (ceil)
    start_ok: np.ndarray  # [n_r, n_t] bool: ok for every step of [t, t + duration)
    fwhm_arcsec: np.ndarray  # [n_r, n_t] predicted delivered image FWHM in the band
    transmission: np.ndarray  # [n_r, n_t] 0..1 (extinction, water vapour, cloud)
    sky_mag: np.ndarray  # [n_r, n_t] sky brightness in the band, mag/arcsec^2 (nan if not modelled)
    # Added with the adaptive optics, dish and moving-target physics (defaults keep old builders working):
    strehl: np.ndarray | None = None  # [n_r, n_t] float32 predicted AO Strehl ratio, nan where not modelled
    halo_fwhm: np.ndarray | None = None  # [n_r, n_t] float32 image FWHM without AO correction
    surface_eff: np.ndarray | None = None  # [n_r, n_t] float32 dish Ruze efficiency, 1 where it does not apply


SEEING_WASTE_WEIGHT = 0.5
WATER_WASTE_WEIGHT = 0.25


@dataclass(frozen=True)
class _Group:
    """Requests sharing a band and an instrument: one physics call each."""

    band: Band
    instrument: Instrument
    rows: np.ndarray  # request indices


@dataclass(frozen=True)
class StaticLayer:
    """Geometry-and-clock part of feasibility for one night grid and one request list."""

    request_ids: np.ndarray  # [n_r] int64, -1 where a request has no id yet
    target_row: np.ndarray  # [n_r]
    step_s: float
    reasons: np.ndarray  # [n_r, n_t] uint16
    airmass: np.ndarray  # [n_r, n_t] float64, inf below the horizon
    airmass_min: np.ndarray  # [n_r] lowest finite airmass on the grid (inf if never up)
    sky_mag: np.ndarray  # [n_r, n_t] float32
    duration_steps: np.ndarray  # [n_r] int64
    limits: Mapping[str, np.ndarray]  # request field -> [n_r], nan = no limit (catalog.LIMIT_FIELDS)
    t_ideal: np.ndarray  # [n_r] band transmission at zenith, no water, no cloud
    groups: tuple[_Group, ...]
    covered: np.ndarray | None = None  # [n_r, n_t] bool: the target has a position
    surface_eff: np.ndarray | None = None  # [n_r, n_t] dish Ruze efficiency (1 where it does not apply)
    surface_best: np.ndarray | None = None  # [n_r] the dish's night efficiency in the band (1 if n/a)
    guide_sep: np.ndarray | None = None  # [n_r] AO guide-star distance, arcsec (0 when not given)

    @property
    def shape(self) -> tuple[int, int]:
        return self.reasons.shape  # type: ignore[return-value]


def _limit(requests: Sequence[RequestSpec], name: str) -> np.ndarray:
    return np.array([np.nan if getattr(r, name) is None else float(getattr(r, name)) for r in requests],
                    dtype=np.float64)


def _flag(reasons: np.ndarray, mask: np.ndarray, bit: Reason) -> None:
    """reasons |= bit where mask (mask broadcasts to reasons)."""
    reasons |= mask.astype(np.uint16) * np.uint16(bit)


def _groups(requests: Sequence[RequestSpec], config: ObservatoryConfig) -> tuple[_Group, ...]:
    keyed: dict[tuple[str, str], list[int]] = {}
    for i, r in enumerate(requests):
        inst = config.instrument_for(r.band, r.instrument)
        keyed.setdefault((r.band, inst.name), []).append(i)
    return tuple(
        _Group(config.band(b), config.instrument_for(b, name), np.array(idx, dtype=np.int64))
        for (b, name), idx in keyed.items()
    )


def _sky_brightness(groups: Sequence[_Group], rows: np.ndarray, sky: SkyGrid, shape: tuple[int, int]):
    """(sky_mag [n_r, n_t] float32, nan where the band has no sky model; t_ideal [n_r])."""
    sky_mag = np.full(shape, np.nan, dtype=np.float32)
    t_ideal = np.ones(shape[0], dtype=np.float64)
    for g in groups:
        tg = rows[g.rows]
        t_ideal[g.rows] = float(physics.transmission(g.band, 0.0, 1.0, 0.0))
        if g.band.dark_sky_mag is None:
            continue
        sky_mag[g.rows] = physics.sky_brightness_mag(
            g.band, sky.moon_phase_angle_deg[None, :], sky.moon_sep_deg[tg], sky.moon_alt_deg[None, :],
            sky.alt_deg[tg], sky.sun_alt_deg[None, :])
    return sky_mag, t_ideal


def static_layer(requests: Sequence[RequestSpec], target_rows: np.ndarray, sky: SkyGrid,
                 config: ObservatoryConfig) -> StaticLayer:
    """The catalog's STATIC constraints; compute once per night and queue."""
    rows = np.asarray(target_rows, dtype=np.int64)
    n_r = len(requests)
    if rows.shape != (n_r,):
        raise ValueError(f"target_rows has shape {rows.shape}; expected ({n_r},), one row per request")
    if n_r and (rows.min() < 0 or rows.max() >= sky.n_targets):
        raise ValueError("target_rows point outside the SkyGrid")
    n_t = sky.night.times_unix.shape[0]
    step = float(sky.night.step_s)
    airmass = np.asarray(sky.airmass[rows], dtype=np.float64)
    groups = _groups(requests, config)
    sky_mag, t_ideal = _sky_brightness(groups, rows, sky, (n_r, n_t))
    durations = np.array([
        max(1, math.ceil((config.instrument_for(r.band, r.instrument).setup_s + r.next_exposure_s) / step - 1e-9))
        for r in requests], dtype=np.int64)
    limits = {name: _limit(requests, name) for name in catalog.LIMIT_FIELDS}
    covered = sky.covered(rows)
    surface_eff = np.ones((n_r, n_t), dtype=np.float64)
    surface_best = np.ones(n_r, dtype=np.float64)
    for g in groups:
        surface_eff[g.rows] = physics.surface_efficiency(g.band, config.telescope, sky.sun_alt_deg)[None, :]
        surface_best[g.rows] = physics.night_surface_efficiency(g.band, config.telescope)
    grid = Grid(requests=requests, config=config, sky=sky, rows=rows, airmass=airmass, sky_mag=sky_mag,
                limits=limits, duration_steps=durations, covered=covered, surface_eff=surface_eff)
    reasons = np.zeros((n_r, n_t), dtype=np.uint16)
    for c in catalog.of_layer(catalog.STATIC):
        _flag(reasons, c.fails(grid), c.reason)

    finite = np.where(np.isfinite(airmass), airmass, np.inf)
    airmass_min = finite.min(axis=1) if n_t else np.full(n_r, np.inf)
    return StaticLayer(
        request_ids=np.array([-1 if r.id is None else r.id for r in requests], dtype=np.int64),
        target_row=rows, step_s=step, reasons=reasons, airmass=airmass, airmass_min=airmass_min,
        sky_mag=sky_mag, duration_steps=durations, limits=limits, t_ideal=t_ideal, groups=groups,
        covered=covered, surface_eff=surface_eff, surface_best=surface_best,
        guide_sep=np.array([r.guide_star_sep_arcsec or 0.0 for r in requests], dtype=np.float64),
    )


def start_windows(ok: np.ndarray, duration_steps: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(start_ok, fits): ok over all of [t, t + d) per row, and whether t + d <= n_t at all."""
    n_r, n_t = ok.shape
    c = np.zeros((n_r, n_t + 1), dtype=np.int32)
    np.cumsum(ok, axis=1, dtype=np.int32, out=c[:, 1:])
    d = np.asarray(duration_steps, dtype=np.int64)[:, None]
    end = np.arange(n_t, dtype=np.int64)[None, :] + d
    fits = end <= n_t
    # The grid samples instants: an exposure over [t, t + d) must also be allowed at its end
    # instant t + d (e.g. not run past dawn inside its last step). The grid's last instant is
    # the final check for an exposure that ends exactly at the grid's end.
    last = np.minimum(end + 1, n_t)
    c_end = np.take_along_axis(c, last, axis=1)
    return fits & (c_end - c[:, :n_t] == last - np.arange(n_t)[None, :]), fits


def evaluate(requests: Sequence[RequestSpec], target_rows: np.ndarray, sky: SkyGrid, cond: ConditionsGrid,
             config: ObservatoryConfig, static: StaticLayer | None = None) -> Feasibility:
    """Full feasibility: the static layer (computed here unless given), then the catalog's
    CONDITIONS and START constraints."""
    st = static if static is not None else static_layer(requests, target_rows, sky, config)
    n_r, n_t = st.shape
    ids = np.array([-1 if r.id is None else r.id for r in requests], dtype=np.int64)
    if len(requests) != n_r or not np.array_equal(ids, st.request_ids) \
            or not np.array_equal(np.asarray(target_rows), st.target_row):
        raise ValueError("static layer was built for a different request list; rebuild it with static_layer")
    if cond.n_times != n_t:
        raise ValueError(f"conditions grid has {cond.n_times} times; the sky grid has {n_t}")

    seeing = np.asarray(cond.seeing_arcsec, dtype=np.float64)
    pwv = np.asarray(cond.pwv_mm, dtype=np.float64)
    cloud = np.asarray(cond.cloud_mag, dtype=np.float64)
    fwhm = np.empty((n_r, n_t), dtype=np.float64)
    halo = np.empty((n_r, n_t), dtype=np.float64)
    core = np.empty(n_r, dtype=np.float64)
    trans = np.empty((n_r, n_t), dtype=np.float64)
    thermal = np.ones((n_r, n_t), dtype=np.float64)
    strehl = np.full((n_r, n_t), np.nan)
    ap = config.telescope.aperture_m
    h_bar = config.site.turbulence_height_m
    tau0 = None if cond.coherence_time_ms is None else np.asarray(cond.coherence_time_ms, dtype=np.float64)[None, :]
    guide = st.guide_sep if st.guide_sep is not None else np.zeros(n_r)
    with np.errstate(invalid="ignore", over="ignore"):
        for g in st.groups:  # a handful of (band, instrument) pairs
            x = st.airmass[g.rows]
            if adaptive_optics.uses_turbulence_model(g.band, g.instrument):
                strehl[g.rows] = adaptive_optics.strehl(seeing[None, :], x, g.band, g.instrument, h_bar,
                                                        guide[g.rows][:, None], tau0)
            fwhm[g.rows] = physics.delivered_fwhm_arcsec(seeing[None, :], x, g.band, g.instrument, ap,
                                                         strehl=strehl[g.rows])
            halo[g.rows] = physics.seeing_limited_fwhm_arcsec(seeing[None, :], x, g.band, g.instrument, ap)
            core[g.rows] = physics.core_fwhm_arcsec(g.band, g.instrument, ap)
            trans[g.rows] = physics.transmission(g.band, pwv[None, :], x, cloud[None, :])
            if g.band.thermal:
                thermal[g.rows] = thermal_sky.background_factor(g.band, pwv[None, :], x, cloud[None, :])
    grid = Grid(requests=requests, config=config, sky=sky, rows=st.target_row, airmass=st.airmass,
                sky_mag=st.sky_mag, limits=st.limits, duration_steps=st.duration_steps, cond=cond,
                fwhm=fwhm, transmission=trans, covered=st.covered, surface_eff=st.surface_eff,
                strehl=strehl, halo_fwhm=halo, core_fwhm=core)
    reasons = st.reasons.copy()
    for c in catalog.of_layer(catalog.CONDITIONS):
        _flag(reasons, c.fails(grid), c.reason)
    ok = reasons == 0
    start_ok, _ = start_windows(ok, st.duration_steps)
    for c in catalog.of_layer(catalog.START):  # about start times: they leave ``ok`` alone
        _flag(reasons, c.fails(grid), c.reason)

    merit = _merit(st, ok, seeing, pwv, fwhm, trans, config, thermal)
    surface = st.surface_eff if st.surface_eff is not None else np.ones((n_r, n_t))
    return Feasibility(
        request_ids=st.request_ids.copy(), target_row=st.target_row.copy(), ok=ok, reasons=reasons,
        merit=merit, duration_steps=st.duration_steps.copy(), start_ok=start_ok,
        fwhm_arcsec=fwhm.astype(np.float32), transmission=trans.astype(np.float32), sky_mag=st.sky_mag,
        strehl=strehl.astype(np.float32), halo_fwhm=halo.astype(np.float32), surface_eff=surface.astype(np.float32),
    )


def _ratio(num: np.ndarray, den: np.ndarray) -> np.ndarray:
    """num / den where den is a positive limit, nan where there is no limit."""
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(np.isfinite(den) & (den > 0), num / den, np.nan)


def _merit(st: StaticLayer, ok: np.ndarray, seeing: np.ndarray, pwv: np.ndarray, fwhm: np.ndarray,
           trans: np.ndarray, config: ObservatoryConfig, thermal: np.ndarray | None = None) -> np.ndarray:
    """See the module docstring. 0 where not ok."""
    d = config.defaults
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        m_air = st.airmass_min[:, None] / st.airmass
        m_t = trans / st.t_ideal[:, None]

        r_see = _ratio(seeing[None, :], st.limits["max_seeing_arcsec"][:, None])
        r_res = _ratio(fwhm, st.limits["resolution_arcsec"][:, None])
        r = np.fmax(r_see, r_res)  # fmax ignores nan (no limit)
        no_limit = np.isnan(st.limits["max_seeing_arcsec"]) & np.isnan(st.limits["resolution_arcsec"])
        if no_limit.any():
            r[no_limit] = seeing[None, :] / d.seeing_arcsec
        w_see = 1.0 - np.clip(r, 0.0, 1.0)

        ref_pwv = np.where(np.isnan(st.limits["max_pwv_mm"]), d.pwv_mm, st.limits["max_pwv_mm"])
        r_w = np.where(ref_pwv[:, None] > 0, pwv[None, :] / np.maximum(ref_pwv[:, None], 1e-12), 1.0)
        w_water = 1.0 - np.clip(r_w, 0.0, 1.0)

        m = m_air * m_t * (1.0 - SEEING_WASTE_WEIGHT * w_see) * (1.0 - WATER_WASTE_WEIGHT * w_water)
        if thermal is not None:
            m = m * thermal  # thermal bands: sqrt(best sky background / background), 1 elsewhere
        if st.surface_eff is not None:
            m = m * st.surface_eff / st.surface_best[:, None]  # dish: efficiency now / at night
    m = np.where(ok, np.clip(np.nan_to_num(m, nan=0.0), 1e-6, 1.0), 0.0)
    return m.astype(np.float32)
