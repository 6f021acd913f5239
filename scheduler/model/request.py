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
from typing import Any, Mapping

from scheduler.model.config import ObservatoryConfig
from scheduler.model.errors import InputError
from scheduler.model.timegrid import iso, parse_time



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
)
ALL_COLUMNS = IMPORT_COLUMNS + EXTRA_COLUMNS

MAX_TEXT = 200
MAX_EXPOSURE_S = 12 * 3600
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
    id: int | None = None
    status: RequestStatus = RequestStatus.QUEUED
    completed_repeats: int = 0
    partial_exposure_s: float = 0.0  # credited towards the current execution by a partial outcome

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
            out[f.name] = iso(v) if isinstance(v, datetime) else v
        return out

    def with_(self, **kw: Any) -> "RequestSpec":
        return replace(self, **kw)


# --------------------------------------------------------------------------- parsing

_SEXA = re.compile(r"^\s*([+-]?)(\d{1,3})[:\s hd](\d{1,2})(?:[:\s m'](\d{1,2}(?:\.\d*)?))?\s*[s\"]?\s*$")


def parse_ra(value: Any) -> float:
    """RA in degrees (0 <= ra < 360) or sexagesimal hours ``hh:mm:ss.s``."""
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        ra = float(value)
    else:
        s = str(value).strip()
        m = _SEXA.match(s)
        if m and ":" in s or (m and " " in s.strip()):
            sign, h, mi, se = m.groups()
            if sign:
                raise InputError("ra", f"{s!r}: sexagesimal RA is hours 0..24 without a sign (hh:mm:ss.s)")
            h, mi, se = int(h), int(mi), float(se or 0)
            if h >= 24 or mi >= 60 or se >= 60:
                raise InputError("ra", f"{s!r}: hours must be 0-23, minutes and seconds 0-59")
            ra = 15.0 * (h + mi / 60 + se / 3600)
        else:
            try:
                ra = float(s)
            except ValueError:
                raise InputError("ra", f"{s!r} is not degrees (0 to 360) or hh:mm:ss.s") from None
    if not math.isfinite(ra) or ra < 0 or ra >= 360:
        raise InputError("ra", f"{value!r} is out of range; allowed 0 <= RA < 360 degrees or 00:00:00 to 23:59:59.9")
    return ra


def parse_dec(value: Any) -> float:
    """Dec in degrees (-90..90) or sexagesimal ``±dd:mm:ss``."""
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        dec = float(value)
    else:
        s = str(value).strip()
        m = _SEXA.match(s)
        if m and (":" in s or " " in s):
            sign, d, mi, se = m.groups()
            d, mi, se = int(d), int(mi), float(se or 0)
            if mi >= 60 or se >= 60:
                raise InputError("dec", f"{s!r}: minutes and seconds must be 0-59")
            dec = d + mi / 60 + se / 3600
            if sign == "-":
                dec = -dec
        else:
            try:
                dec = float(s)
            except ValueError:
                raise InputError("dec", f"{s!r} is not degrees (-90 to 90) or ±dd:mm:ss") from None
    if not math.isfinite(dec) or dec < -90 or dec > 90:
        raise InputError("dec", f"{value!r} is out of range; allowed -90 to +90 degrees")
    return dec


def _num(raw: Mapping[str, Any], name: str, lo: float, hi: float, *, lo_open: bool = False,
         unit: str = "") -> float | None:
    v = raw.get(name)
    if v is None or (isinstance(v, str) and v.strip() == ""):
        return None
    if isinstance(v, bool):
        raise InputError(name, f"must be a number from {lo} to {hi}{unit}")
    try:
        x = float(v)
    except (TypeError, ValueError):
        raise InputError(name, f"{v!r} is not a number; allowed {lo} to {hi}{unit}") from None
    if not math.isfinite(x) or x < lo or x > hi or (lo_open and x == lo):
        rng = f"greater than {lo} and at most {hi}" if lo_open else f"from {lo} to {hi}"
        raise InputError(name, f"{v} is out of range; allowed {rng}{unit}")
    return x


def _int(raw: Mapping[str, Any], name: str, lo: int, hi: int, default: int) -> int:
    x = _num(raw, name, lo, hi)
    if x is None:
        return default
    if x != int(x):
        raise InputError(name, f"{raw[name]!r} must be a whole number from {lo} to {hi}")
    return int(x)


def _text(raw: Mapping[str, Any], name: str, required: bool = True) -> str | None:
    v = raw.get(name)
    if v is None or (isinstance(v, str) and not v.strip()):
        if required:
            raise InputError(name, "is required")
        return None
    s = str(v).strip()
    if len(s) > MAX_TEXT or any(ord(c) < 32 for c in s):
        raise InputError(name, f"must be 1 to {MAX_TEXT} printable characters")
    return s


def _bool(raw: Mapping[str, Any], name: str) -> bool:
    v = raw.get(name)
    if v is None or v == "":
        return False
    if isinstance(v, bool):
        return v
    s = str(v).strip().lower()
    if s in ("1", "true", "yes", "y"):
        return True
    if s in ("0", "false", "no", "n"):
        return False
    raise InputError(name, f"{v!r} must be true or false")


def validate_request(raw: Mapping[str, Any], config: ObservatoryConfig,
                     programs: set[str] | None = None) -> RequestSpec:
    """Turn raw fields (import column names; ``ra``/``dec`` or ``ra_deg``/``dec_deg``) into a RequestSpec.

    Raises InputError naming the first bad field. ``programs``: known program codes (None: skip).
    """
    unknown = [k for k in raw if k not in ALL_COLUMNS and k not in ("ra_deg", "dec_deg")]
    if unknown:
        raise InputError(unknown[0], f"unknown column; allowed: {','.join(ALL_COLUMNS)}")
    program = _text(raw, "program")
    if programs is not None and program not in programs:
        known = ", ".join(sorted(programs)) or "none yet; add one with `nightplan program add`"
        raise InputError("program", f"unknown program {program!r}; known: {known}")
    target = _text(raw, "target")
    ra_raw = raw.get("ra", raw.get("ra_deg"))
    dec_raw = raw.get("dec", raw.get("dec_deg"))
    if ra_raw is None or ra_raw == "":
        raise InputError("ra", "is required (degrees or hh:mm:ss.s)")
    if dec_raw is None or dec_raw == "":
        raise InputError("dec", "is required (degrees or ±dd:mm:ss)")
    ra, dec = parse_ra(ra_raw), parse_dec(dec_raw)

    band_name = _text(raw, "band")
    if band_name not in config.bands:
        raise InputError("band", f"unknown band {band_name!r}; allowed: {' '.join(config.bands)}")
    instrument = _text(raw, "instrument", required=False)
    try:
        inst = config.instrument_for(band_name, instrument)
    except InputError as e:
        raise InputError(e.field, e.message) from None

    exposure = _num(raw, "exposure_s", 0, MAX_EXPOSURE_S, lo_open=True, unit=" seconds")
    if exposure is None:
        raise InputError("exposure_s", f"is required; allowed greater than 0 and at most {MAX_EXPOSURE_S} seconds")

    resolution = _num(raw, "resolution_arcsec", 0, 1e6, lo_open=True, unit=" arcsec")
    if resolution is not None:
        limit = config.diffraction_limit_arcsec(band_name)
        if resolution < limit:
            raise InputError(
                "resolution_arcsec",
                f"{resolution:g} arcsec is finer than the diffraction limit 1.22 lambda/D = {limit:.3g} arcsec "
                f"of the {config.telescope.aperture_m:g} m aperture in band {band_name} "
                f"({config.bands[band_name].wavelength_um:g} um)",
            )
    max_seeing = _num(raw, "max_seeing_arcsec", 0, 20, lo_open=True, unit=" arcsec")
    max_pwv = _num(raw, "max_pwv_mm", 0, 100, lo_open=True, unit=" mm")
    max_airmass = _num(raw, "max_airmass", 1, 40, unit="")
    min_moon = _num(raw, "min_moon_sep_deg", 0, 180, unit=" degrees")
    max_illum = _num(raw, "max_moon_illum", 0, 1)
    min_sky = _num(raw, "min_sky_mag", 0, 30, unit=" mag/arcsec^2")
    max_cloud = _num(raw, "max_cloud_mag", 0, 20, unit=" mag")
    not_before = parse_time(raw["not_before"], "not_before") if raw.get("not_before") not in (None, "") else None
    not_after = parse_time(raw["not_after"], "not_after") if raw.get("not_after") not in (None, "") else None
    if not_before and not_after and not_after <= not_before:
        raise InputError("not_after", f"{iso(not_after)} is not after not_before {iso(not_before)}")
    priority = _int(raw, "priority", 1, 10, 5)
    repeats = _int(raw, "repeats", 1, MAX_REPEATS, 1)
    min_spacing = _num(raw, "min_spacing_s", 0, 30 * 86400, unit=" seconds")

    period_days = _num(raw, "period_days", 0, 1e5, lo_open=True, unit=" days")
    epoch = parse_time(raw["period_epoch"], "period_epoch") if raw.get("period_epoch") not in (None, "") else None
    phase_min = _num(raw, "phase_min", 0, 1)
    phase_max = _num(raw, "phase_max", 0, 1)
    periodic = [period_days, epoch, phase_min, phase_max]
    if any(v is not None for v in periodic) and any(v is None for v in periodic):
        missing = ["period_days", "period_epoch", "phase_min", "phase_max"][[v is None for v in periodic].index(True)]
        raise InputError(missing, "a periodic window needs period_epoch, period_days, phase_min and phase_max")

    return RequestSpec(
        program=program, target=target, ra_deg=ra, dec_deg=dec, band=band_name,
        exposure_s=exposure, instrument=inst.name, repeats=repeats, min_spacing_s=min_spacing,
        resolution_arcsec=resolution, max_seeing_arcsec=max_seeing, max_pwv_mm=max_pwv,
        max_airmass=max_airmass, min_moon_sep_deg=min_moon, max_moon_illum=max_illum,
        min_sky_mag=min_sky, max_cloud_mag=max_cloud, not_before=not_before, not_after=not_after,
        period_epoch=epoch, period_days=period_days, phase_min=phase_min, phase_max=phase_max,
        priority=priority, too=_bool(raw, "too"),
    )


def never_observable_reason(spec: RequestSpec, config: ObservatoryConfig) -> str | None:
    """Why a target can never be observed from the site within its limits (geometry only), or None.

    The highest altitude a fixed ICRS target reaches is at transit: 90 - |latitude - dec|.
    """
    from scheduler.sky.airmass import kasten_young_1989

    lat = config.site.latitude_deg
    best_alt = 90.0 - abs(lat - spec.dec_deg)
    tel = config.telescope
    if best_alt < tel.min_altitude_deg:
        return (f"it culminates at altitude {best_alt:.1f} deg, below the telescope's limit "
                f"of {tel.min_altitude_deg:g} deg (site latitude {lat:g})")
    if spec.max_airmass is not None:
        best_x = float(kasten_young_1989(min(best_alt, tel.max_altitude_deg)))
        if best_x > spec.max_airmass:
            return f"its best airmass is {best_x:.2f}, above its max_airmass {spec.max_airmass:g}"
    return None
