"""The constraint catalog: every physical constraint, once.

Each constraint is one small class (in the manner of a grid-returning constraint library) that
carries everything the rest of the program needs to know about it:

  reason    its ``Reason`` bit in the feasibility bitmask;
  label     the short lowercase name the solver writes into "never feasible: <label>";
  wording   the one line users read when it binds (`plan why`, `request show --night`);
  layer     STATIC (geometry and clock: once per night and queue), CONDITIONS (needs the
            conditions grid) or START (about a start time, not a step: it never clears ``ok``);
  fails     the mask over the whole requests x times grid (numpy, no loop over time): True
            where the constraint fails;
  detail    how close it came for one request, in its own units (`plan why`);
  breach    the failure over a span of steps, with its numbers (the service's re-plan reasons).

Feasibility evaluates ``CATALOG``; explanations, validity reasons and solver labels read it.
The independent checker (solve/checker.py) does not: it re-derives every rule on its own, and
tests/test_catalog.py proves each entry is evaluated, explained and caught by the checker.

What each mask means (formulas and their sources: docs/physics.md):

  ALTITUDE        altitude below telescope.min_altitude_deg, above max_altitude_deg (zenith blind
                  spot of an alt-az mount), below the horizon, or airmass over max_airmass.
  TWILIGHT        Sun above the band's twilight limit (band.sun_alt_limit_deg).
  MOON_SEP        closer to the Moon than min_moon_sep_deg while the Moon is above the horizon.
  SKY_BRIGHTNESS  Moon illuminated fraction over max_moon_illum while the Moon is up, or the
                  modelled sky (sky.physics.sky_brightness_mag: dark sky + Moon + twilight)
                  brighter than min_sky_mag. Bands without a sky model (thermal infrared) give
                  nan and never fail.
  SEEING          site seeing (500 nm, zenith) over max_seeing_arcsec.
  RESOLUTION      delivered FWHM (seeing scaled to band and airmass, diffraction, instrument, AO)
                  over resolution_arcsec (only above the horizon).
  PWV             over max_pwv_mm.
  TRANSMISSION    below TRANSMISSION_FLOOR = 0.1: under a tenth of the light the exposure is not
                  worth taking (common practice; no published source), whatever the request says.
  CLOUD           cloud extinction over max_cloud_mag.
  CLOSURE         dome closed, wind over safety.max_wind_ms or humidity over max_humidity_pct.
  SUN             closer to the Sun than safety.sun_avoidance_deg (at any Sun altitude).
  WINDOW          the step [t, t + step) not inside [not_before, not_after], or the periodic
                  event's phase ((t - epoch) / period) mod 1 outside [phase_min, phase_max] at the
                  start or end of the step (phase_min > phase_max wraps through phase 0), or a
                  moving target's ephemeris table does not cover the time (no position: ALTITUDE
                  is not set there).
  NIGHT_END       (START) the start time's setup + exposure runs past the end of the grid.
  AO_STREHL       the request needs the adaptive-optics core (its resolution_arcsec is met by the
                  corrected core but not by the seeing halo) and the predicted Strehl ratio
                  (sky.adaptive_optics: fitting, guide-star distance, coherence time) is below the
                  instrument's ao_strehl_min. RESOLUTION is not set where this is.
  SURFACE         a dish's Ruze efficiency exp(-(4 pi sigma / lambda)^2) below the telescope's
                  surface_efficiency_floor (sigma: the sunlit value while the Sun is up).

A limit a request does not set is nan, and a comparison with nan never fails.
To add a constraint: DEVELOPERS.md, "Adding a constraint".
"""

from __future__ import annotations

from dataclasses import dataclass
from enum import IntFlag
from typing import TYPE_CHECKING, Callable, ClassVar, Mapping, Sequence

import numpy as np

from scheduler.conditions.grid import ConditionsGrid
from scheduler.model.config import ObservatoryConfig
from scheduler.model.request import RequestSpec
from scheduler.model.timegrid import iso
from scheduler.sky.ephemeris import SkyGrid

if TYPE_CHECKING:  # feasibility imports this module
    from scheduler.constraints.feasibility import Feasibility


class Reason(IntFlag):
    """One bit per constraint that fails at a time (0 = feasible). The bits are stable."""

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
    AO_STREHL = 1 << 13  # adaptive optics: too little light in the corrected core for the resolution needed
    SURFACE = 1 << 14  # dish surface efficiency (Ruze) below the floor (sunlit dish)


TRANSMISSION_FLOOR = 0.1  # common practice: below a tenth of the light, do not expose
MOON_UP_ALT_DEG = 0.0  # a set Moon lights nothing

STATIC, CONDITIONS, START = "static", "conditions", "start"


# --------------------------------------------------------------------------- what constraints see

@dataclass(frozen=True)
class Grid:
    """The requests x times grid of one night, as the constraints read it (row = request).

    ``cond``, ``fwhm`` and ``transmission`` are None while the static layer is evaluated.
    """

    requests: Sequence[RequestSpec]
    config: ObservatoryConfig
    sky: SkyGrid
    rows: np.ndarray  # [n_r] target row of each request in the SkyGrid
    airmass: np.ndarray  # [n_r, n_t] float64, inf below the horizon
    sky_mag: np.ndarray  # [n_r, n_t] band sky brightness, nan where not modelled
    limits: Mapping[str, np.ndarray]  # request field -> [n_r] float64, nan = no limit
    duration_steps: np.ndarray  # [n_r]
    covered: np.ndarray | None = None  # [n_r, n_t] the target has a position (moving targets' tables)
    surface_eff: np.ndarray | None = None  # [n_r, n_t] dish Ruze efficiency (1 where it does not apply)
    cond: ConditionsGrid | None = None
    fwhm: np.ndarray | None = None  # [n_r, n_t] delivered FWHM in the band
    transmission: np.ndarray | None = None  # [n_r, n_t]
    strehl: np.ndarray | None = None  # [n_r, n_t] predicted AO Strehl ratio, nan where not modelled
    halo_fwhm: np.ndarray | None = None  # [n_r, n_t] the image without AO correction
    core_fwhm: np.ndarray | None = None  # [n_r] the corrected core (diffraction and instrument)

    @property
    def times(self) -> np.ndarray:
        return np.asarray(self.sky.night.times_unix, dtype=np.float64)

    @property
    def step_s(self) -> float:
        return float(self.sky.night.step_s)

    @property
    def up(self) -> np.ndarray:
        """Above the horizon (below it, ALTITUDE says it all)."""
        return np.isfinite(self.airmass)


@dataclass(frozen=True)
class Closeness:
    """One request (row 0 of ``sky`` and ``feas``) from ``now_step`` on, for ``detail``.

    ``focus`` (bool over the steps from now_step): where any is True, "best" looks only there
    (the times when nothing but the binding constraints fail), so the figure is from a time
    that would work were this constraint lifted. Every figure of one detail uses these times.
    """

    spec: RequestSpec
    config: ObservatoryConfig
    sky: SkyGrid
    cond: ConditionsGrid
    feas: Feasibility  # row 0: this request
    now_step: int
    fmt_t: Callable[[float], str]
    focus: np.ndarray | None = None

    @property
    def sl(self) -> slice:
        return slice(self.now_step, None)

    def at(self, i: int) -> str:
        """The time of step now_step + i, formatted."""
        return self.fmt_t(self.sky.night.times_unix[self.now_step + i])

    def best(self, values: np.ndarray, mode: str) -> int:
        """Index (from now_step) of the lowest ("min") or highest ("max") value; nan never wins."""
        v = np.asarray(values, dtype=np.float64)
        use = self.focus if self.focus is not None and self.focus.any() else None
        worst = np.inf if mode == "min" else -np.inf
        v = np.where(np.isnan(v), worst, v)
        if use is not None:
            v = np.where(use, v, worst)
        return int(np.argmin(v) if mode == "min" else np.argmax(v))


# --------------------------------------------------------------------------- the constraints

class Constraint:
    """Base of the catalog entries; see the module docstring for each attribute."""

    reason: ClassVar[Reason]
    label: ClassVar[str]
    wording: ClassVar[str]
    layer: ClassVar[str] = STATIC
    limits: ClassVar[tuple[str, ...]] = ()  # RequestSpec fields read as per-request limits

    @property
    def name(self) -> str:
        return self.reason.name

    def fails(self, g: Grid) -> np.ndarray:
        raise NotImplementedError

    def detail(self, c: Closeness) -> tuple[str, int | None]:
        """(text, absolute grid step it refers to or None)."""
        raise NotImplementedError

    def breach(self, spec: RequestSpec, cond: ConditionsGrid, a: int, b: int) -> str:
        return self.label

    def __repr__(self) -> str:
        return f"<constraint {self.name}>"


class Altitude(Constraint):
    reason, label = Reason.ALTITUDE, "altitude"
    wording = "altitude/airmass (telescope limits, zenith blind spot, max_airmass)"
    limits = ("max_airmass",)

    def fails(self, g):
        tel = g.config.telescope
        alt = g.sky.alt_deg[g.rows]
        with np.errstate(invalid="ignore"):
            bad = (alt < tel.min_altitude_deg) | (alt > tel.max_altitude_deg) | ~np.isfinite(g.airmass) \
                | (g.airmass > g.limits["max_airmass"][:, None])
        return bad if g.covered is None else bad & g.covered  # no position: WINDOW says it

    def detail(self, c):
        alt = np.asarray(c.sky.alt_deg[0, c.sl], dtype=np.float64)
        i = c.best(alt, "max")
        tel = c.config.telescope
        txt = (f"highest altitude {alt[i]:.1f} deg at {c.at(i)}; the telescope needs "
               f"{tel.min_altitude_deg:g} to {tel.max_altitude_deg:g} deg")
        if c.spec.max_airmass is not None:
            # the airmass at the same time as the altitude (the lowest airmass of the same times)
            am = float(c.sky.airmass[0, c.now_step + i])
            low = f"{am:.2f}" if np.isfinite(am) else "none (below the horizon)"
            txt += f"; lowest airmass {low}, its max_airmass is {c.spec.max_airmass:g}"
        return txt, c.now_step + i


class Twilight(Constraint):
    reason, label = Reason.TWILIGHT, "twilight"
    wording = "twilight (Sun too high for the band)"

    def fails(self, g):
        limit = np.array([g.config.band(r.band).sun_alt_limit_deg for r in g.requests], dtype=np.float64)
        return g.sky.sun_alt_deg[None, :] > limit[:, None]

    def detail(self, c):
        return f"band {c.spec.band} needs the Sun below {c.config.band(c.spec.band).sun_alt_limit_deg:g} deg", None


class MoonSeparation(Constraint):
    reason, label = Reason.MOON_SEP, "moon separation"
    wording = "Moon separation"
    limits = ("min_moon_sep_deg",)

    def fails(self, g):
        moon_up = g.sky.moon_alt_deg > MOON_UP_ALT_DEG
        with np.errstate(invalid="ignore"):
            return moon_up[None, :] & (g.sky.moon_sep_deg[g.rows] < g.limits["min_moon_sep_deg"][:, None])

    def detail(self, c):
        up = c.sky.moon_alt_deg[c.sl] > MOON_UP_ALT_DEG
        sep = np.where(up, c.sky.moon_sep_deg[0, c.sl], np.nan)
        if np.all(np.isnan(sep)):
            return "the Moon is down all night", None
        i = c.best(sep, "max")
        if np.isnan(sep[i]):  # the focus times are all Moon-down ones
            i = int(np.nanargmax(sep))
        return (f"largest Moon separation while the Moon is up {sep[i]:.1f} deg at {c.at(i)}; its min_moon_sep_deg "
                f"is {c.spec.min_moon_sep_deg:g}"), c.now_step + i


class SkyBrightness(Constraint):
    reason, label = Reason.SKY_BRIGHTNESS, "sky brightness"
    wording = "sky brightness / Moon illumination"
    limits = ("max_moon_illum", "min_sky_mag")

    def fails(self, g):
        moon_up = g.sky.moon_alt_deg > MOON_UP_ALT_DEG
        with np.errstate(invalid="ignore"):
            lit = moon_up[None, :] & (g.sky.moon_illum[None, :] > g.limits["max_moon_illum"][:, None])
            return lit | (g.sky_mag < g.limits["min_sky_mag"][:, None])

    def detail(self, c):
        parts, idx = [], None
        if c.spec.max_moon_illum is not None:
            parts.append(f"Moon illuminated fraction {float(np.max(c.sky.moon_illum)):.2f} while up; "
                         f"its max_moon_illum is {c.spec.max_moon_illum:g}")
        if c.spec.min_sky_mag is not None:
            v = np.nan_to_num(c.feas.sky_mag[0, c.sl], nan=-99)
            i = c.best(v, "max")
            idx = c.now_step + i
            parts.append(f"darkest sky {v[i]:.2f} mag/arcsec^2 at {c.at(i)}; its min_sky_mag is {c.spec.min_sky_mag:g}")
        return "; ".join(parts) or "sky too bright", idx


class Seeing(Constraint):
    reason, label = Reason.SEEING, "seeing"
    wording = "seeing (max_seeing_arcsec)"
    layer = CONDITIONS
    limits = ("max_seeing_arcsec",)

    def fails(self, g):
        return np.asarray(g.cond.seeing_arcsec, dtype=np.float64)[None, :] > g.limits["max_seeing_arcsec"][:, None]

    def detail(self, c):
        i = c.best(c.cond.seeing_arcsec[c.sl], "min")
        return (f"best seeing {c.cond.seeing_arcsec[c.now_step + i]:.2f}\" at {c.at(i)}; its max_seeing_arcsec is "
                f"{c.spec.max_seeing_arcsec:g}"), c.now_step + i

    def breach(self, spec, cond, a, b):
        if spec.max_seeing_arcsec is None:
            return self.label
        return (f"seeing up to {float(np.max(cond.seeing_arcsec[a:b])):.2f} arcsec over its "
                f"{spec.max_seeing_arcsec:g} arcsec limit")


def ao_core_lost(g: Grid) -> np.ndarray:
    """Where the request's resolution needs the AO core (met by the core, not by the halo) and the
    predicted Strehl ratio is below the instrument's threshold."""
    n_r = len(g.requests)
    if g.strehl is None:
        return np.zeros(g.airmass.shape, dtype=bool)
    s_min = np.array([g.config.instrument_for(r.band, r.instrument).ao_strehl_min for r in g.requests],
                     dtype=np.float64).reshape(n_r, 1)
    res = g.limits["resolution_arcsec"][:, None]
    with np.errstate(invalid="ignore"):
        needs_core = (g.core_fwhm[:, None] <= res) & (g.halo_fwhm > res)
        return g.up & needs_core & np.isfinite(g.strehl) & (g.strehl < s_min)


class Resolution(Constraint):
    reason, label = Reason.RESOLUTION, "resolution"
    wording = "delivered resolution in the band (resolution_arcsec)"
    layer = CONDITIONS
    limits = ("resolution_arcsec",)

    def fails(self, g):
        with np.errstate(invalid="ignore"):
            return g.up & (g.fwhm > g.limits["resolution_arcsec"][:, None]) & ~ao_core_lost(g)

    def detail(self, c):
        v = np.where(np.isfinite(c.feas.fwhm_arcsec[0, c.sl]), c.feas.fwhm_arcsec[0, c.sl], np.inf)
        i = c.best(v, "min")
        return (f"sharpest predicted image {v[i]:.3f}\" in band {c.spec.band} at {c.at(i)}; its resolution_arcsec is "
                f"{c.spec.resolution_arcsec:g}"), c.now_step + i


class Pwv(Constraint):
    reason, label = Reason.PWV, "pwv"
    wording = "water vapour (max_pwv_mm)"
    layer = CONDITIONS
    limits = ("max_pwv_mm",)

    def fails(self, g):
        return np.asarray(g.cond.pwv_mm, dtype=np.float64)[None, :] > g.limits["max_pwv_mm"][:, None]

    def detail(self, c):
        i = c.best(c.cond.pwv_mm[c.sl], "min")
        return (f"driest {c.cond.pwv_mm[c.now_step + i]:.2f} mm at {c.at(i)}; its max_pwv_mm is "
                f"{c.spec.max_pwv_mm:g}"), c.now_step + i

    def breach(self, spec, cond, a, b):
        if spec.max_pwv_mm is None:
            return self.label
        return f"PWV up to {float(np.max(cond.pwv_mm[a:b])):.1f} mm over its {spec.max_pwv_mm:g} mm limit"


class Transmission(Constraint):
    reason, label = Reason.TRANSMISSION, "transmission"
    wording = "atmospheric transmission below the floor"
    layer = CONDITIONS

    def fails(self, g):
        return g.up & (g.transmission < TRANSMISSION_FLOOR)

    def detail(self, c):
        v = np.nan_to_num(c.feas.transmission[0, c.sl], nan=0.0)
        i = c.best(v, "max")
        return f"best transmission {v[i]:.3f} at {c.at(i)}; the floor is {TRANSMISSION_FLOOR:g}", c.now_step + i


class Cloud(Constraint):
    reason, label = Reason.CLOUD, "cloud"
    wording = "cloud extinction (max_cloud_mag)"
    layer = CONDITIONS
    limits = ("max_cloud_mag",)

    def fails(self, g):
        return np.asarray(g.cond.cloud_mag, dtype=np.float64)[None, :] > g.limits["max_cloud_mag"][:, None]

    def detail(self, c):
        i = c.best(c.cond.cloud_mag[c.sl], "min")
        return (f"least cloud {c.cond.cloud_mag[c.now_step + i]:.2f} mag at {c.at(i)}; its max_cloud_mag is "
                f"{c.spec.max_cloud_mag:g}"), c.now_step + i

    def breach(self, spec, cond, a, b):
        if spec.max_cloud_mag is None:
            return self.label
        return f"cloud up to {float(np.max(cond.cloud_mag[a:b])):.2f} mag over its {spec.max_cloud_mag:g} mag limit"


class Closure(Constraint):
    reason, label = Reason.CLOSURE, "closure"
    wording = "dome closed (operator, wind or humidity)"
    layer = CONDITIONS

    def fails(self, g):
        safety, cond = g.config.safety, g.cond
        closed = ~np.asarray(cond.dome_open, dtype=bool) | (cond.wind_ms > safety.max_wind_ms) \
            | (cond.humidity_pct > safety.max_humidity_pct)
        return np.broadcast_to(closed[None, :], g.airmass.shape)

    def detail(self, c):
        closed = np.count_nonzero(c.feas.reasons[0, c.sl] & int(self.reason)) * c.sky.night.step_s / 3600.0
        return f"dome closed (operator, wind or humidity) for {closed:.1f} h of the night", None

    def breach(self, spec, cond, a, b):
        return "closure (dome closed, or wind or humidity over the limit)"


class SunAvoidance(Constraint):
    reason, label = Reason.SUN, "sun avoidance"
    wording = "sun avoidance"

    def fails(self, g):
        return g.sky.sun_sep_deg[g.rows] < g.config.safety.sun_avoidance_deg

    def detail(self, c):
        return f"within {c.config.safety.sun_avoidance_deg:g} deg of the Sun", None


def _in_phase(phase: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """phase in [lo, hi]; lo > hi means the range wraps through phase 0."""
    plain = (phase >= lo) & (phase <= hi)
    wrapped = (phase >= lo) | (phase <= hi)
    return np.where(lo <= hi, plain, wrapped)


class TimeWindow(Constraint):
    reason, label = Reason.WINDOW, "window"
    wording = "time window (not_before/not_after, periodic phase, or the ephemeris table's span)"

    def fails(self, g):
        t, step, reqs = g.times, g.step_s, g.requests
        nb = np.array([-np.inf if r.not_before is None else r.not_before.timestamp() for r in reqs], dtype=np.float64)
        na = np.array([np.inf if r.not_after is None else r.not_after.timestamp() for r in reqs], dtype=np.float64)
        out = (t[None, :] < nb[:, None]) | (t[None, :] + step > na[:, None])
        per = np.array([i for i, r in enumerate(reqs) if r.period_days is not None and r.period_epoch is not None],
                       dtype=np.int64)
        if per.size:  # the phase must be inside at both ends of the step
            sub = [reqs[i] for i in per]
            epoch = np.array([r.period_epoch.timestamp() for r in sub])[:, None]
            period = np.array([r.period_days * 86400.0 for r in sub])[:, None]
            lo = np.array([r.phase_min for r in sub], dtype=np.float64)[:, None]
            hi = np.array([r.phase_max for r in sub], dtype=np.float64)[:, None]
            ph0 = np.mod((t[None, :] - epoch) / period, 1.0)
            ph1 = np.mod((t[None, :] + step - epoch) / period, 1.0)
            out[per] |= ~(_in_phase(ph0, lo, hi) & _in_phase(ph1, lo, hi))
        if g.covered is not None:
            out |= ~g.covered  # a moving target's table does not reach this time
        return out

    def detail(self, c):
        spec, t = c.spec, c.sky.night.times_unix
        parts = []
        if spec.not_before or spec.not_after:
            parts.append(f"its window is {iso(spec.not_before) or '-'} to {iso(spec.not_after) or '-'}")
        if spec.period_days is not None:
            parts.append(f"periodic window phase {spec.phase_min:g}-{spec.phase_max:g} of {spec.period_days:g} d "
                         f"from {iso(spec.period_epoch)}")
        if spec.ephemeris is not None:
            tab = spec.ephemeris
            parts.append(f"its ephemeris table covers {tab.row_time(0)} (row 1) to {tab.row_time(tab.n_rows - 1)} "
                         f"(row {tab.n_rows})")
        return "; ".join(parts) + f"; the night runs {c.fmt_t(t[0])} to {c.fmt_t(t[-1] + c.sky.night.step_s)}", None


class NightEnd(Constraint):
    reason, label = Reason.NIGHT_END, "night end"
    wording = "the exposure does not fit before the night ends"
    layer = START

    def fails(self, g):
        n_t = g.airmass.shape[1]
        return np.arange(n_t, dtype=np.int64)[None, :] + np.asarray(g.duration_steps, dtype=np.int64)[:, None] > n_t

    def detail(self, c):
        t, step = c.sky.night.times_unix, c.sky.night.step_s
        need = int(c.feas.duration_steps[0]) * step
        left = max(0, t.size - c.now_step) * step
        return (f"it needs {need / 60:.0f} min (setup + exposure); {left / 60:.0f} min of the night remain before "
                f"it ends at {c.fmt_t(t[-1] + step)}"), None


class AoStrehl(Constraint):
    reason, label = Reason.AO_STREHL, "ao strehl"
    wording = "adaptive-optics correction (Strehl ratio below the instrument's threshold)"
    layer = CONDITIONS
    limits = ("resolution_arcsec",)

    def fails(self, g):
        return ao_core_lost(g)

    def detail(self, c):
        s = np.asarray(c.feas.strehl[0, c.sl], dtype=np.float64)
        if s.size == 0 or np.all(np.isnan(s)):
            return "no adaptive-optics prediction for this band and instrument", None
        i = c.best(s, "max")
        inst = c.config.instrument_for(c.spec.band, c.spec.instrument)
        sep = c.spec.guide_star_sep_arcsec or 0.0
        where = f"at {sep:g} arcsec from the guide star" if sep > 0 else "on axis"
        tau = c.cond.coherence_time_ms
        tau_txt = ""
        if tau is not None and np.isfinite(tau[c.now_step + i]) and inst.ao_servo_lag_ms is not None:
            tau_txt = f", coherence time {tau[c.now_step + i]:.1f} ms"
        return (f"AO Strehl in {c.spec.band} {s[i]:.2f} {where}, needs {inst.ao_strehl_min:g} "
                f"(best at {c.at(i)}, seeing {c.cond.seeing_arcsec[c.now_step + i]:.2f}\"{tau_txt}); "
                f"without the core the image is {c.feas.halo_fwhm[0, c.now_step + i]:.2f}\", "
                f"its resolution_arcsec is {c.spec.resolution_arcsec:g}"), c.now_step + i

    def breach(self, spec, cond, a, b):
        return "adaptive-optics Strehl below the instrument's threshold"


class Surface(Constraint):
    reason, label = Reason.SURFACE, "dish surface"
    wording = "dish surface efficiency (Ruze) below the floor"

    def fails(self, g):
        if g.surface_eff is None:
            return np.zeros(g.airmass.shape, dtype=bool)
        return g.surface_eff < g.config.telescope.surface_efficiency_floor

    def detail(self, c):
        from scheduler.sky.physics import surface_rms_um

        eff = np.asarray(c.feas.surface_eff[0, c.sl], dtype=np.float64)
        i = c.best(eff, "max")
        tel = c.config.telescope
        sun = float(c.sky.sun_alt_deg[c.now_step + i])
        lit = "sunlit" if sun > 0 else "at night"
        return (f"dish surface efficiency in {c.spec.band} {eff[i]:.2f} ({lit}, "
                f"{float(surface_rms_um(tel, sun)):g} um rms) at {c.at(i)}; the floor is "
                f"{tel.surface_efficiency_floor:g}"), c.now_step + i


# Ordered by bit. The single list: tests/test_catalog.py holds it to one entry per Reason bit.
CATALOG: tuple[Constraint, ...] = (
    Altitude(), Twilight(), MoonSeparation(), SkyBrightness(), Seeing(), Resolution(), Pwv(), Transmission(),
    Cloud(), Closure(), SunAvoidance(), TimeWindow(), NightEnd(), AoStrehl(), Surface(),
)

BY_REASON: dict[Reason, Constraint] = {c.reason: c for c in CATALOG}
BY_NAME: dict[str, Constraint] = {c.name: c for c in CATALOG}
STEP_CONSTRAINTS: tuple[Constraint, ...] = tuple(c for c in CATALOG if c.layer != START)  # about a step itself
STEP_BITS = int(sum(int(c.reason) for c in STEP_CONSTRAINTS))
LIMIT_FIELDS: tuple[str, ...] = tuple(dict.fromkeys(f for c in CATALOG for f in c.limits))


def of_layer(layer: str) -> tuple[Constraint, ...]:
    return tuple(c for c in CATALOG if c.layer == layer)


def names(bits: int) -> list[str]:
    """Names of the constraints whose bits are set in ``bits``, in catalog order."""
    return [c.name for c in CATALOG if int(bits) & int(c.reason)]


def labels(bits: int) -> list[str]:
    """Labels of the constraints whose bits are set in ``bits``, in catalog order."""
    return [c.label for c in CATALOG if int(bits) & int(c.reason)]
