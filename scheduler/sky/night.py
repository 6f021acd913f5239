"""The night: Sun events at the site and the planning time grid.

CONTRACT (shared by feasibility, solver, reports): the Night dataclass. compute_night builds it.

A night belongs to the local calendar date of its evening: it is searched between local noon
of that date and local noon of the next (site.timezone, so daylight-saving days are 23 or 25 h).
Altitudes are true (unrefracted) altitudes of the Sun's centre; sunset/sunrise use -0.833 deg
(upper limb on the horizon with 34' of refraction, common practice), twilights -6/-12/-18.
"""

from __future__ import annotations

import functools
import hashlib
import json
import math
from dataclasses import dataclass
from datetime import date, datetime, time, timedelta, timezone
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np

from scheduler.model.config import Site
from scheduler.model.errors import InputError
from scheduler.sky.offline import cache_dir, configure_offline, read_private, versions_key, write_private
from scheduler.model.timegrid import step_of, utc

SUNSET_ALT_DEG = -0.833
CIVIL_ALT_DEG = -6.0
NAUTICAL_ALT_DEG = -12.0
ASTRONOMICAL_ALT_DEG = -18.0

_COARSE_S = 600  # Sun altitude changes < 2.5 deg in 10 min: a crossing is never skipped unless it grazes
_FINE_POINTS = 41  # 15 s sub-steps inside each bracket; linear interpolation is then sub-second


@dataclass(frozen=True)
class Night:
    date: date  # local calendar date of the evening the night begins
    sunset: datetime  # all datetimes aware UTC; None where the Sun never reaches that altitude
    sunrise: datetime
    civil_dusk: datetime | None
    civil_dawn: datetime | None
    nautical_dusk: datetime | None
    nautical_dawn: datetime | None
    astronomical_dusk: datetime | None
    astronomical_dawn: datetime | None
    step_s: int
    times_unix: np.ndarray  # float64 [n_t]: start of each grid step, UTC unix seconds

    @property
    def n_times(self) -> int:
        return int(self.times_unix.shape[0])

    @property
    def start(self) -> datetime:
        return self.sunset

    @property
    def end(self) -> datetime:
        return self.sunrise

    def step_of(self, when: datetime) -> int:
        """The grid step of ``when``: see ``timegrid.step_of`` (rounds up; 0..n_times)."""
        return step_of(self.times_unix, when)


# --------------------------------------------------------------------------- Sun altitude

def earth_location(site: Site):
    from astropy import units as u
    from astropy.coordinates import EarthLocation

    return EarthLocation.from_geodetic(site.longitude_deg * u.deg, site.latitude_deg * u.deg, site.elevation_m * u.m)


def sun_alt_deg(site: Site, times_unix: np.ndarray) -> np.ndarray:
    """True altitude of the Sun's centre (degrees) at the given UTC unix times, one transform."""
    configure_offline()
    from astropy.coordinates import AltAz, get_sun
    from astropy.time import Time

    t = Time(np.asarray(times_unix, dtype=np.float64), format="unix", scale="utc")
    frame = AltAz(obstime=t, location=earth_location(site))  # pressure 0: no refraction
    return get_sun(t).transform_to(frame).alt.deg


def _crossings(site: Site, t0: float, t1: float, levels: tuple[float, ...]):
    """All times in [t0, t1] where the Sun's altitude crosses each level, with direction.

    Coarse grid, then one vectorised fine pass over every bracket found. Returns
    {level: [(unix_time, +1 rising / -1 setting), ...]} sorted by time, and the coarse samples.
    """
    n = int(np.ceil((t1 - t0) / _COARSE_S))
    tc = t0 + np.arange(n + 1) * ((t1 - t0) / n)
    ac = sun_alt_deg(site, tc)
    brackets = []  # (level, index of coarse step)
    for lev in levels:
        d = ac - lev
        for i in np.nonzero(np.signbit(d[:-1]) != np.signbit(d[1:]))[0]:
            brackets.append((lev, int(i)))
    out: dict[float, list[tuple[float, int]]] = {lev: [] for lev in levels}
    if not brackets:
        return out, tc, ac
    frac = np.linspace(0.0, 1.0, _FINE_POINTS)
    steps = np.array([i for _, i in brackets])
    tf = tc[steps][:, None] + frac[None, :] * (tc[steps + 1] - tc[steps])[:, None]
    af = sun_alt_deg(site, tf.ravel()).reshape(tf.shape)
    for (lev, _), tt, aa in zip(brackets, tf, af):
        d = aa - lev
        j = int(np.nonzero(np.signbit(d[:-1]) != np.signbit(d[1:]))[0][0])
        root = tt[j] + (tt[j + 1] - tt[j]) * d[j] / (d[j] - d[j + 1])
        out[lev].append((float(root), 1 if d[j + 1] > d[j] else -1))
    for lev in out:
        out[lev].sort()
    return out, tc, ac


def _local_noon_unix(site: Site, d: date) -> float:
    return datetime.combine(d, time(12, 0), tzinfo=ZoneInfo(site.timezone)).timestamp()


def compute_night(site: Site, night_date: date, step_s: int = 60) -> Night:
    """Sun events for the night beginning on the local evening of ``night_date``, and the grid.

    The grid runs from sunset (rounded up to a whole minute) to sunrise in steps of ``step_s``;
    every step ends at or before sunrise. Where the Sun does not rise within the search window
    (polar night) the night is clipped to the window's local noons. Where it never sets (polar
    day) there is no night and InputError is raised. Twilight events the Sun never reaches
    are None.
    """
    if not isinstance(step_s, (int, np.integer)) or not 10 <= step_s <= 3600:
        raise InputError("step_s", f"{step_s!r} is out of range; allowed a whole number of seconds from 10 to 3600")
    t0 = _local_noon_unix(site, night_date)
    t1 = _local_noon_unix(site, night_date + timedelta(days=1))
    levels = (SUNSET_ALT_DEG, CIVIL_ALT_DEG, NAUTICAL_ALT_DEG, ASTRONOMICAL_ALT_DEG)
    cross, tc, ac = _crossings(site, t0, t1, levels)

    def first_set(lev: float, after: float) -> float | None:
        return next((t for t, s in cross[lev] if s < 0 and t >= after), None)

    def last_rise(lev: float, before: float) -> float | None:
        return next((t for t, s in reversed(cross[lev]) if s > 0 and t <= before), None)

    sunset = first_set(SUNSET_ALT_DEG, t0)
    if sunset is None:
        if ac[0] > SUNSET_ALT_DEG:
            raise InputError("night", f"the Sun does not set at latitude {site.latitude_deg} deg on the evening "
                                      f"of {night_date.isoformat()}: there is no night to plan")
        sunset = t0  # polar night: dark from the window's start
    sunrise = last_rise(SUNSET_ALT_DEG, t1)
    if sunrise is None or sunrise < sunset:
        sunrise = t1

    events: dict[str, float | None] = {}
    for name, lev in (("civil", CIVIL_ALT_DEG), ("nautical", NAUTICAL_ALT_DEG), ("astronomical", ASTRONOMICAL_ALT_DEG)):
        dusk = first_set(lev, sunset)
        dawn = last_rise(lev, sunrise)
        if dusk is not None and dawn is not None and dawn < dusk:
            dawn = None
        events[name] = (dusk, dawn)

    return _night_from_events(night_date, int(step_s), float(sunset), float(sunrise), events)


_EVENT_NAMES = ("civil", "nautical", "astronomical")


def _night_from_events(night_date: date, step_s: int, sunset: float, sunrise: float,
                       events: dict[str, tuple[float | None, float | None]]) -> Night:
    """The Night from its Sun events (UTC unix seconds): the grid follows from sunset and sunrise."""
    start = np.ceil(sunset / 60.0) * 60.0
    n = int(np.floor((sunrise - start) / step_s))
    times = start + np.arange(max(n, 0), dtype=np.float64) * step_s

    def dt(x):
        return None if x is None else utc(x)

    return Night(
        date=night_date,
        sunset=utc(sunset),
        sunrise=utc(sunrise),
        civil_dusk=dt(events["civil"][0]),
        civil_dawn=dt(events["civil"][1]),
        nautical_dusk=dt(events["nautical"][0]),
        nautical_dawn=dt(events["nautical"][1]),
        astronomical_dusk=dt(events["astronomical"][0]),
        astronomical_dawn=dt(events["astronomical"][1]),
        step_s=int(step_s),
        times_unix=times,
    )


# --------------------------------------------------------------------------- nights kept on disk
#
# Computing a night's Sun events needs astropy and its Earth-orientation table: about a second
# for every command that shows a stored plan (`plan show`, `plan export`, `next`), which need
# nothing else of astropy. The events are kept as a small JSON payload in sky/offline.py's
# private, checksummed files, keyed by the site, the date, the grid step and the versions there;
# a file that cannot be trusted is not read and the night is computed again (a wrong sunset must
# never reach a plan).

_NIGHT_MAGIC = b"nightplan-night-1\n"


def _night_cache_path(site: Site, night_date: date, step_s: int) -> Path | None:
    d = cache_dir()
    if d is None:
        return None
    key = json.dumps([versions_key(), repr(site.latitude_deg), repr(site.longitude_deg), repr(site.elevation_m),
                      site.timezone, night_date.isoformat(), int(step_s)])
    return d / "nights" / f"{hashlib.sha256(key.encode()).hexdigest()[:32]}.json"


def _read_night(path: Path, night_date: date, step_s: int) -> Night | None:
    payload = read_private(path, _NIGHT_MAGIC)
    if payload is None:
        return None

    def num(x):
        if x is None:
            return None
        if isinstance(x, bool) or not isinstance(x, (int, float)) or not math.isfinite(x):
            raise ValueError("not a time")
        return float(x)

    try:
        ev = json.loads(payload)
        if ev["date"] != night_date.isoformat() or ev["step_s"] != step_s:
            return None
        events = {k: (num(ev[k][0]), num(ev[k][1])) for k in _EVENT_NAMES}
        return _night_from_events(night_date, step_s, num(ev["sunset"]), num(ev["sunrise"]), events)
    except (ValueError, KeyError, TypeError, IndexError):
        return None


def _write_night(path: Path, night: Night) -> None:
    def unix(x):
        return None if x is None else x.timestamp()

    write_private(path, _NIGHT_MAGIC, json.dumps({
        "date": night.date.isoformat(), "step_s": night.step_s,
        "sunset": unix(night.sunset), "sunrise": unix(night.sunrise),
        **{k: [unix(getattr(night, f"{k}_dusk")), unix(getattr(night, f"{k}_dawn"))] for k in _EVENT_NAMES},
    }).encode())


def kept_night(site: Site, night_date: date, step_s: int = 60) -> Night:
    """``compute_night``, kept on disk between processes (see above)."""
    path = _night_cache_path(site, night_date, step_s)
    night = _read_night(path, night_date, int(step_s)) if path is not None else None
    if night is None:
        night = compute_night(site, night_date, step_s)
        if path is not None:
            _write_night(path, night)
    return night


@functools.lru_cache(maxsize=32)
def night_for(site: Site, night_date: date, step_s: int = 60) -> Night:
    """The one night cache: remembered for the process (a build, the CLI, the service and the
    demo ask for the same night many times) and kept on disk between processes (kept_night).
    Callers must not modify the Night."""
    return kept_night(site, night_date, step_s)


def night_date_for(site: Site, when: datetime) -> date:
    """The night a UTC instant belongs to: local date, minus one day before local noon.

    Naive datetimes are taken as UTC (the interface speaks ISO-8601 UTC).
    """
    if when.tzinfo is None:
        when = when.replace(tzinfo=timezone.utc)
    local = when.astimezone(ZoneInfo(site.timezone))
    return local.date() if local.hour >= 12 else local.date() - timedelta(days=1)
