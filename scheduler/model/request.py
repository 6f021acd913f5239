"""An observation request as the planner sees it, and the validation of raw user input into one.

Pure: no database, no files. The CLI (`request add`, `request import`) and the storage layer
both go through ``validate_request`` so a request is checked the same way wherever it enters.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, fields, replace
from datetime import datetime
from enum import StrEnum
from typing import TYPE_CHECKING, Any, Mapping

from scheduler.model.config import ObservatoryConfig
from scheduler.model.errors import InputError
from scheduler.model.timegrid import iso, parse_time
from scheduler.model.untrusted import (
    check_duplicates, check_text, csv_table, load_json, parse_number, safe_name, shown, text_problem,
    type_name,
)

if TYPE_CHECKING:  # sky.bodies (and numpy) load only for moving targets: `request list` and friends skip them
    from scheduler.sky.bodies import EphemerisTable



class RequestStatus(StrEnum):
    """Where a request is in its life. Stored as its value (the text), shown as its value."""

    QUEUED = "queued"  # waiting for a plan
    PLANNED = "planned"  # in the active plan
    DONE = "done"  # every execution observed
    FAILED = "failed"  # an attempt failed; the planner takes it again
    WITHDRAWN = "withdrawn"  # taken back by its PI or an operator
    EXPIRED = "expired"  # its not_after passed before it was done


# Statuses the planner considers, and those of requests that have left the queue for good.
ACTIVE_STATUSES = (RequestStatus.QUEUED, RequestStatus.PLANNED, RequestStatus.FAILED)
CLOSED_STATUSES = (RequestStatus.DONE, RequestStatus.WITHDRAWN, RequestStatus.EXPIRED)


class OutcomeResult(StrEnum):
    """What an observer records for one planned execution."""

    DONE = "done"  # the execution is complete
    FAILED = "failed"  # nothing usable; back to the queue
    PARTIAL = "partial"  # part of the exposure is credited, the rest stays queued


# The import contract's columns (keep exactly; scripts depend on them).
IMPORT_COLUMNS = (
    "program", "target", "ra", "dec", "band", "exposure_s", "resolution_arcsec",
    "max_seeing_arcsec", "max_pwv_mm", "max_airmass", "min_moon_sep_deg", "max_cloud_mag",
    "not_before", "not_after", "priority", "repeats",
)
# Our additions, accepted by import and add as well.
EXTRA_COLUMNS = (
    "instrument", "min_spacing_s", "max_moon_illum", "min_sky_mag",
    "period_epoch", "period_days", "phase_min", "phase_max", "too",
    "guide_star_sep_arcsec", "body", "ephemeris_file",
)
# Not a column: the ephemeris table's text (or a parsed EphemerisTable). The edge that reads
# files (CLI, importer) turns ``ephemeris_file`` into this before validation.
EPHEMERIS_KEY = "ephemeris"
# Reference time for a body's listed position when neither not_before nor now is given.
J2000_UNIX = 946_728_000.0
ALL_COLUMNS = IMPORT_COLUMNS + EXTRA_COLUMNS

MAX_TEXT = 200
MAX_EXPOSURE_S = 12 * 3600
# Lower bounds of quantities that must be positive: below these a value is a typing or unit
# mistake, not a request (common practice): a 1 ms shutter, seeing or PWV no site reports,
# a period shorter than a grid step of a minute or two.
MIN_EXPOSURE_S = 0.001
MIN_SEEING_ARCSEC = 0.05
MIN_PWV_MM = 0.01
MIN_PERIOD_DAYS = 0.001
MAX_REPEATS = 100


@dataclass(frozen=True)
class RequestSpec:
    """One queued request, validated. Angles in degrees, times UTC, durations in seconds."""

    program: str
    target: str
    ra_deg: float
    dec_deg: float
    band: str
    exposure_s: float
    instrument: str | None = None
    repeats: int = 1
    min_spacing_s: float | None = None
    resolution_arcsec: float | None = None  # delivered FWHM needed, in this band at the target's airmass
    max_seeing_arcsec: float | None = None  # site seeing at 500 nm at zenith
    max_pwv_mm: float | None = None
    max_airmass: float | None = None
    min_moon_sep_deg: float | None = None
    max_moon_illum: float | None = None  # Moon illuminated fraction 0..1 (only when the Moon is up)
    min_sky_mag: float | None = None  # sky must be at least this dark, mag/arcsec^2 in the band
    max_cloud_mag: float | None = None
    not_before: datetime | None = None
    not_after: datetime | None = None
    period_epoch: datetime | None = None  # periodic event: phase 0 at this time
    period_days: float | None = None
    phase_min: float | None = None
    phase_max: float | None = None
    priority: int = 5
    too: bool = False  # target of opportunity
    guide_star_sep_arcsec: float | None = None  # AO guide star distance; 0 = on-axis or laser guide star
    body: str | None = None  # moving target: a planet or Pluto by name (ra/dec: position at a reference time)
    ephemeris: EphemerisTable | None = None  # moving target: the PI's table (ra/dec: position at a reference time)
    id: int | None = None
    status: RequestStatus = RequestStatus.QUEUED
    completed_repeats: int = 0
    partial_exposure_s: float = 0.0  # credited towards the current execution by a partial outcome

    @property
    def track(self) -> "str | EphemerisTable | None":
        """What a moving target's position comes from (None for a fixed ICRS target)."""
        return self.ephemeris if self.ephemeris is not None else self.body

    @property
    def moving(self) -> bool:
        return self.body is not None or self.ephemeris is not None

    @property
    def remaining_repeats(self) -> int:
        return max(self.repeats - self.completed_repeats, 0)

    @property
    def next_exposure_s(self) -> float:
        """Exposure still owed on the next execution (a partial outcome shortens it)."""
        return max(self.exposure_s - self.partial_exposure_s, 1.0)

    def as_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {}
        for f in fields(self):
            v = getattr(self, f.name)
            if isinstance(v, datetime):
                v = iso(v)
            elif f.name == "ephemeris" and v is not None:
                v = v.to_csv()
            out[f.name] = v
        return out

    def with_(self, **kw: Any) -> "RequestSpec":
        return replace(self, **kw)


# --------------------------------------------------------------------------- parsing

# Sexagesimal with colons or spaces, ASCII digits only: hours for RA, degrees for Dec.
_SEXA = re.compile(r"([+-]?)([0-9]{1,3})[: ]+([0-9]{1,2})(?:[: ]+([0-9]{1,2}(?:\.[0-9]*)?))?")
# Forms with units written in (4h12m30s, 63d07m30s, 10°30′15″, 1.1rad): astropy's angle parser.
_UNIT_MARK = re.compile(r"[a-zA-Z°′″'\"]")
_MAX_ANGLE_CHARS = 64
RA_FORMS = "degrees 0 <= RA < 360, hh:mm:ss.s, or with units such as 4h12m30s or 63d07m30s"
DEC_FORMS = "degrees -90 to +90, ±dd:mm:ss, or with units such as -26d38m50s"


def _non_ascii_digit(s: str) -> bool:
    return any(c.isnumeric() and not ("0" <= c <= "9") for c in s)


def _astropy_angle(s: str, unit_name: str) -> float | None:
    """Degrees from astropy's Angle parser (units in the text win over ``unit_name``), or None
    if it does not read ``s``. Its out-of-range warnings (60 seconds, say) count as refusals."""
    import warnings

    from astropy import units as u
    from astropy.coordinates import Angle

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            deg = float(Angle(s, unit=getattr(u, unit_name)).degree)
    except Exception:  # noqa: BLE001 - any failure of the parser is "not an angle"
        return None
    return deg if math.isfinite(deg) else None


def _angle_text(value: Any, field: str, forms: str) -> str | float:
    """The trimmed text of an angle (or the number it already is), refusing what is neither."""
    if isinstance(value, bool) or not isinstance(value, (int, float, str)):
        raise InputError(field, f"must be a number or text, not {type_name(value)}; allowed {forms}")
    if not isinstance(value, str):
        try:
            return float(value)
        except OverflowError:
            raise InputError(field, f"{shown(value)} is out of range; allowed {forms}") from None
    s = value.strip()
    if len(s) > _MAX_ANGLE_CHARS or _non_ascii_digit(s) or text_problem(s):
        raise InputError(field, f"{shown(value)} is not an angle; allowed {forms}")
    return s


def parse_ra(value: Any) -> float:
    """RA in degrees (0 <= ra < 360), sexagesimal hours ``hh:mm:ss.s``, or with units (``4h12m30s``)."""
    s = _angle_text(value, "ra", RA_FORMS)
    if isinstance(s, float):
        ra = s
    elif _NUMBER_TEXT.fullmatch(s):
        ra = parse_number(s, "ra", RA_FORMS)
    elif (m := _SEXA.fullmatch(s)) is not None:
        sign, h, mi, se = m.groups()
        if sign:
            raise InputError("ra", f"{shown(s)}: sexagesimal RA is hours 0..24 without a sign (hh:mm:ss.s)")
        h, mi, se = int(h), int(mi), float(se or 0)
        if h >= 24 or mi >= 60 or se >= 60:
            raise InputError("ra", f"{shown(s)}: hours must be 0-23, minutes and seconds 0-59")
        ra = 15.0 * (h + mi / 60 + se / 3600)
    elif _UNIT_MARK.search(s) and not s.startswith("+") and (deg := _astropy_angle(s, "hourangle")) is not None:
        ra = deg
    else:
        raise InputError("ra", f"{shown(s)} is not an angle; allowed {RA_FORMS}")
    # 24h reads as 359.99999999999994 deg: anything within a micro-arcsecond of 360 is 24h, refused
    if not math.isfinite(ra) or ra < 0 or ra > 360.0 - 1e-9:
        raise InputError("ra", f"{shown(value)} is out of range; allowed {RA_FORMS}")
    return ra


def parse_dec(value: Any) -> float:
    """Dec in degrees (-90..90), sexagesimal ``±dd:mm:ss``, or with units (``-26d38m50s``)."""
    s = _angle_text(value, "dec", DEC_FORMS)
    if isinstance(s, float):
        dec = s
    elif _NUMBER_TEXT.fullmatch(s):
        dec = parse_number(s, "dec", DEC_FORMS)
    elif (m := _SEXA.fullmatch(s)) is not None:
        sign, d, mi, se = m.groups()
        d, mi, se = int(d), int(mi), float(se or 0)
        if mi >= 60 or se >= 60:
            raise InputError("dec", f"{shown(s)}: minutes and seconds must be 0-59")
        dec = d + mi / 60 + se / 3600
        if sign == "-":
            dec = -dec
    elif _UNIT_MARK.search(s) and (deg := _astropy_angle(s, "deg")) is not None:
        dec = deg
    else:
        raise InputError("dec", f"{shown(s)} is not an angle; allowed {DEC_FORMS}")
    if not math.isfinite(dec) or dec < -90 or dec > 90:
        raise InputError("dec", f"{shown(value)} is out of range; allowed {DEC_FORMS}")
    return dec


_NUMBER_TEXT = re.compile(r"[+-]?(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?")


def _range_text(lo: float, hi: float, lo_open: bool, unit: str) -> str:
    return (f"greater than {lo:g} and at most {hi:g}{unit}" if lo_open else f"from {lo:g} to {hi:g}{unit}")


def _num(raw: Mapping[str, Any], name: str, lo: float, hi: float, *, lo_open: bool = False,
         unit: str = "") -> float | None:
    rng = _range_text(lo, hi, lo_open, unit)
    x = parse_number(raw.get(name), name, rng)
    if x is None:
        return None
    if x < lo or x > hi or (lo_open and x == lo):
        raise InputError(name, f"{shown(raw.get(name))} is out of range; allowed {rng}")
    return x


def _int(raw: Mapping[str, Any], name: str, lo: int, hi: int, default: int) -> int:
    x = _num(raw, name, lo, hi)
    if x is None:
        return default
    if x != int(x):
        raise InputError(name, f"{shown(raw[name])} must be a whole number from {lo} to {hi}")
    return int(x)


def _text(raw: Mapping[str, Any], name: str, required: bool = True) -> str | None:
    return check_text(raw.get(name), name, max_len=MAX_TEXT, required=required)


def _time(raw: Mapping[str, Any], name: str) -> datetime | None:
    v = raw.get(name)
    if v is None or (isinstance(v, str) and not v.strip()):
        return None
    return parse_time(v, name, require_zone=True)


def _bool(raw: Mapping[str, Any], name: str) -> bool:
    v = raw.get(name)
    if v is None or v == "":
        return False
    if isinstance(v, bool):
        return v
    if isinstance(v, str):
        s = v.strip().lower()
        if s in ("1", "true", "yes", "y"):
            return True
        if s in ("0", "false", "no", "n"):
            return False
    if isinstance(v, int) and v in (0, 1):
        return bool(v)
    raise InputError(name, f"{shown(v)} must be true or false")


# Program codes: the one rule, also for `program add` (a code ending in a newline once passed
# a regular expression whose ``$`` matches before a final newline: hence fullmatch).
PROGRAM_CODE = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,63}")
PROGRAM_CODE_RULE = "1-64 letters, digits, '.', '_' or '-', starting with a letter or digit"
MAX_PROGRAM_HOURS = 10_000.0
MAX_PROGRAM_WEIGHT = 100.0


def check_program_code(code: Any, field: str = "program") -> str:
    """A program code exactly as given (no trimming: a code is an identifier, not prose)."""
    if not isinstance(code, str) or not PROGRAM_CODE.fullmatch(code):
        what = shown(code) if isinstance(code, str) else type_name(code)
        raise InputError(field, f"{what}: {PROGRAM_CODE_RULE}")
    return code


def validate_program(code: Any, pi: Any, hours: Any = 0.0, weight: Any = 1.0) -> tuple[str, str, float, float]:
    """A new program's fields: (code, PI, allocated hours, weight); InputError naming the first bad one."""
    code = check_program_code(code, "code")
    pi = check_text(pi, "pi", max_len=MAX_TEXT)
    h = parse_number(hours, "hours", f"0 to {MAX_PROGRAM_HOURS:g}")
    h = 0.0 if h is None else h
    if not (0 <= h <= MAX_PROGRAM_HOURS):
        raise InputError("hours", f"{shown(hours)} is out of range; allowed 0 to {MAX_PROGRAM_HOURS:g}")
    w = parse_number(weight, "weight", f"greater than 0 and at most {MAX_PROGRAM_WEIGHT:g}")
    w = 1.0 if w is None else w
    if not (0 < w <= MAX_PROGRAM_WEIGHT):
        raise InputError("weight", f"{shown(weight)} is out of range; allowed greater than 0 and at most "
                                   f"{MAX_PROGRAM_WEIGHT:g}")
    return code, pi, h, w


def validate_request(raw: Mapping[str, Any], config: ObservatoryConfig,
                     programs: set[str] | None = None, now: datetime | None = None, *,
                     allow_past: bool = False) -> RequestSpec:
    """Turn raw fields (import column names; ``ra``/``dec`` or ``ra_deg``/``dec_deg``) into a RequestSpec.

    Raises InputError naming the first bad field. ``programs``: known program codes (None: skip).
    The target is one of: ``ra``/``dec``; ``body`` (a planet or Pluto); ``ephemeris`` (the text of
    an ephemeris table, or an EphemerisTable). A moving target's ra_deg/dec_deg are its position
    at not_before, else at ``now``, else (body) J2000.0 or (table) its first row: for listings
    only; the planner uses the position at each time.
    ``now``: when given, a ``not_after`` at or before it is refused (the request could never
    run) unless ``allow_past`` (e.g. re-entering last night's records). None: no such check,
    so the function stays a pure function of its arguments.
    """
    check_duplicates(raw)
    unknown = [k for k in raw if k not in ALL_COLUMNS and k not in ("ra_deg", "dec_deg", EPHEMERIS_KEY)]
    if unknown:
        raise InputError(safe_name(unknown[0]), f"unknown column; allowed: {','.join(ALL_COLUMNS)}")
    program = _text(raw, "program")
    if programs is not None and program not in programs:
        known = ", ".join(sorted(programs)) or "none yet; add one with `nightplan program add`"
        raise InputError("program", f"unknown program {shown(program)}; known: {known}")
    target = _text(raw, "target")
    for a, b in (("ra", "ra_deg"), ("dec", "dec_deg")):
        if raw.get(a) not in (None, "") and raw.get(b) not in (None, ""):
            raise InputError(b, f"give {a} or {b}, not both")
    ra_raw = raw.get("ra") if raw.get("ra") not in (None, "") else raw.get("ra_deg")
    dec_raw = raw.get("dec") if raw.get("dec") not in (None, "") else raw.get("dec_deg")
    body, table = _moving_target(raw, ra_raw, dec_raw)
    if body is None and table is None:
        if ra_raw is None or (isinstance(ra_raw, str) and not ra_raw.strip()):
            raise InputError("ra", f"is required (allowed {RA_FORMS}), unless body or ephemeris_file gives "
                                   "a moving target")
        if dec_raw is None or (isinstance(dec_raw, str) and not dec_raw.strip()):
            raise InputError("dec", f"is required; allowed {DEC_FORMS}")
        ra, dec = parse_ra(ra_raw), parse_dec(dec_raw)

    band_name = _text(raw, "band")
    if band_name not in config.bands:
        raise InputError("band", f"unknown band {shown(band_name)}; allowed: {' '.join(config.bands)}")
    instrument = _text(raw, "instrument", required=False)
    try:
        inst = config.instrument_for(band_name, instrument)
    except InputError as e:
        raise InputError(e.field, e.message) from None

    exposure = _num(raw, "exposure_s", MIN_EXPOSURE_S, MAX_EXPOSURE_S, unit=" seconds")
    if exposure is None:
        raise InputError("exposure_s", f"is required; allowed {_range_text(MIN_EXPOSURE_S, MAX_EXPOSURE_S, False, ' seconds')}")

    resolution = _num(raw, "resolution_arcsec", 0, 36_000, lo_open=True, unit=" arcsec")
    if resolution is not None:
        limit = config.diffraction_limit_arcsec(band_name)
        if resolution < limit:
            raise InputError(
                "resolution_arcsec",
                f"{resolution:g} arcsec is finer than the diffraction limit 1.22 lambda/D = {limit:.3g} arcsec "
                f"of the {config.telescope.aperture_m:g} m aperture in band {band_name} "
                f"({config.bands[band_name].wavelength_um:g} um)",
            )
    max_seeing = _num(raw, "max_seeing_arcsec", MIN_SEEING_ARCSEC, 20, unit=" arcsec")
    max_pwv = _num(raw, "max_pwv_mm", MIN_PWV_MM, 100, unit=" mm")
    max_airmass = _num(raw, "max_airmass", 1, 40, unit="")
    min_moon = _num(raw, "min_moon_sep_deg", 0, 180, unit=" degrees")
    max_illum = _num(raw, "max_moon_illum", 0, 1)
    min_sky = _num(raw, "min_sky_mag", 0, 30, unit=" mag/arcsec^2")
    max_cloud = _num(raw, "max_cloud_mag", 0, 20, unit=" mag")
    not_before = _time(raw, "not_before")
    not_after = _time(raw, "not_after")
    if not_before and not_after and not_after <= not_before:
        raise InputError("not_after", f"{iso(not_after)} is not after not_before {iso(not_before)}")
    if not_after is not None and now is not None and not allow_past and not_after <= now:
        raise InputError("not_after", f"{iso(not_after)} is already past (now {iso(now)}): the request could "
                                      "never run; allowed: a later time (or pass --allow-past to record it anyway)")
    priority = _int(raw, "priority", 1, 10, 5)
    repeats = _int(raw, "repeats", 1, MAX_REPEATS, 1)
    min_spacing = _num(raw, "min_spacing_s", 0, 30 * 86400, unit=" seconds")

    period_days = _num(raw, "period_days", MIN_PERIOD_DAYS, 1e5, unit=" days")
    epoch = _time(raw, "period_epoch")
    phase_min = _num(raw, "phase_min", 0, 1)
    phase_max = _num(raw, "phase_max", 0, 1)
    periodic = [period_days, epoch, phase_min, phase_max]
    if any(v is not None for v in periodic) and any(v is None for v in periodic):
        missing = ["period_days", "period_epoch", "phase_min", "phase_max"][[v is None for v in periodic].index(True)]
        raise InputError(missing, "a periodic window needs period_epoch, period_days, phase_min and phase_max")

    guide_sep = _num(raw, "guide_star_sep_arcsec", 0, 600, unit=" arcsec")
    if guide_sep is not None and not (inst.ao_turbulence_model or inst.ao_seeing_limit_arcsec is not None):
        raise InputError("guide_star_sep_arcsec", f"instrument {inst.name!r} has no adaptive optics; leave it empty")
    _check_surface(config, band_name)

    if table is not None:
        for name, t in (("not_before", not_before), ("not_after", not_after)):
            if t is not None:
                table.require_cover(t.timestamp(), t.timestamp(), f"{name} {iso(t)}", "ephemeris_file")
        ref = not_before or now
        ref_unix = table.start_unix if ref is None else min(max(ref.timestamp(), table.start_unix), table.end_unix)
    elif body is not None:
        ref = not_before or now
        ref_unix = J2000_UNIX if ref is None else ref.timestamp()
    if body is not None or table is not None:
        from scheduler.sky.bodies import track_radec

        r, d, _ = track_radec(table if table is not None else body, [ref_unix])
        ra, dec = float(r[0]) % 360.0, float(d[0])

    return RequestSpec(
        program=program, target=target, ra_deg=ra, dec_deg=dec, band=band_name,
        exposure_s=exposure, instrument=inst.name, repeats=repeats, min_spacing_s=min_spacing,
        resolution_arcsec=resolution, max_seeing_arcsec=max_seeing, max_pwv_mm=max_pwv,
        max_airmass=max_airmass, min_moon_sep_deg=min_moon, max_moon_illum=max_illum,
        min_sky_mag=min_sky, max_cloud_mag=max_cloud, not_before=not_before, not_after=not_after,
        period_epoch=epoch, period_days=period_days, phase_min=phase_min, phase_max=phase_max,
        priority=priority, too=_bool(raw, "too"), guide_star_sep_arcsec=guide_sep, body=body, ephemeris=table,
    )


_EPHEMERIS_NOT_READ = ("the file was not read; `request add --ephemeris FILE` and "
                       "`request import` read it (a path relative to the imported file)")


def _moving_target(raw: Mapping[str, Any], ra_raw: Any, dec_raw: Any) -> tuple[str | None, EphemerisTable | None]:
    """(body, table) from the raw fields; at most one of ra/dec, body, ephemeris may be given."""
    body_raw = _text(raw, "body", required=False)
    eph = raw.get(EPHEMERIS_KEY)
    if eph is None and body_raw is None:
        if raw.get("ephemeris_file") not in (None, ""):
            raise InputError("ephemeris_file", _EPHEMERIS_NOT_READ)
        return None, None  # a fixed ICRS target: the moving-target code (and numpy) is not loaded
    from scheduler.sky.bodies import EphemerisTable, check_body, parse_ephemeris_csv

    if eph is not None and not isinstance(eph, EphemerisTable) and not str(eph).strip():
        eph = None
    if raw.get("ephemeris_file") not in (None, "") and eph is None:
        raise InputError("ephemeris_file", _EPHEMERIS_NOT_READ)
    given = [n for n, present in (("ra/dec", ra_raw not in (None, "") or dec_raw not in (None, "")),
                                  ("body", body_raw is not None), ("ephemeris_file", eph is not None)) if present]
    if len(given) > 1:
        raise InputError(given[1] if given[1] != "ra/dec" else "ra",
                         f"give one of ra/dec, body or ephemeris_file for a target, not {' and '.join(given)}")
    body = check_body(body_raw) if body_raw is not None else None
    table = None
    if eph is not None:
        table = eph if isinstance(eph, EphemerisTable) else parse_ephemeris_csv(str(eph), "ephemeris_file")
    return body, table


def _check_surface(config: ObservatoryConfig, band_name: str) -> None:
    """Refuse a band where the dish's surface (Ruze) leaves less than the configured floor."""
    from scheduler.sky.physics import night_surface_efficiency

    band = config.bands[band_name]
    tel = config.telescope
    eff = night_surface_efficiency(band, tel)
    if eff < tel.surface_efficiency_floor:
        raise InputError("band", f"{band_name} ({band.wavelength_um:g} um): the dish surface ({tel.surface_rms_um:g} um rms) "
                                 f"leaves an efficiency of {eff:.2f} (Ruze), below the floor "
                                 f"{tel.surface_efficiency_floor:g} (telescope.surface_efficiency_floor)")


def never_observable_reason(spec: RequestSpec, config: ObservatoryConfig) -> str | None:
    """Why a target can never be observed from the site within its limits (geometry only), or None.

    The highest altitude a fixed ICRS target reaches is at transit: 90 - |latitude - dec|.
    """
    from scheduler.sky.airmass import kasten_young_1989

    lat = config.site.latitude_deg
    if spec.body is not None:
        return None  # a planet's declination sweeps the ecliptic; the sky grid decides per night
    decs = spec.ephemeris.dec_deg if spec.ephemeris is not None else (spec.dec_deg,)
    best_alt = max(90.0 - abs(lat - d) for d in decs)
    tel = config.telescope
    if best_alt < tel.min_altitude_deg:
        return (f"it culminates at altitude {best_alt:.1f} deg, below the telescope's limit "
                f"of {tel.min_altitude_deg:g} deg (site latitude {lat:g})")
    if spec.max_airmass is not None:
        best_x = float(kasten_young_1989(min(best_alt, tel.max_altitude_deg)))
        if best_x > spec.max_airmass:
            return f"its best airmass is {best_x:.2f}, above its max_airmass {spec.max_airmass:g}"
    return None


# --------------------------------------------------------------------------- import files

def parse_import_text(text: str, source: str, *, json_format: bool | None = None,
                      what: str = "request") -> list[tuple[int, dict[str, Any]]]:
    """(row number, raw fields) of an import: a CSV with a header row, or a JSON list of objects.

    ``json_format``: None tells JSON from the first character. Row numbers are what a user
    finds in the file: for CSV the line (the header is line 1), for JSON the position in the
    list (from 1). Refused, naming the column and row: a header with a column twice, a row
    with more values than the header, a JSON object giving a key twice, an entry that is not
    an object, JSON too deep or with numbers too long to read, a cell over the size limit.
    The fields themselves are checked by ``validate_request``.
    """
    stripped = text.lstrip("\ufeff").lstrip()
    if json_format is None:
        json_format = stripped.startswith(("[", "{"))
    if json_format:
        data = load_json(text.lstrip("\ufeff"), source=source)
        if not isinstance(data, list):
            raise InputError("file", f"JSON must be a list of objects, one per {what}, not {type_name(data)}",
                             source=source)
        rows: list[tuple[int, dict[str, Any]]] = []
        for i, obj in enumerate(data, start=1):
            if not isinstance(obj, dict):
                raise InputError(what, f"must be a JSON object, not {type_name(obj)}", row=i, source=source)
            check_duplicates(obj, row=i, source=source)
            rows.append((i, dict(obj)))
        return rows
    names, cells_of = csv_table(text, source=source)
    rows = []
    for line, cells in cells_of:
        if not cells or all(not c.strip() for c in cells):
            continue  # a blank line
        if len(cells) > len(names):
            raise InputError("columns", f"{len(cells)} values but the header has {len(names)} columns",
                             row=line, source=source)
        # trim spaces and line ends only: str.strip() would also drop controls such as U+0085 and
        # read a cell holding one as empty, where JSON giving the same value is refused
        row = {n: (cells[k].strip(" \t\r\n") if k < len(cells) else None) for k, n in enumerate(names)}
        rows.append((line, row))
    return rows
