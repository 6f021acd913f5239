"""Remaining opportunities: on how many nights from tonight can each request still be done?

A night is an opportunity for a request when it has at least one start whose whole duration
(setup + the exposure still owed) passes every constraint that does not depend on the
weather: altitude and airmass, the zenith blind spot, twilight for its band, Sun avoidance,
Moon separation and illumination, the modelled sky brightness, its absolute and periodic
windows. Those are exactly the constraints of ``feasibility.static_layer``; this module
evaluates that same code, once, on a coarse grid spanning all the nights, and never restates
a constraint.

How (one vectorised pass):
1. Every night's instants from local noon to the next local noon, every ``step`` (default
   10 min, ``planning.opportunity_step_min``); the Sun's altitude at all of them in one
   astropy transform; the instants where the Sun is below the horizon on any night are kept
   (the planning grid runs from sunset to sunrise: SUNSET_ALT_DEG, the same definition).
2. One "night" whose grid is all those instants, night after night; ``ephemeris.night_frame``
   computes Earth rotation, Sun and Moon for all of them in one transform; targets are taken
   to topocentric CIRS once, at the middle of the span (over 30 days on either side the
   annual aberration and precession move a target by < 25 arcsec: nothing at this grid's
   scale, where a target's altitude moves up to 2.5 deg per step).
3. ``static_layer`` on that grid, in blocks of requests (memory stays bounded); instants
   where the Sun is up are not night; per request and night, a start exists when a run of
   ``max(ceil(duration / step) - 1, 0) + 1`` consecutive instants is allowed.

Resolution and why it is enough. Every weather-independent constraint moves smoothly (a
target's altitude changes at most 15 deg/h, the Sun's and the Moon's about as fast), so a
night's verdict can differ from the planning grid's only when the night's longest allowed run
is within one coarse step of the duration: each instant of the run is checked over the step
after it ([t, t + step) for windows), so the instants cover the duration to within one step
on either side. Those marginal nights are the first and last of a target's season and nights
with a window barely longer than the exposure. The urgency factor only needs to tell "last
chance" from "a few" from "many", which a one-night error at the margin does not change, and
the planner never relies on this count for tonight: a request that has a start on tonight's
planning grid counts tonight as an opportunity whatever the coarse grid says
(``opportunities_left``).

Cache: per request and night, keyed on the request's fields that the constraints read, the
night, and a hash of the configuration parts they read (``config_key``). A new night costs one
night per request; a new or changed request costs its nights; nothing else is recomputed.
"""

from __future__ import annotations

import hashlib
import math
import threading
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, replace
from datetime import date, datetime, time, timedelta
from typing import Sequence
from zoneinfo import ZoneInfo

import numpy as np

from scheduler.constraints.feasibility import start_windows, static_layer
from scheduler.model.config import ObservatoryConfig
from scheduler.model.request import RequestSpec
from scheduler.model.timegrid import utc
from scheduler.sky.airmass import kasten_young_1989
from scheduler.sky.ephemeris import SkyGrid, _targets_cirs, night_frame
from scheduler.sky.night import SUNSET_ALT_DEG, Night

_BLOCK = 128  # requests per static_layer call: [128, 60 nights x ~85 instants] arrays, ~10 MB each


@dataclass(frozen=True)
class Opportunities:
    """Per request (rows follow the request list) and night (columns: tonight, tonight + 1, ...)."""

    nights: tuple[date, ...]
    feasible: np.ndarray  # [n_r, n_nights] bool: at least one feasible start that night
    horizon: np.ndarray  # [n_r] int: nights that count (to not_after's night, at most the lookahead)

    @property
    def counts(self) -> np.ndarray:
        """[n_r] remaining opportunities from tonight (tonight's coarse verdict included)."""
        cols = np.arange(len(self.nights))[None, :]
        return np.sum(self.feasible & (cols < self.horizon[:, None]), axis=1).astype(np.int64)

    def future(self) -> np.ndarray:
        """[n_r] opportunities after tonight, within each request's horizon."""
        cols = np.arange(len(self.nights))[None, :]
        return np.sum(self.feasible & (cols >= 1) & (cols < self.horizon[:, None]), axis=1).astype(np.int64)


def opportunities_left(opp: Opportunities, feasible_tonight: np.ndarray) -> np.ndarray:
    """Remaining opportunities counting tonight from the planning grid: ``feasible_tonight``
    [n_r] says whether a request has a start tonight (on the real grid); the later nights come
    from the coarse count. A request being planned tonight therefore has at least 1."""
    return np.asarray(feasible_tonight, dtype=np.int64) + opp.future()


# --------------------------------------------------------------------------- keys

def config_key(config: ObservatoryConfig) -> str:
    """Hash of what the weather-independent constraints read from the configuration."""
    p = config.planning
    parts = (config.site, config.telescope, tuple(sorted(config.bands.items())), config.instruments,
             config.safety.sun_avoidance_deg, p.opportunity_step_min)
    return hashlib.sha1(repr(parts).encode()).hexdigest()[:16]


_KEY_FIELDS = ("ra_deg", "dec_deg", "band", "instrument", "max_airmass", "min_moon_sep_deg", "max_moon_illum",
               "min_sky_mag", "not_before", "not_after", "period_epoch", "period_days", "phase_min", "phase_max")


def request_key(spec: RequestSpec) -> str:
    """Hash of the request fields the count depends on (the exposure still owed included)."""
    vals = tuple(getattr(spec, f) for f in _KEY_FIELDS) + (round(spec.next_exposure_s, 3), spec.moving)
    return hashlib.sha1(repr(vals).encode()).hexdigest()[:16]


def horizon_nights(spec: RequestSpec, tonight: date, lookahead: int, site_tz: str) -> int:
    """Nights that count for a request: from tonight to the night holding its not_after, at most
    ``lookahead``; 0 when not_after is already before tonight's noon."""
    if spec.not_after is None:
        return lookahead
    local = spec.not_after.astimezone(ZoneInfo(site_tz))
    last = local.date() if local.hour >= 12 else local.date() - timedelta(days=1)
    return int(min(lookahead, max(0, (last - tonight).days + 1)))


# --------------------------------------------------------------------------- the computation

def _local_noon_unix(tz: ZoneInfo, d: date) -> float:
    return datetime.combine(d, time(12, 0), tzinfo=tz).timestamp()


@dataclass(frozen=True)
class _CoarseGrid:
    nights: tuple[date, ...]
    night: Night  # the pseudo-night whose grid is every kept instant, night after night
    frame: object  # ephemeris frame (Earth rotation, Sun, Moon) of those instants
    dark: np.ndarray  # [n_nights * n_k] bool: the Sun is below the horizon (inside the planning night)
    n_k: int  # instants per night
    step_s: int


# Kasten & Young (1989) tabulated every 0.01 deg and read by linear interpolation: within 1e-4
# of the formula above 5 deg altitude, a tenth of the formula's cost over ~10^7 cells.
_KY_PER_DEG = 100
_KY_ALT = np.linspace(0.0, 90.0, 90 * _KY_PER_DEG + 1)
_KY_X = np.concatenate([[np.inf], kasten_young_1989(_KY_ALT[1:])]).astype(np.float32)
_KY_X[0] = _KY_X[1]  # alt <= 0 is set to inf after the interpolation
_SUPPORT_S = 7200.0  # astropy's Sun and Moon every two hours (see ephemeris.night_frame)


def _pseudo_night(first: date, t: np.ndarray, step: int) -> Night:
    return Night(date=first, sunset=utc(t[0]), sunrise=utc(t[-1]), civil_dusk=None, civil_dawn=None,
                 nautical_dusk=None, nautical_dawn=None, astronomical_dusk=None, astronomical_dawn=None,
                 step_s=step, times_unix=np.ascontiguousarray(t, dtype=np.float64))


def _coarse_grid(config: ObservatoryConfig, nights: Sequence[date]) -> _CoarseGrid:
    step = int(config.planning.opportunity_step_min) * 60
    tz = ZoneInfo(config.site.timezone)
    noon = np.array([_local_noon_unix(tz, d) for d in nights], dtype=np.float64)
    k = np.arange(int(math.ceil(86400 / step)), dtype=np.float64)
    t_all = noon[:, None] + k[None, :] * step  # [n_nights, 24 h / step]
    full = night_frame(config.site, _pseudo_night(nights[0], t_all.ravel(), step), support_s=_SUPPORT_S)
    dark_all = full.sun_alt_deg.reshape(t_all.shape) < SUNSET_ALT_DEG
    cols = np.flatnonzero(dark_all.any(axis=0))
    if cols.size == 0:
        cols = np.array([0])  # polar day: no night at all; every instant is marked not dark
    k0, k1 = int(cols[0]), int(cols[-1])
    idx = (np.arange(len(nights))[:, None] * t_all.shape[1] + np.arange(k0, k1 + 1)[None, :]).ravel()
    t = t_all[:, k0:k1 + 1]
    frame = replace(full, rot=full.rot[idx], sun_alt_deg=full.sun_alt_deg[idx], sun_vec=full.sun_vec[idx],
                    moon_alt_deg=full.moon_alt_deg[idx], moon_vec=full.moon_vec[idx],
                    moon_illum=full.moon_illum[idx], moon_phase_angle_deg=full.moon_phase_angle_deg[idx])
    return _CoarseGrid(tuple(nights), _pseudo_night(nights[0], t.ravel(), step), frame,
                       dark_all[:, k0:k1 + 1].ravel(), t.shape[1], step)


def _coarse_sky(grid: _CoarseGrid, ra: np.ndarray, dec: np.ndarray) -> SkyGrid:
    """The SkyGrid of these targets on the coarse grid, with what the static layer reads.

    The frame's rotation taken to the targets by matrix products: up component -> altitude
    (arcsin; a few milliarcseconds from ephemeris' arctan2 at the zenith); the Sun and Moon
    taken back to CIRS so each separation is one dot product. No azimuth (nan): nothing here
    reads it."""
    f = grid.frame
    # float32 throughout: 1e-7 relative, a few arcseconds at worst (at the zenith), and half the time
    v = _targets_cirs(ra, dec, f.t_mid_unix, f.location).astype(np.float32)  # [n_tg, 3]
    up = np.ascontiguousarray(f.rot[:, 2, :], dtype=np.float32)  # [n_t, 3]
    sun_c = np.einsum("nji,nj->ni", f.rot, f.sun_vec).astype(np.float32)
    moon_c = np.einsum("nji,nj->ni", f.rot, f.moon_vec).astype(np.float32)

    def angle_deg(fn, cos_or_sin):
        x = np.clip(cos_or_sin, -1.0, 1.0, out=cos_or_sin)
        return np.degrees(fn(x, out=x), out=x)

    alt = angle_deg(np.arcsin, v @ up.T)
    x = np.clip(alt, 0.0, 90.0) * np.float32(_KY_PER_DEG)
    i = np.minimum(x.astype(np.int32), _KY_X.size - 2)
    x -= i
    airmass = _KY_X[i] + (_KY_X[i + 1] - _KY_X[i]) * x  # linear between table points (uniform table)
    airmass[alt <= 0.0] = np.inf
    return SkyGrid(
        night=grid.night, ra_deg=ra, dec_deg=dec, alt_deg=alt,
        az_deg=np.broadcast_to(np.float32(np.nan), alt.shape), airmass=airmass,
        sun_alt_deg=f.sun_alt_deg, sun_sep_deg=angle_deg(np.arccos, v @ sun_c.T),
        moon_alt_deg=f.moon_alt_deg, moon_illum=f.moon_illum, moon_phase_angle_deg=f.moon_phase_angle_deg,
        moon_sep_deg=angle_deg(np.arccos, v @ moon_c.T),
    )


def _coarse_steps(config: ObservatoryConfig, specs: Sequence[RequestSpec], step_s: int) -> np.ndarray:
    """Instants after the first that a start needs: max(ceil(duration / step) - 1, 0)."""
    d = np.array([config.instrument_for(r.band, r.instrument).setup_s + r.next_exposure_s for r in specs])
    return np.maximum(np.ceil(d / step_s - 1e-9).astype(np.int64) - 1, 0)


def feasible_nights(config: ObservatoryConfig, requests: Sequence[RequestSpec], nights: Sequence[date],
                    progress=None) -> np.ndarray:
    """[n_r, n_nights] bool: night j has at least one start for request r (see the module doc)."""
    n_r, n_n = len(requests), len(nights)
    out = np.zeros((n_r, n_n), dtype=bool)
    if n_r == 0 or n_n == 0:
        return out
    # Moving targets (planets, ephemeris tables) are not counted here: their position changes
    # night to night and the coarse grid holds fixed directions. Every night in their horizon
    # counts, so they get no urgency from this count (a known limit, docs/solver.md).
    moving = [i for i, r in enumerate(requests) if r.moving]
    out[moving] = True
    fixed = [i for i, r in enumerate(requests) if not r.moving]
    if not fixed:
        return out
    grid = _coarse_grid(config, nights)
    # The modelled sky brightness is read only by a request's min_sky_mag: requests without one
    # go through the same static layer with the sky model off (a missing model never fails),
    # which skips the costliest physics; the other constraints are the same code either way.
    no_sky_model = replace(config, bands={k: replace(b, dark_sky_mag=None) for k, b in config.bands.items()})
    order = sorted(fixed, key=lambda i: requests[i].min_sky_mag is None)
    jobs = []
    for b0 in range(0, len(order), _BLOCK):
        rows = order[b0:b0 + _BLOCK]
        for with_sky in (True, False):
            part = [i for i in rows if (requests[i].min_sky_mag is not None) == with_sky]
            if part:
                jobs.append((part, config if with_sky else no_sky_model))
    # numpy releases the GIL in its loops: two threads use both cores of the reference machine
    with ThreadPoolExecutor(max_workers=2) as pool:
        futures = [(part, pool.submit(_block, grid, [requests[i] for i in part], cfg, n_n)) for part, cfg in jobs]
        done = 0
        for part, fut in futures:
            out[part] = fut.result()
            done += len(part)
            if progress:
                progress(f"opportunities: {done}/{n_r} requests")
    return out


def _block(grid: _CoarseGrid, block: list[RequestSpec], config: ObservatoryConfig, n_n: int) -> np.ndarray:
    keys = [(float(r.ra_deg), float(r.dec_deg)) for r in block]
    uniq = list(dict.fromkeys(keys))
    pos = {kk: i for i, kk in enumerate(uniq)}
    sky = _coarse_sky(grid, np.array([u[0] for u in uniq]), np.array([u[1] for u in uniq]))
    st = static_layer(block, np.array([pos[kk] for kk in keys], dtype=np.int64), sky, config)
    ok = (st.reasons == 0) & grid.dark[None, :]
    ok = ok.reshape(len(block) * n_n, grid.n_k)
    # start_windows checks instants t .. t + d inclusive: d = steps after the first
    d = np.repeat(_coarse_steps(config, block, grid.step_s), n_n)
    start_ok, _fits = start_windows(ok, d)
    return start_ok.any(axis=1).reshape(len(block), n_n)


def count_opportunities(config: ObservatoryConfig, requests: Sequence[RequestSpec], tonight: date,
                        cache: "OpportunityCache | None" = None, progress=None) -> Opportunities:
    """Remaining opportunities of every request from ``tonight`` over ``planning.lookahead_nights``.

    With a cache, only (request, night) pairs it has not seen are computed."""
    n_n = int(config.planning.lookahead_nights)
    nights = tuple(tonight + timedelta(days=i) for i in range(n_n))
    horizon = np.array([horizon_nights(r, tonight, n_n, config.site.timezone) for r in requests], dtype=np.int64)
    if cache is None:
        feas = feasible_nights(config, requests, nights, progress)
    else:
        feas = cache.feasible(config, requests, nights, progress)
    return Opportunities(nights, feas, horizon)


# --------------------------------------------------------------------------- cache

class OpportunityCache:
    """Per (configuration, request, night) verdicts, in process (thread-safe).

    ``feasible`` computes the missing pairs only: the requests with any missing night, over the
    union of their missing nights, in one vectorised pass. ``load``/``dump`` let a caller keep
    the verdicts elsewhere (the database) between processes. Old nights are dropped by
    ``forget_before``.
    """

    def __init__(self) -> None:
        self._v: dict[tuple[str, str], dict[date, bool]] = {}  # (config key, request key) -> night -> verdict
        self._lock = threading.Lock()
        self.pairs_computed = 0  # for tests and logs
        self.new_pairs: list[tuple[str, str, date, bool]] = []  # computed since the last take_new()

    def __len__(self) -> int:
        return sum(len(v) for v in self._v.values())

    def load(self, rows) -> None:
        """rows: (config_key, request_key, night, feasible)."""
        with self._lock:
            for ck, rk, n, f in rows:
                self._v.setdefault((ck, rk), {})[n] = bool(f)

    def take_new(self) -> list[tuple[str, str, date, bool]]:
        with self._lock:
            out, self.new_pairs = self.new_pairs, []
            return out

    def forget_before(self, night: date) -> None:
        with self._lock:
            for k, d in list(self._v.items()):
                kept = {n: f for n, f in d.items() if n >= night}
                if kept:
                    self._v[k] = kept
                else:
                    del self._v[k]

    def feasible(self, config: ObservatoryConfig, requests: Sequence[RequestSpec], nights: Sequence[date],
                 progress=None) -> np.ndarray:
        ck = config_key(config)
        rkeys = [request_key(r) for r in requests]
        nights = list(nights)
        want = set(nights)
        todo: dict[str, int] = {}  # request key -> first row with it (identical requests computed once)
        missing_nights: set[date] = set()
        with self._lock:
            for i, rk in enumerate(rkeys):
                if rk in todo:
                    continue
                miss = want - self._v.get((ck, rk), {}).keys()
                if miss:
                    todo[rk] = i
                    missing_nights |= miss
        if todo:
            mn = sorted(missing_nights)
            rows = list(todo.values())
            f = feasible_nights(config, [requests[i] for i in rows], mn, progress)
            with self._lock:
                for row, i in enumerate(rows):
                    d = self._v.setdefault((ck, rkeys[i]), {})
                    for j, n in enumerate(mn):
                        if n not in d:
                            v = bool(f[row, j])
                            d[n] = v
                            self.new_pairs.append((ck, rkeys[i], n, v))
                            self.pairs_computed += 1
        out = np.zeros((len(requests), len(nights)), dtype=bool)
        with self._lock:
            for i, rk in enumerate(rkeys):
                d = self._v[(ck, rk)]
                out[i] = [d[n] for n in nights]
        return out


SHARED_CACHE = OpportunityCache()  # the process's cache: builds that are not handed one use it
