"""The night's almanac for the site: Sun events, the Moon, dark hours. Pure (config + date -> dict)."""

from __future__ import annotations

from datetime import date, datetime
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np

from scheduler.model.config import ObservatoryConfig
from scheduler.model.timegrid import iso
from scheduler.sky.ephemeris import compute_sky
from scheduler.sky.night import night_for

EVENTS = ("sunset", "civil_dusk", "nautical_dusk", "astronomical_dusk",
          "astronomical_dawn", "nautical_dawn", "civil_dawn", "sunrise")


def almanac_for(config: ObservatoryConfig, night_date: date) -> dict[str, Any]:
    site = config.site
    night = night_for(site, night_date, config.planning.step_s)
    sky = compute_sky(site, night, np.empty(0), np.empty(0))
    tz = ZoneInfo(site.timezone)
    step_h = night.step_s / 3600.0
    dark = sky.sun_alt_deg < -18.0
    moon_up = sky.moon_alt_deg > 0.0
    mid = night.n_times // 2
    out: dict[str, Any] = {
        "night": night_date.isoformat(),
        "site": {"name": site.name, "lat_deg": site.latitude_deg, "lon_deg": site.longitude_deg,
                 "elevation_m": site.elevation_m, "timezone": site.timezone},
        "local": {},
    }
    for key in EVENTS:
        t: datetime | None = getattr(night, key)
        out[key] = iso(t)
        out["local"][key] = t.astimezone(tz).strftime("%Y-%m-%d %H:%M %Z") if t else None
    # compute_night gives a noon-to-noon grid when the Sun never rises (polar night)
    polar_night = night.n_times * night.step_s >= 23.5 * 3600
    if polar_night:  # the grid runs noon to noon: there is no sunset or sunrise to show
        out["sunset"] = out["sunrise"] = None
        out["local"]["sunset"] = out["local"]["sunrise"] = None
    out["night_hours"] = round(night.n_times * step_h, 3)
    if night.astronomical_dusk and night.astronomical_dawn:  # the same figure `plan show` gives
        out["dark_hours"] = round((night.astronomical_dawn - night.astronomical_dusk).total_seconds() / 3600.0, 3)
    else:
        out["dark_hours"] = round(float(dark.sum()) * step_h, 3)
    out["moon_illumination"] = round(float(sky.moon_illum[mid]), 4) if night.n_times else None
    out["moon_phase_angle_deg"] = round(float(sky.moon_phase_angle_deg[mid]), 2) if night.n_times else None
    out["moon_up_hours"] = round(float(moon_up.sum()) * step_h, 3)
    out["moon_up_dark_hours"] = round(float((moon_up & dark).sum()) * step_h, 3)
    out["grid"] = {"start": iso(night.start), "end": iso(night.end), "step_s": night.step_s, "n_times": night.n_times}
    if polar_night:
        out["warning"] = "polar night: the Sun does not rise; the night runs from local noon to local noon"
    elif night.astronomical_dusk is None:
        out["warning"] = "the Sun does not reach -18 deg tonight: no astronomical darkness"
    return out
