"""Moving targets: solar-system bodies by name, and ephemeris tables a PI supplies.

A *track* is what a moving target's position comes from: a body name (``"jupiter"``) or an
``EphemerisTable``. ``track_positions`` gives, for an array of times, the geocentric
astrometric ICRS direction (unit vectors), the geocentric distance in AU where known, and
whether the track covers each time. Everything is vectorised over time (no Python loop).

Bodies (the planets and Pluto; the Moon and the Sun are not targets here):
- Mercury to Neptune: astropy's built-in ephemeris (ERFA's planetary series, Simon et al.
  1994, and the Earth from ERFA's epv00), offline, passed as ``ephemeris="builtin"`` per call
  (the same as ``solar_system_ephemeris.set("builtin")`` without touching global state, so it
  is thread-safe). Never a download.
- Pluto is not in the built-in series: it comes from JPL's approximate Keplerian elements
  (Standish, "Keplerian Elements for Approximate Positions of the Major Planets", table for
  1800-2050; element values from memory, checked against PyEphem in tests), heliocentric on
  the J2000 ecliptic, plus the Sun's and the Earth's barycentric positions from the built-in
  ephemeris. Good to about an arcminute: enough to plan, not to point; a PI who needs better
  supplies an ephemeris table.
Astrometric position: the body where it was when the light left it (light time iterated
twice), seen from the Earth's centre, ICRS axes; aberration and the observer's parallax are
applied by the sky grid (scheduler/sky/ephemeris.py).

Ephemeris tables (CSV ``time,ra,dec`` and optionally ``delta_au``): geocentric astrometric
ICRS positions, as ephemeris services give them. Times ISO-8601 (UTC), strictly increasing;
RA in degrees or hh:mm:ss, Dec in degrees or +-dd:mm:ss. Interpolation is a cubic Hermite
curve through the rows' unit vectors (derivatives from three-point differences), then
normalised: crossing RA 0/360 and passing near a pole need no special case. The distance,
where given, is interpolated the same way; it gives the parallax.
"""

from __future__ import annotations

import csv
import hashlib
import io
import math
from dataclasses import dataclass
from functools import cached_property
from typing import Union

import numpy as np

from scheduler.model.errors import InputError
from scheduler.model.timegrid import iso, parse_time, utc

BODIES = ("mercury", "venus", "mars", "jupiter", "saturn", "uranus", "neptune", "pluto")
_NOT_TARGETS = {
    "moon": "the Moon moves about 0.5 deg an hour with a parallax of about 1 deg; it is not offered as a target",
    "sun": "the Sun is never a target (sun avoidance)",
    "earth": "the Earth is where we observe from",
}
AU_KM = 149_597_870.7
LIGHT_DAY_AU = 173.144632674  # c in AU per day (IAU 2012 au, c = 299792.458 km/s)

MAX_TABLE_ROWS = 50_000
TABLE_COLUMNS = ("time", "ra", "dec", "delta_au")


# --------------------------------------------------------------------------- bodies

def check_body(name: str) -> str:
    """The body's canonical (lower-case) name; InputError naming ``body`` otherwise."""
    s = str(name).strip().lower()
    if s in _NOT_TARGETS:
        raise InputError("body", f"{name!r}: {_NOT_TARGETS[s]}; allowed: {' '.join(BODIES)}")
    if s not in BODIES:
        raise InputError("body", f"unknown body {name!r}; allowed: {' '.join(BODIES)}")
    return s


# Pluto, JPL approximate elements valid 1800-2050 (Standish; from memory, checked against
# PyEphem in tests/test_sky_bodies.py): a [AU], e, I [deg], L [deg], long. perihelion [deg],
# long. ascending node [deg], each with its rate per Julian century from J2000 (TDB).
_PLUTO_ELEMENTS = (
    (39.48211675, -0.00031596),
    (0.24882730, 0.00005170),
    (17.14001206, 0.00004818),
    (238.92903833, 145.20780515),
    (224.06891629, -0.04062942),
    (110.30393684, -0.01183482),
)
_OBLIQUITY_J2000_DEG = 84381.448 / 3600.0  # IAU 1976 mean obliquity at J2000 (the elements' ecliptic)


def _kepler_heliocentric_icrs(jd_tdb: np.ndarray, elements) -> np.ndarray:
    """Heliocentric position [n, 3] AU, equatorial (ICRS axes) from Keplerian elements."""
    t = (np.asarray(jd_tdb, dtype=np.float64) - 2451545.0) / 36525.0
    a, e, inc, mean_long, peri, node = (v0 + v1 * t for v0, v1 in elements)
    inc, peri, node = np.radians(inc), np.radians(peri), np.radians(node)
    w = peri - node  # argument of perihelion
    m = np.radians((mean_long - np.degrees(peri) + 180.0) % 360.0 - 180.0)
    ecc_anom = np.where(e > 0.8, np.pi * np.sign(m), m + e * np.sin(m))  # start at pi for eccentric orbits
    for _ in range(30):  # Newton on E - e sin E = M: Pluto (e = 0.25) converges in < 6 steps
        ecc_anom -= (ecc_anom - e * np.sin(ecc_anom) - m) / (1.0 - e * np.cos(ecc_anom))
    xp = a * (np.cos(ecc_anom) - e)
    yp = a * np.sqrt(1.0 - e * e) * np.sin(ecc_anom)
    cw, sw, cn, sn, ci, si = np.cos(w), np.sin(w), np.cos(node), np.sin(node), np.cos(inc), np.sin(inc)
    x = (cw * cn - sw * sn * ci) * xp + (-sw * cn - cw * sn * ci) * yp
    y = (cw * sn + sw * cn * ci) * xp + (-sw * sn + cw * cn * ci) * yp
    z = (sw * si) * xp + (cw * si) * yp
    eps = math.radians(_OBLIQUITY_J2000_DEG)
    return np.stack([x, math.cos(eps) * y - math.sin(eps) * z, math.sin(eps) * y + math.cos(eps) * z], axis=-1)


def _barycentric_au(body: str, jd_tdb: np.ndarray) -> np.ndarray:
    """Barycentric ICRS position [n, 3] in AU at TDB Julian dates (built-in ephemeris only)."""
    from astropy.coordinates import get_body_barycentric
    from astropy.time import Time
    from astropy import units as u

    t = Time(jd_tdb, format="jd", scale="tdb")
    if body == "pluto":
        sun = get_body_barycentric("sun", t, ephemeris="builtin").xyz.to_value(u.au).T
        return sun + _kepler_heliocentric_icrs(jd_tdb, _PLUTO_ELEMENTS)
    return get_body_barycentric(body, t, ephemeris="builtin").xyz.to_value(u.au).T


def _astrometric(barycentric, times_unix) -> tuple[np.ndarray, np.ndarray]:
    """Geocentric astrometric unit vectors [n, 3] and distances [n] (AU) of whatever
    ``barycentric(jd_tdb)`` places. Light time: the position at t - delta/c, delta iterated
    twice (the second pass changes the time by < 1 ms for every planet)."""
    from scheduler.sky.offline import configure_offline
    from astropy.coordinates import get_body_barycentric
    from astropy.time import Time
    from astropy import units as u

    configure_offline()
    t = Time(np.atleast_1d(np.asarray(times_unix, dtype=np.float64)), format="unix", scale="utc")
    jd = t.tdb.jd
    earth = get_body_barycentric("earth", t, ephemeris="builtin").xyz.to_value(u.au).T
    vec = barycentric(jd) - earth
    for _ in range(2):
        delta = np.linalg.norm(vec, axis=1)
        vec = barycentric(jd - delta / LIGHT_DAY_AU) - earth
    delta = np.linalg.norm(vec, axis=1)
    return vec / delta[:, None], delta


def body_astrometric(name: str, times_unix) -> tuple[np.ndarray, np.ndarray]:
    """Geocentric astrometric ICRS unit vectors [n, 3] and distances [n] (AU) of a body."""
    body = check_body(name)
    return _astrometric(lambda jd: _barycentric_au(body, jd), times_unix)


def orbit_elements(q_au: float, e: float, inc_deg: float, node_deg: float, peri_arg_deg: float,
                   perihelion_jd_tdb: float):
    """Elements in the form the Keplerian code takes, from the usual set of an elliptic orbit:
    perihelion distance, eccentricity (< 1), inclination, ascending node, argument of perihelion
    (J2000 ecliptic, degrees) and the time of perihelion. Fixed orbit (no rates)."""
    a = q_au / (1.0 - e)
    n = 0.9856076686 / a**1.5  # mean motion, deg/day (Gaussian gravitational constant)
    peri_long = node_deg + peri_arg_deg
    mean_long_j2000 = peri_long + n * (2451545.0 - perihelion_jd_tdb)
    return ((a, 0.0), (e, 0.0), (inc_deg, 0.0), (mean_long_j2000, n * 36525.0), (peri_long, 0.0), (node_deg, 0.0))


def orbit_astrometric(elements, times_unix) -> tuple[np.ndarray, np.ndarray]:
    """Geocentric astrometric ICRS unit vectors and distances (AU) of a body on a heliocentric
    Keplerian orbit (``orbit_elements``): for invented comets and asteroids."""
    from astropy.coordinates import get_body_barycentric
    from astropy.time import Time
    from astropy import units as u

    def bary(jd):
        sun = get_body_barycentric("sun", Time(jd, format="jd", scale="tdb"), ephemeris="builtin")
        return sun.xyz.to_value(u.au).T + _kepler_heliocentric_icrs(jd, elements)

    return _astrometric(bary, times_unix)


# --------------------------------------------------------------------------- tables

@dataclass(frozen=True)
class EphemerisTable:
    """A PI's ephemeris: rows of (time, RA, Dec[, distance]) strictly increasing in time."""

    times_unix: tuple[float, ...]
    ra_deg: tuple[float, ...]
    dec_deg: tuple[float, ...]
    delta_au: tuple[float, ...] | None = None

    def __post_init__(self):
        n = len(self.times_unix)
        if n < 2 or len(self.ra_deg) != n or len(self.dec_deg) != n or (self.delta_au is not None and len(self.delta_au) != n):
            raise InputError("ephemeris", "needs at least two rows, each with time, ra and dec")

    @property
    def n_rows(self) -> int:
        return len(self.times_unix)

    @property
    def start_unix(self) -> float:
        return self.times_unix[0]

    @property
    def end_unix(self) -> float:
        return self.times_unix[-1]

    @cached_property
    def key(self) -> str:
        """Content digest: two identical tables are one target (sky cache, target rows)."""
        return hashlib.sha256(self.to_csv().encode()).hexdigest()[:20]

    @cached_property
    def _arrays(self) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
        t = np.array(self.times_unix, dtype=np.float64)
        ra, dec = np.radians(self.ra_deg), np.radians(self.dec_deg)
        u = np.stack([np.cos(dec) * np.cos(ra), np.cos(dec) * np.sin(ra), np.sin(dec)], axis=1)
        d = None if self.delta_au is None else np.array(self.delta_au, dtype=np.float64)
        return t, u, d

    def to_csv(self) -> str:
        """Canonical CSV (what the database stores): degrees and AU with full precision."""
        out = io.StringIO()
        cols = ["time", "ra", "dec"] + (["delta_au"] if self.delta_au is not None else [])
        out.write(",".join(cols) + "\n")
        for i in range(self.n_rows):
            row = [iso_ms(self.times_unix[i]), repr(float(self.ra_deg[i])), repr(float(self.dec_deg[i]))]
            if self.delta_au is not None:
                row.append(repr(float(self.delta_au[i])))
            out.write(",".join(row) + "\n")
        return out.getvalue()

    def row_time(self, i: int) -> str:
        return iso_ms(self.times_unix[i])

    def require_cover(self, t0_unix: float, t1_unix: float, what: str, field: str = "ephemeris") -> None:
        """InputError naming the first or last row if [t0, t1] is not inside the table's span."""
        if t0_unix < self.start_unix:
            raise InputError(field, f"the table starts at row 1 ({self.row_time(0)}), after {what} begins "
                                    f"({iso_ms(t0_unix)}); it must cover {what}")
        if t1_unix > self.end_unix:
            raise InputError(field, f"the table ends at row {self.n_rows} ({self.row_time(self.n_rows - 1)}), "
                                    f"before {what} ends ({iso_ms(t1_unix)}); it must cover {what}")

    def positions(self, times_unix) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(unit vectors [n, 3], distance [n] AU or inf, covered [n] bool) at the times.

        Outside the table's span: covered False, vector and distance nan.
        """
        t, u, d = self._arrays
        q = np.atleast_1d(np.asarray(times_unix, dtype=np.float64))
        covered = (q >= t[0]) & (q <= t[-1])
        vec = _hermite(t, u, q)
        vec /= np.linalg.norm(vec, axis=1, keepdims=True)
        dist = np.full(q.shape, np.inf) if d is None else _hermite(t, d[:, None], q)[:, 0]
        vec[~covered] = np.nan
        dist = np.where(covered, dist, np.nan)
        return vec, dist, covered


def iso_ms(unix: float) -> str:
    """ISO-8601 UTC; keeps fractional seconds when a row has them."""
    t = utc(unix)
    if t.microsecond:
        return t.strftime("%Y-%m-%dT%H:%M:%S.%f").rstrip("0") + "Z"
    return iso(t)


def _hermite(t: np.ndarray, y: np.ndarray, q: np.ndarray) -> np.ndarray:
    """Cubic Hermite interpolation of y [n, k] at q; derivatives from three-point differences.

    The derivative at a row is the slope of the parabola through it and its two neighbours
    (at the first and last rows, through the three end rows): exact for quadratic motion.
    Two rows only: the straight line.
    Outside [t0, tn] the end segments are extended (callers mask those times).
    """
    n = t.shape[0]
    h = np.diff(t)
    s = np.diff(y, axis=0) / h[:, None]  # chord slopes [n-1, k]
    m = np.empty_like(y)
    m[0], m[-1] = s[0], s[-1]
    if n > 2:
        hl, hr = h[:-1, None], h[1:, None]
        m[1:-1] = (s[:-1] * hr + s[1:] * hl) / (hl + hr)
        # ends: slope of the parabola through the first (last) three rows, at the end row
        m[0] = s[0] - h[0] * (s[1] - s[0]) / (h[0] + h[1])
        m[-1] = s[-1] + h[-1] * (s[-1] - s[-2]) / (h[-2] + h[-1])
    j = np.clip(np.searchsorted(t, q, side="right") - 1, 0, n - 2)
    hj = h[j][:, None]
    x = ((q - t[j]) / h[j])[:, None]
    h00 = 2 * x**3 - 3 * x**2 + 1
    h10 = x**3 - 2 * x**2 + x
    h01 = -2 * x**3 + 3 * x**2
    h11 = x**3 - x**2
    return h00 * y[j] + h10 * hj * m[j] + h01 * y[j + 1] + h11 * hj * m[j + 1]


def _cell(row: dict, name: str) -> str:
    v = row.get(name)
    return "" if v is None else str(v).strip()


def parse_ephemeris_csv(text: str, source: str = "ephemeris") -> EphemerisTable:
    """Parse and validate a PI's ephemeris table. InputError names the row (data rows from 1).

    Refused: missing columns, unknown columns, an unreadable cell, fewer than two rows, a time
    not strictly after the previous row's, RA outside 0..360, Dec outside -90..90, a distance
    that is not positive.
    """
    from scheduler.model.request import parse_dec, parse_ra  # RA/Dec rules have one home

    if not isinstance(text, str) or not text.strip():
        raise InputError(source, "the ephemeris table is empty; it needs a header time,ra,dec[,delta_au] and rows")
    reader = csv.DictReader(io.StringIO(text.lstrip("\ufeff")))
    header = [h.strip().lower() for h in (reader.fieldnames or [])]
    for need in ("time", "ra", "dec"):
        if need not in header:
            raise InputError(source, f"the header has no {need!r} column; columns: time,ra,dec and optionally delta_au")
    extra = [h for h in header if h not in TABLE_COLUMNS]
    if extra:
        raise InputError(source, f"unknown column {extra[0]!r}; columns: time,ra,dec and optionally delta_au")
    reader.fieldnames = header
    has_delta = "delta_au" in header
    times: list[float] = []
    ras: list[float] = []
    decs: list[float] = []
    deltas: list[float] = []
    for i, raw in enumerate(reader, start=1):
        if i > MAX_TABLE_ROWS:
            raise InputError(source, f"more than {MAX_TABLE_ROWS} rows")
        if None in raw:  # more cells than columns
            raise InputError(source, f"row {i}: more cells than the header's {len(header)} columns")
        try:
            t = parse_time(_cell(raw, "time"), "time").timestamp()
            ra = parse_ra(_cell(raw, "ra"))
            dec = parse_dec(_cell(raw, "dec"))
        except InputError as e:
            raise InputError(source, f"row {i}: {e.field}: {e.message}") from None
        if times and t <= times[-1]:
            raise InputError(source, f"row {i}: time {iso_ms(t)} is not after row {i - 1}'s {iso_ms(times[-1])}; "
                                     "rows must be in strictly increasing time")
        if has_delta:
            cell = _cell(raw, "delta_au")
            try:
                d = float(cell)
            except ValueError:
                raise InputError(source, f"row {i}: delta_au {cell!r} is not a number; allowed greater than 0 AU") from None
            if not math.isfinite(d) or d <= 0 or d > 1e6:
                raise InputError(source, f"row {i}: delta_au {cell} is out of range; allowed greater than 0 and at most 1e6 AU")
            deltas.append(d)
        times.append(t)
        ras.append(ra)
        decs.append(dec)
    if len(times) < 2:
        raise InputError(source, f"{len(times)} row(s); an ephemeris table needs at least two to interpolate")
    return EphemerisTable(tuple(times), tuple(ras), tuple(decs), tuple(deltas) if has_delta else None)


# --------------------------------------------------------------------------- tracks

Track = Union[str, EphemerisTable]  # a body name or a table


def track_key(track: Track) -> tuple[str, str]:
    """Identity of a moving target for caches and target rows."""
    if isinstance(track, EphemerisTable):
        return ("table", track.key)
    return ("body", check_body(track))


def track_positions(track: Track, times_unix) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(ICRS unit vectors [n, 3], distance [n] AU (inf if unknown), covered [n] bool)."""
    if isinstance(track, EphemerisTable):
        return track.positions(times_unix)
    vec, dist = body_astrometric(track, times_unix)
    return vec, dist, np.ones(vec.shape[0], dtype=bool)


def radec_deg(vec: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """RA in [0, 360) and Dec of unit vectors [..., 3] (nan stays nan)."""
    x, y, z = vec[..., 0], vec[..., 1], vec[..., 2]
    ra = np.degrees(np.arctan2(y, x)) % 360.0
    dec = np.degrees(np.arctan2(z, np.hypot(x, y)))
    return ra, dec


def track_radec(track: Track, times_unix) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(RA, Dec, covered) in degrees at the times: for listings, exports and nominal positions."""
    vec, _, covered = track_positions(track, times_unix)
    ra, dec = radec_deg(vec)
    return ra, dec, covered
