"""Alt/az/airmass of every target at every grid time, Sun and Moon.

CONTRACT: the SkyGrid dataclass is read by feasibility, the solver's transitions, the plan
checker and the reports. Arrays are plain numpy (degrees, floats); rows follow ``ra_deg``.
The [n_tg, n_t] arrays are float32 (2000 x 600 x 5 arrays = 24 MB instead of 48 MB; float32
resolves 0.03 arcsec in altitude); the [n_t] arrays are float64.

How (one vectorised pass, no Python loop over time):
1. Targets ICRS -> topocentric CIRS once, at the middle of the night, with astropy (annual and
   diurnal aberration, light deflection; over half a night they change by < 0.4 arcsec and
   precession-nutation by < 0.1 arcsec).
2. Per grid time, topocentric CIRS -> AltAz is a pure rotation (Earth rotation angle, polar
   motion, site). astropy transforms the three CIRS basis vectors for all grid times in one
   call; their images are the columns of a 3x3 matrix per time.
3. All targets x all times: one matrix product. Accuracy against a direct astropy
   ICRS -> AltAz transform is checked in tests/test_sky_ephemeris.py (about an arcsecond).
Altitudes are true (unrefracted); airmass is Kasten & Young 1989 on the true altitude.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from dataclasses import dataclass, replace

import numpy as np

from scheduler.model.config import Site
from scheduler.model.errors import InputError
from scheduler.sky.airmass import kasten_young_1989
from scheduler.sky.night import Night, earth_location
from scheduler.sky.offline import configure_offline

_CHUNK = 256  # targets per block: bounds the [chunk, n_t, 3] temporaries (~3.7 MB at 600 times)


@dataclass(frozen=True)
class SkyGrid:
    night: Night
    ra_deg: np.ndarray  # [n_tg]
    dec_deg: np.ndarray  # [n_tg]
    alt_deg: np.ndarray  # [n_tg, n_t] true (unrefracted) altitude
    az_deg: np.ndarray  # [n_tg, n_t] 0..360, north through east
    airmass: np.ndarray  # [n_tg, n_t] Kasten & Young 1989; inf where alt <= 0
    sun_alt_deg: np.ndarray  # [n_t]
    sun_sep_deg: np.ndarray  # [n_tg, n_t] angular distance target-Sun
    moon_alt_deg: np.ndarray  # [n_t]
    moon_illum: np.ndarray  # [n_t] illuminated fraction 0..1
    moon_phase_angle_deg: np.ndarray  # [n_t] 0 = full, 180 = new
    moon_sep_deg: np.ndarray  # [n_tg, n_t]

    @property
    def n_targets(self) -> int:
        return int(self.ra_deg.shape[0])


# --------------------------------------------------------------------------- per night

@dataclass(frozen=True)
class _NightFrame:
    """Everything that depends on the night only (shared by every target)."""

    t_mid_unix: float
    location: object  # astropy EarthLocation of the site
    rot: np.ndarray  # [n_t, 3, 3] topocentric CIRS unit vector -> AltAz unit vector (x north, y east, z up)
    sun_alt_deg: np.ndarray
    sun_vec: np.ndarray  # [n_t, 3] AltAz unit vectors
    moon_alt_deg: np.ndarray
    moon_vec: np.ndarray
    moon_illum: np.ndarray
    moon_phase_angle_deg: np.ndarray


def _unit(v: np.ndarray) -> np.ndarray:
    return v / np.linalg.norm(v, axis=-1, keepdims=True)


def _night_frame(site: Site, night: Night) -> _NightFrame:
    configure_offline()
    from astropy import units as u
    from astropy.coordinates import CIRS, AltAz, CartesianRepresentation, UnitSphericalRepresentation, get_body, get_sun
    from astropy.coordinates.erfa_astrom import ErfaAstromInterpolator, erfa_astrom
    from astropy.time import Time

    if night.n_times == 0:
        raise InputError("night", f"the night of {night.date.isoformat()} has no grid times")
    times = night.times_unix
    t_mid = float(0.5 * (times[0] + times[-1]))
    loc = earth_location(site)
    t = Time(times, format="unix", scale="utc")
    altaz = AltAz(obstime=t, location=loc)  # pressure 0: true altitudes

    # The interpolator evaluates the costly per-time astrometry (Earth position, precession-
    # nutation) every 5 minutes and interpolates between: halves the time, changes < 0.02 arcsec.
    with erfa_astrom.set(ErfaAstromInterpolator(300 * u.s)):
        # Images of the CIRS basis vectors: shape (3, n_t) coordinates, one transform.
        eye = np.eye(3)
        basis = CartesianRepresentation(np.repeat(eye[:, :, None], times.size, axis=2) * u.one, copy=False)
        # Topocentric CIRS at each grid time -> AltAz is astropy's direct path (erfa atioq): a pure
        # rotation, no aberration or light deflection (those were applied to the targets already).
        cirs = CIRS(basis.represent_as(UnitSphericalRepresentation), obstime=t[None, :], location=loc)
        img = cirs.transform_to(AltAz(obstime=t[None, :], location=loc))
        cols = img.represent_as("unitspherical").to_cartesian().xyz.value  # (3 xyz, 3 basis, n_t)
        rot = np.transpose(cols, (2, 0, 1))  # [n_t, xyz, basis]

        sun_gcrs = get_sun(t)
        moon_gcrs = get_body("moon", t)  # geocentric, with distance: AltAz adds the ~1 deg parallax
        sun = sun_gcrs.transform_to(altaz)
        moon = moon_gcrs.transform_to(altaz)
    # Phase angle, geocentric (almanac convention): at the Moon, between Sun and Earth's centre.
    sun_xyz = sun_gcrs.cartesian.xyz.to_value(u.km).T
    moon_xyz = moon_gcrs.cartesian.xyz.to_value(u.km).T
    to_sun = _unit(sun_xyz - moon_xyz)
    to_earth = _unit(-moon_xyz)
    phase = np.degrees(np.arccos(np.clip(np.sum(to_sun * to_earth, axis=1), -1.0, 1.0)))
    return _NightFrame(
        t_mid_unix=t_mid,
        location=loc,
        rot=rot,
        sun_alt_deg=sun.alt.deg,
        sun_vec=sun.represent_as(UnitSphericalRepresentation).to_cartesian().xyz.value.T,
        moon_alt_deg=moon.alt.deg,
        moon_vec=moon.represent_as(UnitSphericalRepresentation).to_cartesian().xyz.value.T,
        moon_illum=0.5 * (1.0 + np.cos(np.radians(phase))),
        moon_phase_angle_deg=phase,
    )


def _targets_cirs(ra_deg: np.ndarray, dec_deg: np.ndarray, t_mid_unix: float, loc) -> np.ndarray:
    """ICRS directions -> topocentric CIRS unit vectors at the middle of the night, [n_tg, 3]."""
    from astropy import units as u
    from astropy.coordinates import CIRS, SkyCoord
    from astropy.time import Time

    c = SkyCoord(ra=ra_deg * u.deg, dec=dec_deg * u.deg, frame="icrs")
    ci = c.transform_to(CIRS(obstime=Time(t_mid_unix, format="unix", scale="utc"), location=loc))
    return ci.represent_as("unitspherical").to_cartesian().xyz.value.T


@dataclass(frozen=True)
class _TargetRows:
    alt: np.ndarray
    az: np.ndarray
    airmass: np.ndarray
    sun_sep: np.ndarray
    moon_sep: np.ndarray


def _sep_deg(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Angle between unit vectors a [k, n_t, 3] and b [n_t, 3], degrees."""
    return np.degrees(np.arccos(np.clip(np.einsum("knj,nj->kn", a, b), -1.0, 1.0)))


def _target_rows(frame: _NightFrame, v_cirs: np.ndarray) -> _TargetRows:
    n_tg, n_t = v_cirs.shape[0], frame.rot.shape[0]
    out = {k: np.empty((n_tg, n_t), dtype=np.float32) for k in ("alt", "az", "airmass", "sun_sep", "moon_sep")}
    for i in range(0, n_tg, _CHUNK):  # chunks over targets bound memory; every time at once
        v = np.einsum("nij,kj->kni", frame.rot, v_cirs[i:i + _CHUNK])  # [k, n_t, 3]
        x, y, z = v[..., 0], v[..., 1], v[..., 2]
        alt = np.degrees(np.arctan2(z, np.hypot(x, y)))
        s = slice(i, i + _CHUNK)
        out["alt"][s] = alt
        out["az"][s] = np.degrees(np.arctan2(y, x)) % 360.0
        out["airmass"][s] = kasten_young_1989(alt)
        v /= np.linalg.norm(v, axis=-1, keepdims=True)
        out["sun_sep"][s] = _sep_deg(v, frame.sun_vec)
        out["moon_sep"][s] = _sep_deg(v, frame.moon_vec)
    return _TargetRows(**out)


def _check_coords(ra_deg, dec_deg) -> tuple[np.ndarray, np.ndarray]:
    ra = np.atleast_1d(np.asarray(ra_deg, dtype=np.float64))
    dec = np.atleast_1d(np.asarray(dec_deg, dtype=np.float64))
    if ra.shape != dec.shape or ra.ndim != 1:
        raise InputError("ra_deg", "ra_deg and dec_deg must be 1-D arrays of the same length")
    if not np.all(np.isfinite(ra)) or np.any((ra < 0) | (ra >= 360)):
        raise InputError("ra_deg", "must be finite, from 0 (inclusive) to 360 (exclusive) degrees")
    if not np.all(np.isfinite(dec)) or np.any(np.abs(dec) > 90):
        raise InputError("dec_deg", "must be finite, from -90 to 90 degrees")
    return ra, dec


def _grid(night: Night, frame: _NightFrame, ra, dec, rows: _TargetRows) -> SkyGrid:
    return SkyGrid(
        night=night, ra_deg=ra, dec_deg=dec,
        alt_deg=rows.alt, az_deg=rows.az, airmass=rows.airmass,
        sun_alt_deg=frame.sun_alt_deg, sun_sep_deg=rows.sun_sep,
        moon_alt_deg=frame.moon_alt_deg, moon_illum=frame.moon_illum,
        moon_phase_angle_deg=frame.moon_phase_angle_deg, moon_sep_deg=rows.moon_sep,
    )


_ERA_RATE = 2.0 * np.pi * 1.00273781191135448 / 86400.0  # Earth rotation angle, rad per (UT1) second


def _rz(theta: np.ndarray) -> np.ndarray:
    """ERFA's R3: rotation of the frame about z by theta, [n, 3, 3]."""
    c, s = np.cos(theta), np.sin(theta)
    out = np.zeros(theta.shape + (3, 3))
    out[..., 0, 0], out[..., 0, 1], out[..., 1, 0], out[..., 1, 1], out[..., 2, 2] = c, s, -s, c, 1.0
    return out


def night_frame(site: Site, night: Night, support_s: float | None = None) -> _NightFrame:
    """The per-time part of a sky grid (Earth rotation, Sun, Moon), shared by every target.

    ``night.times_unix`` need not be one evening: the opportunities count passes the coarse
    instants of many nights at once (targets are then taken to CIRS at the middle of the span).

    support_s: compute astropy's frame only every ``support_s`` seconds and derive each time
    from its nearest support time: the CIRS -> AltAz rotation turns about the celestial
    intermediate pole by the Earth rotation angle elapsed (exact but for polar motion and
    UT1 - UTC drifting by milliseconds over weeks); the Sun's and Moon's topocentric CIRS
    directions are interpolated linearly between the two support times around it (over two
    hours the Moon's path and its diurnal parallax bend by < 0.05 deg). For coarse counts over
    many nights, where astropy's per-time Moon is the cost.
    """
    if support_s is None:
        return _night_frame(site, night)
    t = np.asarray(night.times_unix, dtype=np.float64)
    sup = np.unique(np.concatenate([np.floor(t / support_s), np.floor(t / support_s) + 1.0])) * support_s
    sup_night = Night(date=night.date, sunset=night.sunset, sunrise=night.sunrise, civil_dusk=None, civil_dawn=None,
                      nautical_dusk=None, nautical_dawn=None, astronomical_dusk=None, astronomical_dawn=None,
                      step_s=night.step_s, times_unix=sup)
    f = _night_frame(site, sup_night)
    rot_t = np.transpose(f.rot, (0, 2, 1))  # AltAz -> CIRS
    sun_c = np.einsum("nij,nj->ni", rot_t, f.sun_vec)
    moon_c = np.einsum("nij,nj->ni", rot_t, f.moon_vec)
    i1 = np.clip(np.searchsorted(sup, t, side="right"), 1, sup.size - 1)
    i0 = i1 - 1
    w = ((t - sup[i0]) / (sup[i1] - sup[i0]))[:, None]
    near = np.where(w[:, 0] < 0.5, i0, i1)
    rot = f.rot[near] @ _rz(_ERA_RATE * (t - sup[near]))

    def lerp(a):
        return a[i0] * (1.0 - w) + a[i1] * w

    sun_vec = np.einsum("nij,nj->ni", rot, _unit(lerp(sun_c)))
    moon_vec = np.einsum("nij,nj->ni", rot, _unit(lerp(moon_c)))
    phase = lerp(f.moon_phase_angle_deg[:, None])[:, 0]
    return replace(
        f, t_mid_unix=float(0.5 * (t[0] + t[-1])), rot=rot,
        sun_alt_deg=np.degrees(np.arcsin(np.clip(sun_vec[:, 2], -1.0, 1.0))), sun_vec=sun_vec,
        moon_alt_deg=np.degrees(np.arcsin(np.clip(moon_vec[:, 2], -1.0, 1.0))), moon_vec=moon_vec,
        moon_illum=0.5 * (1.0 + np.cos(np.radians(phase))), moon_phase_angle_deg=phase,
    )


def compute_sky(site: Site, night: Night, ra_deg, dec_deg) -> SkyGrid:
    """Alt/az/airmass and Sun/Moon geometry of all targets (ICRS degrees) on the night's grid."""
    ra, dec = _check_coords(ra_deg, dec_deg)
    frame = _night_frame(site, night)
    rows = _target_rows(frame, _targets_cirs(ra, dec, frame.t_mid_unix, frame.location) if ra.size else np.empty((0, 3)))
    return _grid(night, frame, ra, dec, rows)


# --------------------------------------------------------------------------- cache

class _NightEntry:
    def __init__(self, frame: _NightFrame, n_t: int):
        self.frame = frame
        self.index: dict[tuple[float, float], int] = {}  # (ra, dec) -> row in the stores
        self.n = 0
        self.store = {k: np.empty((0, n_t), dtype=np.float32) for k in ("alt", "az", "airmass", "sun_sep", "moon_sep")}

    def add(self, ra: np.ndarray, dec: np.ndarray, rows: _TargetRows) -> None:
        for k in self.store:  # amortised growth: re-plans add a handful of targets at a time
            self.store[k] = np.concatenate([self.store[k], getattr(rows, k)])
        for r, d in zip(ra.tolist(), dec.tolist()):
            self.index[(r, d)] = self.n
            self.n += 1


class SkyCache:
    """Sky grids per (site, night), per target: a re-plan never recomputes the sky.

    get() computes the night's Sun/Moon/rotation once and each target's rows once; asking again
    with a few more targets computes only those. Keeps the ``max_nights`` most recent nights.
    Thread-safe (the service may plan from a worker thread).
    """

    def __init__(self, max_nights: int = 3):
        self.max_nights = max_nights
        self._nights: OrderedDict[tuple, _NightEntry] = OrderedDict()
        self._lock = threading.Lock()
        self.targets_computed = 0  # rows computed since creation (for tests and logs)
        self.nights_computed = 0

    @staticmethod
    def _key(site: Site, night: Night) -> tuple:
        t = night.times_unix
        return (site, night.date, night.step_s, float(t[0]) if t.size else None, int(t.size))

    def get(self, site: Site, night: Night, ra_deg, dec_deg) -> SkyGrid:
        ra, dec = _check_coords(ra_deg, dec_deg)
        key = self._key(site, night)
        with self._lock:
            entry = self._nights.get(key)
            if entry is None:
                entry = _NightEntry(_night_frame(site, night), night.n_times)
                self.nights_computed += 1
                self._nights[key] = entry
                while len(self._nights) > self.max_nights:
                    self._nights.popitem(last=False)
            self._nights.move_to_end(key)
            keys = list(zip(ra.tolist(), dec.tolist()))
            new = [i for i, k in enumerate(dict.fromkeys(keys)) if k not in entry.index]
            if new:
                uniq = list(dict.fromkeys(keys))
                nra = np.array([uniq[i][0] for i in new])
                ndec = np.array([uniq[i][1] for i in new])
                entry.add(nra, ndec, _target_rows(entry.frame, _targets_cirs(nra, ndec, entry.frame.t_mid_unix, entry.frame.location)))
                self.targets_computed += len(new)
            idx = np.fromiter((entry.index[k] for k in keys), dtype=np.intp, count=len(keys))
            rows = _TargetRows(**{k: v[idx] for k, v in entry.store.items()})
            return _grid(night, entry.frame, ra, dec, rows)

    def clear(self) -> None:
        with self._lock:
            self._nights.clear()
