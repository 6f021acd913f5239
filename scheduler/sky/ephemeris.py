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

Moving targets (planets, PI ephemeris tables; scheduler/sky/bodies.py): a target row may
carry a *track*. Its geocentric astrometric direction is computed at every grid time (one
vectorised call per target), all of them go through one ICRS -> topocentric CIRS transform,
then the same per-time rotation. Parallax, where the distance is known: in the horizon frame
the site's geocentric position is a constant vector (the frame turns with the Earth), so the
topocentric vector is rot(t) @ (delta * u(t)) - site. Times a table does not cover have nan
alt/az/separations and infinite airmass; ``covered`` says which. ``ra_deg``/``dec_deg`` of a
moving row are its position at the grid's middle; ``position_deg`` gives it at any step.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from dataclasses import dataclass, field, replace
from typing import Sequence

import numpy as np

from scheduler.model.config import Site
from scheduler.model.errors import InputError
from scheduler.sky.airmass import kasten_young_1989
from scheduler.sky.bodies import AU_KM, Track, radec_deg, track_key, track_positions
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
    # Moving targets: their rows, and their astrometric ICRS position at every grid time.
    moving_rows: np.ndarray = field(default_factory=lambda: np.empty(0, dtype=np.int64))  # [n_mv]
    track_ra_deg: np.ndarray | None = None  # [n_mv, n_t] float64, nan where not covered
    track_dec_deg: np.ndarray | None = None  # [n_mv, n_t]
    track_covered: np.ndarray | None = None  # [n_mv, n_t] bool: the track gives a position
    track_keys: tuple = ()  # [n_mv] bodies.track_key of each moving row

    @property
    def n_targets(self) -> int:
        return int(self.ra_deg.shape[0])

    def _moving_index(self, row: int) -> int | None:
        hit = np.flatnonzero(self.moving_rows == row)
        return int(hit[0]) if hit.size else None

    def is_moving(self, row: int) -> bool:
        return self._moving_index(row) is not None

    def position_deg(self, row: int, step: int) -> tuple[float, float]:
        """(RA, Dec) ICRS of the target in ``row`` at grid step ``step`` (fixed targets: always the same)."""
        k = self._moving_index(row)
        if k is None:
            return float(self.ra_deg[row]), float(self.dec_deg[row])
        j = min(max(int(step), 0), self.night.n_times - 1)
        return float(self.track_ra_deg[k, j]), float(self.track_dec_deg[k, j])

    def covered(self, rows) -> np.ndarray:
        """[len(rows), n_t] bool: a position is known (always for fixed targets)."""
        rows = np.asarray(rows, dtype=np.int64)
        out = np.ones((rows.shape[0], self.night.n_times), dtype=bool)
        if self.moving_rows.size:
            for i, r in enumerate(rows.tolist()):  # loop over requests, not time
                k = self._moving_index(r)
                if k is not None:
                    out[i] = self.track_covered[k]
        return out


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
    site_au: np.ndarray  # [3] the site's geocentric position in the horizon frame (north, east, up), AU


def _site_horizon_au(loc) -> np.ndarray:
    """Geocentric position of the site in its own (north, east, up) axes, AU: constant all night."""
    from astropy import units as u

    p = np.array([loc.x.to_value(u.km), loc.y.to_value(u.km), loc.z.to_value(u.km)]) / AU_KM
    lon, lat = loc.lon.radian, loc.lat.radian  # geodetic: the AltAz frame's vertical
    north = np.array([-np.sin(lat) * np.cos(lon), -np.sin(lat) * np.sin(lon), np.cos(lat)])
    east = np.array([-np.sin(lon), np.cos(lon), 0.0])
    up = np.array([np.cos(lat) * np.cos(lon), np.cos(lat) * np.sin(lon), np.sin(lat)])
    return np.array([p @ north, p @ east, p @ up])


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
        site_au=_site_horizon_au(loc),
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


def _rows_from_horizon(v: np.ndarray, frame: _NightFrame, out: dict, s: slice) -> None:
    """Fill out[*][s] from horizon-frame vectors v [k, n_t, 3] (any length; nan allowed)."""
    x, y, z = v[..., 0], v[..., 1], v[..., 2]
    alt = np.degrees(np.arctan2(z, np.hypot(x, y)))
    out["alt"][s] = alt
    out["az"][s] = np.degrees(np.arctan2(y, x)) % 360.0
    with np.errstate(invalid="ignore"):
        out["airmass"][s] = kasten_young_1989(alt)
    v = v / np.linalg.norm(v, axis=-1, keepdims=True)
    out["sun_sep"][s] = _sep_deg(v, frame.sun_vec)
    out["moon_sep"][s] = _sep_deg(v, frame.moon_vec)


def _empty_rows(n_tg: int, n_t: int) -> dict:
    return {k: np.empty((n_tg, n_t), dtype=np.float32) for k in ("alt", "az", "airmass", "sun_sep", "moon_sep")}


def _target_rows(frame: _NightFrame, v_cirs: np.ndarray) -> _TargetRows:
    n_tg, n_t = v_cirs.shape[0], frame.rot.shape[0]
    out = _empty_rows(n_tg, n_t)
    for i in range(0, n_tg, _CHUNK):  # chunks over targets bound memory; every time at once
        v = np.einsum("nij,kj->kni", frame.rot, v_cirs[i:i + _CHUNK])  # [k, n_t, 3]
        _rows_from_horizon(v, frame, out, slice(i, i + _CHUNK))
    return _TargetRows(**out)


@dataclass(frozen=True)
class _TrackRows:
    rows: _TargetRows
    ra_deg: np.ndarray  # [k, n_t] astrometric ICRS position at each grid time
    dec_deg: np.ndarray
    covered: np.ndarray  # [k, n_t] bool


def _track_rows(frame: _NightFrame, tracks: Sequence[Track], times_unix: np.ndarray) -> _TrackRows:
    """Rows of moving targets: position per grid time, one ICRS -> CIRS transform for all of them."""
    from astropy import units as u
    from astropy.coordinates import CIRS, CartesianRepresentation, SkyCoord
    from astropy.time import Time

    n_t = times_unix.shape[0]
    k = len(tracks)
    vec = np.empty((k, n_t, 3))
    dist = np.empty((k, n_t))
    covered = np.empty((k, n_t), dtype=bool)
    for i, tr in enumerate(tracks):  # one vectorised call per target over all times
        vec[i], dist[i], covered[i] = track_positions(tr, times_unix)
    ra, dec = radec_deg(vec)
    safe = np.where(covered[..., None], vec, np.array([1.0, 0.0, 0.0]))  # dummy where unknown; masked below
    c = SkyCoord(CartesianRepresentation(safe.reshape(-1, 3).T * u.one), frame="icrs")
    ci = c.transform_to(CIRS(obstime=Time(frame.t_mid_unix, format="unix", scale="utc"), location=frame.location))
    v_cirs = ci.represent_as("unitspherical").to_cartesian().xyz.value.T.reshape(k, n_t, 3)
    v = np.einsum("nij,knj->kni", frame.rot, v_cirs)  # [k, n_t, 3] horizon-frame directions
    near = np.isfinite(dist) & covered
    # parallax: topocentric = geocentric - site, in the horizon frame (distance in AU)
    v = np.where(near[..., None], v * np.where(near, dist, 1.0)[..., None] - frame.site_au, v)
    v[~covered] = np.nan
    out = _empty_rows(k, n_t)
    with np.errstate(invalid="ignore"):
        _rows_from_horizon(v, frame, out, slice(0, k))
    out["airmass"][~covered] = np.inf
    return _TrackRows(_TargetRows(**out), ra, dec, covered)


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


def _grid(night: Night, frame: _NightFrame, ra, dec, rows: _TargetRows, moving_rows=None,
          track_ra=None, track_dec=None, track_cov=None, track_keys=None) -> SkyGrid:
    extra = {}
    if moving_rows is not None and len(moving_rows):
        extra = dict(moving_rows=np.asarray(moving_rows, dtype=np.int64), track_ra_deg=track_ra,
                     track_dec_deg=track_dec, track_covered=track_cov, track_keys=tuple(track_keys or ()))
    return SkyGrid(
        night=night, ra_deg=ra, dec_deg=dec,
        alt_deg=rows.alt, az_deg=rows.az, airmass=rows.airmass,
        sun_alt_deg=frame.sun_alt_deg, sun_sep_deg=rows.sun_sep,
        moon_alt_deg=frame.moon_alt_deg, moon_illum=frame.moon_illum,
        moon_phase_angle_deg=frame.moon_phase_angle_deg, moon_sep_deg=rows.moon_sep, **extra,
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


def _check_tracks(tracks, n: int) -> list:
    if tracks is None:
        return [None] * n
    tracks = list(tracks)
    if len(tracks) != n:
        raise InputError("tracks", f"{len(tracks)} tracks for {n} targets; give one per target (None for fixed)")
    for tr in tracks:
        if tr is not None:
            track_key(tr)  # validates body names
    return tracks


def _mid_position(tr: _TrackRows, n_t: int, ra: np.ndarray, dec: np.ndarray, where: list[int]) -> None:
    """Nominal ra/dec of moving rows: their position at the grid's middle (or nearest covered step)."""
    for i, row in enumerate(where):
        cov = np.flatnonzero(tr.covered[i])
        if cov.size:
            j = int(cov[np.argmin(np.abs(cov - n_t // 2))])
            ra[row], dec[row] = tr.ra_deg[i, j], tr.dec_deg[i, j]


def compute_sky(site: Site, night: Night, ra_deg, dec_deg, tracks: Sequence[Track | None] | None = None) -> SkyGrid:
    """Alt/az/airmass and Sun/Moon geometry of all targets (ICRS degrees) on the night's grid.

    tracks: optional, one per target: None for a fixed ICRS target, else a body name or an
    EphemerisTable (its ra/dec given here are ignored and replaced by the mid-grid position).
    """
    ra, dec = _check_coords(ra_deg, dec_deg)
    tracks = _check_tracks(tracks, ra.size)
    frame = _night_frame(site, night)
    mv = [i for i, t in enumerate(tracks) if t is not None]
    rows = _target_rows(frame, _targets_cirs(ra, dec, frame.t_mid_unix, frame.location) if ra.size else np.empty((0, 3)))
    if not mv:
        return _grid(night, frame, ra, dec, rows)
    tr = _track_rows(frame, [tracks[i] for i in mv], night.times_unix)
    for k in rows.__dataclass_fields__:
        getattr(rows, k)[mv] = getattr(tr.rows, k)
    ra, dec = ra.copy(), dec.copy()
    _mid_position(tr, night.n_times, ra, dec, mv)
    return _grid(night, frame, ra, dec, rows, mv, tr.ra_deg, tr.dec_deg, tr.covered,
                 [track_key(tracks[i]) for i in mv])


# --------------------------------------------------------------------------- targets of requests

def target_key(t) -> tuple:
    """Identity of a request's target: its track's key if it moves, else (ra, dec).

    ``t`` is anything with ``ra_deg``, ``dec_deg`` and optionally ``track`` (a RequestSpec).
    """
    track = getattr(t, "track", None)
    return track_key(track) if track is not None else (float(t.ra_deg), float(t.dec_deg))


def distinct_targets(targets: Sequence) -> tuple[np.ndarray, np.ndarray, list, np.ndarray]:
    """(ra, dec, tracks) of each distinct target, and each item's row among them."""
    keys = [target_key(t) for t in targets]
    first: dict[tuple, int] = {}
    for i, k in enumerate(keys):
        first.setdefault(k, i)
    pos = {k: j for j, k in enumerate(first)}
    reps = [targets[i] for i in first.values()]
    ra = np.array([float(t.ra_deg) for t in reps], dtype=np.float64)
    dec = np.array([float(t.dec_deg) for t in reps], dtype=np.float64)
    tracks = [getattr(t, "track", None) for t in reps]
    return ra, dec, tracks, np.array([pos[k] for k in keys], dtype=np.int64)


def sky_for(site: Site, night: Night, targets: Sequence, sky=None) -> tuple[SkyGrid, np.ndarray]:
    """The one way to get the sky of a list of requests: (a SkyGrid holding every target, each
    request's row in it). ``sky``: None (computed here), a SkyGrid that already holds the targets,
    or a SkyCache. Moving targets get their position at every grid time."""
    ra, dec, tracks, rows = distinct_targets(targets)
    if sky is None:
        return compute_sky(site, night, ra, dec, tracks), rows
    if isinstance(sky, SkyGrid):
        index: dict[tuple, int] = {}
        for i, (a, d) in enumerate(zip(sky.ra_deg.tolist(), sky.dec_deg.tolist())):
            index.setdefault((float(a), float(d)), i)
        for r, k in zip(sky.moving_rows.tolist(), sky.track_keys):
            index[k] = int(r)
        keys = [(float(a), float(d)) if tr is None else track_key(tr) for a, d, tr in zip(ra, dec, tracks)]
        try:
            where = np.array([index[k] for k in keys], dtype=np.int64)
        except KeyError as e:
            raise ValueError(f"sky grid has no row for target {e.args[0]}") from None
        return sky, where[rows]
    return sky.get(site, night, ra, dec, tracks), rows  # a SkyCache


# --------------------------------------------------------------------------- cache

class _NightEntry:
    def __init__(self, frame: _NightFrame, n_t: int):
        self.frame = frame
        self.index: dict[tuple, int] = {}  # (ra, dec) or a track key -> row in the stores
        self.n = 0
        self.store = _empty_rows(0, n_t)
        self.tracks: dict[int, tuple[np.ndarray, np.ndarray, np.ndarray]] = {}  # row -> (ra, dec, covered)

    def add(self, keys: list[tuple], rows: _TargetRows) -> list[int]:
        for k in self.store:  # amortised growth: re-plans add a handful of targets at a time
            self.store[k] = np.concatenate([self.store[k], getattr(rows, k)])
        where = []
        for key in keys:
            self.index[key] = self.n
            where.append(self.n)
            self.n += 1
        return where


class SkyCache:
    """Sky grids per (site, night), per target: a re-plan never recomputes the sky.

    get() computes the night's Sun/Moon/rotation once and each target's rows once; asking again
    with a few more targets computes only those. Keeps the ``max_nights`` most recent nights.
    Moving targets (``tracks``) are keyed by body name or table content, fixed ones by (ra, dec).
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

    def get(self, site: Site, night: Night, ra_deg, dec_deg, tracks: Sequence[Track | None] | None = None) -> SkyGrid:
        ra, dec = _check_coords(ra_deg, dec_deg)
        tracks = _check_tracks(tracks, ra.size)
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
            keys = [(r, d) if tr is None else track_key(tr) for r, d, tr in zip(ra.tolist(), dec.tolist(), tracks)]
            first = {}
            for i, k in enumerate(keys):
                if k not in entry.index and k not in first:
                    first[k] = i
            fixed = [i for k, i in first.items() if tracks[i] is None]
            moving = [i for k, i in first.items() if tracks[i] is not None]
            if fixed:
                rows = _target_rows(entry.frame, _targets_cirs(ra[fixed], dec[fixed], entry.frame.t_mid_unix,
                                                              entry.frame.location))
                entry.add([keys[i] for i in fixed], rows)
            if moving:
                tr = _track_rows(entry.frame, [tracks[i] for i in moving], night.times_unix)
                where = entry.add([keys[i] for i in moving], tr.rows)
                for j, w in enumerate(where):
                    entry.tracks[w] = (tr.ra_deg[j], tr.dec_deg[j], tr.covered[j])
            self.targets_computed += len(first)
            idx = np.fromiter((entry.index[k] for k in keys), dtype=np.intp, count=len(keys))
            rows = _TargetRows(**{k: v[idx] for k, v in entry.store.items()})
            mv = [i for i, j in enumerate(idx.tolist()) if j in entry.tracks]
            if not mv:
                return _grid(night, entry.frame, ra, dec, rows)
            tra = np.stack([entry.tracks[int(idx[i])][0] for i in mv])
            trd = np.stack([entry.tracks[int(idx[i])][1] for i in mv])
            trc = np.stack([entry.tracks[int(idx[i])][2] for i in mv])
            ra, dec = ra.copy(), dec.copy()
            _mid_position(_TrackRows(rows, tra, trd, trc), night.n_times, ra, dec, mv)
            return _grid(night, entry.frame, ra, dec, rows, mv, tra, trd, trc, [keys[i] for i in mv])

    def clear(self) -> None:
        with self._lock:
            self._nights.clear()
