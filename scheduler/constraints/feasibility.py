"""Per request x grid time: allowed? why not? how good?

CONTRACT: Feasibility is the solver's, the checker's and `plan why`'s input.

Two layers, both plain numpy over [requests x times] (no loop over time):

``static_layer`` (once per night and queue): what depends only on geometry and the clock.
  ALTITUDE  altitude below telescope.min_altitude_deg, above max_altitude_deg (zenith blind
            spot of an alt-az mount), below the horizon, or airmass over the request's max_airmass.
  TWILIGHT  Sun above the band's twilight limit (band.sun_alt_limit_deg).
  MOON_SEP  closer to the Moon than min_moon_sep_deg while the Moon is above the horizon (a
            set Moon lights nothing).
  SUN       closer to the Sun than safety.sun_avoidance_deg (at any Sun altitude).
  WINDOW    the step [t, t + step) not inside [not_before, not_after], or the periodic event's
            phase ((t - epoch) / period) mod 1 outside [phase_min, phase_max] at the start or end
            of the step (phase_min > phase_max means the range wraps through phase 0).
  SKY_BRIGHTNESS  Moon illuminated fraction over max_moon_illum while the Moon is up, or the
            modelled sky (sky.physics.sky_brightness_mag: dark sky + Moon + twilight) brighter
            than min_sky_mag. Bands without a sky model (thermal infrared) give nan and never fail.

``evaluate`` adds what depends on the conditions grid.
  SEEING        site seeing (500 nm, zenith) over max_seeing_arcsec.
  RESOLUTION    delivered FWHM (seeing scaled to band and airmass, diffraction, instrument, AO)
                over resolution_arcsec.
  PWV           over max_pwv_mm.
  TRANSMISSION  below TRANSMISSION_FLOOR = 0.1: under a tenth of the light the exposure is not
                worth taking (common practice; no published source), whatever the request says.
  CLOUD         cloud extinction over max_cloud_mag.
  CLOSURE       dome closed, wind over safety.max_wind_ms or humidity over max_humidity_pct.
  NIGHT_END     set at start times whose duration runs past the end of the grid. It explains a
                False in start_ok and does not clear ``ok`` (ok is about the step itself).

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

The waste factors steer rare good conditions to the requests that need them (a request with
no seeing limit scores lower in excellent seeing than in ordinary seeing) while never making
an allowed time worthless: merit >= (T_floor / T_ideal) * 0.5 * 0.75 * X_min / X > 0. Weights
0.5 and 0.25 are design choices (water matters to fewer bands than seeing); we have no site
climatology, so "rare" is measured against the request's own need, not by frequency.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import datetime
from enum import IntFlag
from typing import Sequence

import numpy as np

from scheduler.conditions.grid import ConditionsGrid
from scheduler.model.config import Band, Instrument, ObservatoryConfig
from scheduler.model.request import RequestSpec
from scheduler.sky import physics
from scheduler.sky.ephemeris import SkyGrid


class Reason(IntFlag):
    """One bit per constraint that fails at a time (0 = feasible)."""

    ALTITUDE = 1 << 0  # below the telescope's limit, in the zenith blind spot, or beyond max_airmass
    TWILIGHT = 1 << 1  # Sun too high for the band
    MOON_SEP = 1 << 2
    SKY_BRIGHTNESS = 1 << 3  # sky too bright in the band (Moon, twilight), or Moon too illuminated
    SEEING = 1 << 4
    RESOLUTION = 1 << 5  # delivered FWHM in the band worse than needed
    PWV = 1 << 6
    TRANSMISSION = 1 << 7
    CLOUD = 1 << 8
    CLOSURE = 1 << 9  # dome closed, wind or humidity over the limit
    SUN = 1 << 10  # within the sun-avoidance angle
    WINDOW = 1 << 11  # outside the absolute or periodic time window
    NIGHT_END = 1 << 12  # (start only) the whole exposure does not fit before the grid ends


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


TRANSMISSION_FLOOR = 0.1  # common practice: below a tenth of the light, do not expose
SEEING_WASTE_WEIGHT = 0.5
WATER_WASTE_WEIGHT = 0.25
MOON_UP_ALT_DEG = 0.0
_NIGHT_END = np.uint16(Reason.NIGHT_END)


def reason_names(bits: int) -> list[str]:
    """Names of the Reason bits set in ``bits`` (for `plan why` and reports)."""
    return [r.name for r in Reason if int(bits) & int(r)]


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
    max_seeing: np.ndarray  # [n_r] nan = no limit (a comparison with nan never fails)
    resolution: np.ndarray
    max_pwv: np.ndarray
    max_cloud: np.ndarray
    t_ideal: np.ndarray  # [n_r] band transmission at zenith, no water, no cloud
    groups: tuple[_Group, ...]

    @property
    def shape(self) -> tuple[int, int]:
        return self.reasons.shape  # type: ignore[return-value]


def _limit(requests: Sequence[RequestSpec], name: str) -> np.ndarray:
    return np.array([np.nan if getattr(r, name) is None else float(getattr(r, name)) for r in requests],
                    dtype=np.float64)


def _unix(t: datetime | None, missing: float) -> float:
    return missing if t is None else t.timestamp()


def _flag(reasons: np.ndarray, mask: np.ndarray, bit: Reason) -> None:
    """reasons |= bit where mask (mask broadcasts to reasons)."""
    reasons |= mask.astype(np.uint16) * np.uint16(bit)


def _in_phase(phase: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    plain = (phase >= lo) & (phase <= hi)
    wrapped = (phase >= lo) | (phase <= hi)
    return np.where(lo <= hi, plain, wrapped)


def static_layer(requests: Sequence[RequestSpec], target_rows: np.ndarray, sky: SkyGrid,
                 config: ObservatoryConfig) -> StaticLayer:
    """Masks that depend only on geometry and time; compute once per night and queue."""
    rows = np.asarray(target_rows, dtype=np.int64)
    n_r = len(requests)
    if rows.shape != (n_r,):
        raise ValueError(f"target_rows has shape {rows.shape}; expected ({n_r},), one row per request")
    if n_r and (rows.min() < 0 or rows.max() >= sky.n_targets):
        raise ValueError("target_rows point outside the SkyGrid")
    t = np.asarray(sky.night.times_unix, dtype=np.float64)
    n_t = t.shape[0]
    step = float(sky.night.step_s)
    tel = config.telescope

    alt = sky.alt_deg[rows]
    airmass = np.asarray(sky.airmass[rows], dtype=np.float64)
    reasons = np.zeros((n_r, n_t), dtype=np.uint16)

    # ALTITUDE
    max_am = _limit(requests, "max_airmass")
    with np.errstate(invalid="ignore"):
        bad_alt = (alt < tel.min_altitude_deg) | (alt > tel.max_altitude_deg) | ~np.isfinite(airmass) \
            | (airmass > max_am[:, None])
    _flag(reasons, bad_alt, Reason.ALTITUDE)

    # TWILIGHT, per band limit
    sun_limit = np.array([config.band(r.band).sun_alt_limit_deg for r in requests], dtype=np.float64)
    _flag(reasons, sky.sun_alt_deg[None, :] > sun_limit[:, None], Reason.TWILIGHT)

    # SUN avoidance
    _flag(reasons, sky.sun_sep_deg[rows] < config.safety.sun_avoidance_deg, Reason.SUN)

    # MOON_SEP and Moon illumination, only while the Moon is up
    moon_up = sky.moon_alt_deg > MOON_UP_ALT_DEG
    min_sep = _limit(requests, "min_moon_sep_deg")
    with np.errstate(invalid="ignore"):
        _flag(reasons, moon_up[None, :] & (sky.moon_sep_deg[rows] < min_sep[:, None]), Reason.MOON_SEP)
        max_illum = _limit(requests, "max_moon_illum")
        _flag(reasons, moon_up[None, :] & (sky.moon_illum[None, :] > max_illum[:, None]), Reason.SKY_BRIGHTNESS)

    # WINDOW: absolute, then periodic
    nb = np.array([_unix(r.not_before, -np.inf) for r in requests], dtype=np.float64)
    na = np.array([_unix(r.not_after, np.inf) for r in requests], dtype=np.float64)
    _flag(reasons, (t[None, :] < nb[:, None]) | (t[None, :] + step > na[:, None]), Reason.WINDOW)
    per = np.array([i for i, r in enumerate(requests) if r.period_days is not None and r.period_epoch is not None],
                   dtype=np.int64)
    if per.size:
        sub = [requests[i] for i in per]
        epoch = np.array([r.period_epoch.timestamp() for r in sub])[:, None]
        period = np.array([r.period_days * 86400.0 for r in sub])[:, None]
        lo = np.array([r.phase_min for r in sub], dtype=np.float64)[:, None]
        hi = np.array([r.phase_max for r in sub], dtype=np.float64)[:, None]
        ph0 = np.mod((t[None, :] - epoch) / period, 1.0)
        ph1 = np.mod((t[None, :] + step - epoch) / period, 1.0)
        out = ~(_in_phase(ph0, lo, hi) & _in_phase(ph1, lo, hi))
        reasons[per] |= out.astype(np.uint16) * np.uint16(Reason.WINDOW)

    # groups by (band, instrument); sky brightness per group
    keyed: dict[tuple[str, str], list[int]] = {}
    for i, r in enumerate(requests):
        inst = config.instrument_for(r.band, r.instrument)
        keyed.setdefault((r.band, inst.name), []).append(i)
    groups = tuple(
        _Group(config.band(b), config.instrument_for(b, name), np.array(idx, dtype=np.int64))
        for (b, name), idx in keyed.items()
    )
    sky_mag = np.full((n_r, n_t), np.nan, dtype=np.float32)
    t_ideal = np.ones(n_r, dtype=np.float64)
    for g in groups:
        tg = rows[g.rows]
        t_ideal[g.rows] = float(physics.transmission(g.band, 0.0, 1.0, 0.0))
        if g.band.dark_sky_mag is None:
            continue
        sky_mag[g.rows] = physics.sky_brightness_mag(
            g.band, sky.moon_phase_angle_deg[None, :], sky.moon_sep_deg[tg], sky.moon_alt_deg[None, :],
            sky.alt_deg[tg], sky.sun_alt_deg[None, :])
    min_sky = _limit(requests, "min_sky_mag")
    with np.errstate(invalid="ignore"):
        _flag(reasons, sky_mag < min_sky[:, None], Reason.SKY_BRIGHTNESS)

    finite = np.where(np.isfinite(airmass), airmass, np.inf)
    airmass_min = finite.min(axis=1) if n_t else np.full(n_r, np.inf)

    durations = np.array([
        max(1, math.ceil((config.instrument_for(r.band, r.instrument).setup_s + r.next_exposure_s) / step - 1e-9))
        for r in requests], dtype=np.int64)

    return StaticLayer(
        request_ids=np.array([-1 if r.id is None else r.id for r in requests], dtype=np.int64),
        target_row=rows, step_s=step, reasons=reasons, airmass=airmass, airmass_min=airmass_min,
        sky_mag=sky_mag, duration_steps=durations,
        max_seeing=_limit(requests, "max_seeing_arcsec"), resolution=_limit(requests, "resolution_arcsec"),
        max_pwv=_limit(requests, "max_pwv_mm"), max_cloud=_limit(requests, "max_cloud_mag"),
        t_ideal=t_ideal, groups=groups,
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
    """Full feasibility: the static layer (computed here unless given) plus the conditions layers."""
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
    safety = config.safety
    reasons = st.reasons.copy()

    closure = ~np.asarray(cond.dome_open, dtype=bool) | (cond.wind_ms > safety.max_wind_ms) \
        | (cond.humidity_pct > safety.max_humidity_pct)
    _flag(reasons, closure[None, :], Reason.CLOSURE)
    _flag(reasons, seeing[None, :] > st.max_seeing[:, None], Reason.SEEING)
    _flag(reasons, pwv[None, :] > st.max_pwv[:, None], Reason.PWV)
    _flag(reasons, cloud[None, :] > st.max_cloud[:, None], Reason.CLOUD)

    fwhm = np.empty((n_r, n_t), dtype=np.float64)
    trans = np.empty((n_r, n_t), dtype=np.float64)
    ap = config.telescope.aperture_m
    with np.errstate(invalid="ignore", over="ignore"):
        for g in st.groups:  # a handful of (band, instrument) pairs
            x = st.airmass[g.rows]
            fwhm[g.rows] = physics.delivered_fwhm_arcsec(seeing[None, :], x, g.band, g.instrument, ap)
            trans[g.rows] = physics.transmission(g.band, pwv[None, :], x, cloud[None, :])
        # below the horizon ALTITUDE says it all; no image or transmission reason on top
        up = np.isfinite(st.airmass)
        _flag(reasons, up & (fwhm > st.resolution[:, None]), Reason.RESOLUTION)
    _flag(reasons, up & (trans < TRANSMISSION_FLOOR), Reason.TRANSMISSION)

    ok = reasons == 0
    start_ok, fits = start_windows(ok, st.duration_steps)
    reasons |= (~fits).astype(np.uint16) * _NIGHT_END

    merit = _merit(st, ok, seeing, pwv, fwhm, trans, config)
    return Feasibility(
        request_ids=st.request_ids.copy(), target_row=st.target_row.copy(), ok=ok, reasons=reasons,
        merit=merit, duration_steps=st.duration_steps.copy(), start_ok=start_ok,
        fwhm_arcsec=fwhm.astype(np.float32), transmission=trans.astype(np.float32), sky_mag=st.sky_mag,
    )


def _ratio(num: np.ndarray, den: np.ndarray) -> np.ndarray:
    """num / den where den is a positive limit, nan where there is no limit."""
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(np.isfinite(den) & (den > 0), num / den, np.nan)


def _merit(st: StaticLayer, ok: np.ndarray, seeing: np.ndarray, pwv: np.ndarray, fwhm: np.ndarray,
           trans: np.ndarray, config: ObservatoryConfig) -> np.ndarray:
    """See the module docstring. 0 where not ok."""
    d = config.defaults
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        m_air = st.airmass_min[:, None] / st.airmass
        m_t = trans / st.t_ideal[:, None]

        r_see = _ratio(seeing[None, :], st.max_seeing[:, None])
        r_res = _ratio(fwhm, st.resolution[:, None])
        r = np.fmax(r_see, r_res)  # fmax ignores nan (no limit)
        no_limit = np.isnan(st.max_seeing) & np.isnan(st.resolution)
        if no_limit.any():
            r[no_limit] = seeing[None, :] / d.seeing_arcsec
        w_see = 1.0 - np.clip(r, 0.0, 1.0)

        ref_pwv = np.where(np.isnan(st.max_pwv), d.pwv_mm, st.max_pwv)
        r_w = np.where(ref_pwv[:, None] > 0, pwv[None, :] / np.maximum(ref_pwv[:, None], 1e-12), 1.0)
        w_water = 1.0 - np.clip(r_w, 0.0, 1.0)

        m = m_air * m_t * (1.0 - SEEING_WASTE_WEIGHT * w_see) * (1.0 - WATER_WASTE_WEIGHT * w_water)
    m = np.where(ok, np.clip(np.nan_to_num(m, nan=0.0), 1e-6, 1.0), 0.0)
    return m.astype(np.float32)
