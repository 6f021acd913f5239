"""observatory.toml: the site, telescope, instruments, bands, safety limits and planning knobs.

Loaded once, validated whole: an unknown key, a missing key or a value out of range raises
``ConfigError`` naming the key (for example ``telescope.aperture_m``) and the allowed range.
Pure: reads the file it is given and nothing else.
"""

from __future__ import annotations

import difflib
import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from scheduler.model.errors import ConfigError, InputError
from scheduler.model.untrusted import check_text, safe_name, shown, type_name

# Which darkness a band needs: the Sun's centre must be below this altitude (degrees).
# Civil/nautical/astronomical are the trade's definitions (-6, -12, -18); "day" means the
# band may observe in daylight, limited only by sun avoidance (submillimetre dishes).
TWILIGHT_SUN_ALT_DEG = {"astronomical": -18.0, "nautical": -12.0, "civil": -6.0, "day": 90.0}


@dataclass(frozen=True)
class Site:
    name: str
    latitude_deg: float
    longitude_deg: float
    elevation_m: float
    timezone: str
    # Adaptive optics: mean height of the turbulence (metres above the site), for the
    # isoplanatic angle theta0 = 0.314 r0 / h_bar. A few km at good sites (from memory).
    turbulence_height_m: float | None = None
    # Thermal infrared: the air temperature the sky emits at (Celsius; typical night value).
    air_temperature_c: float = 5.0


@dataclass(frozen=True)
class Telescope:
    name: str
    aperture_m: float
    min_altitude_deg: float
    max_altitude_deg: float  # above this the mount cannot track (zenith blind spot)
    slew_rate_az_deg_s: float
    slew_rate_alt_deg_s: float
    settle_s: float
    # Dish surface accuracy (bands that are not seeing-limited): rms surface error in
    # micrometres at night, and when sunlit (a sunlit dish deforms); Ruze efficiency below
    # the floor refuses a band.
    surface_rms_um: float | None = None
    surface_rms_day_um: float | None = None  # None: the night value
    surface_efficiency_floor: float = 0.3


@dataclass(frozen=True)
class Band:
    name: str
    wavelength_um: float
    extinction_mag: float  # broadband extinction, mag per airmass (dry atmosphere)
    tau_dry: float  # zenith opacity not due to water vapour (mostly used at long wavelengths)
    tau_per_mm_pwv: float  # zenith opacity per mm of precipitable water vapour
    twilight: str  # key of TWILIGHT_SUN_ALT_DEG
    seeing_limited: bool = True  # False: the image is the diffraction pattern (radio/submm)
    dark_sky_mag: float | None = None  # V-like sky mag/arcsec^2 at zenith on a dark night
    moon_color_mag: float | None = None  # moonlight colour, band minus V (mag)
    source: str = ""
    thermal: bool = False  # mid-infrared: the sky's own emission sets the noise

    @property
    def sun_alt_limit_deg(self) -> float:
        return TWILIGHT_SUN_ALT_DEG[self.twilight]


@dataclass(frozen=True)
class Instrument:
    name: str
    bands: tuple[str, ...]
    setup_s: float  # acquisition and set-up on a new target
    filter_change_s: float  # changing band within this instrument
    instrument_change_s: float  # switching to this instrument from another
    fwhm_arcsec: float = 0.0  # instrument's own image blur, added in quadrature
    ao_seeing_limit_arcsec: float | None = None  # fallback switch: AO corrects when seeing is below this
    ao_min_wavelength_um: float = 1.0
    # AO from the turbulence (takes precedence over the switch when the pitch is given):
    ao_actuator_pitch_m: float | None = None  # actuator spacing projected on the primary
    ao_fitting_coeff: float = 0.3  # a_F in a_F (d / r0)^(5/3); ~0.3 continuous facesheet (from memory)
    ao_strehl_min: float = 0.3  # the corrected core counts when the Strehl ratio reaches this
    ao_servo_lag_ms: float | None = None  # loop delay, for the temporal term (needs a coherence time)

    @property
    def ao_turbulence_model(self) -> bool:
        return self.ao_actuator_pitch_m is not None


@dataclass(frozen=True)
class Safety:
    sun_avoidance_deg: float
    max_wind_ms: float
    max_humidity_pct: float


@dataclass(frozen=True)
class ConditionDefaults:
    """Conservative values used where no forecast sample covers a time."""

    seeing_arcsec: float
    pwv_mm: float
    cloud_mag: float
    wind_ms: float
    humidity_pct: float
    dome_open: bool


MAX_EFFORT = 1000  # the largest deterministic work budget (solve/budget.py)
MAX_SEED = 2 ** 31 - 1  # seeds of the randomized searches (CP-SAT takes a 32-bit signed seed)


@dataclass(frozen=True)
class Planning:
    step_s: int = 60
    time_limit_s: float = 10.0
    replan_time_limit_s: float = 4.0  # every re-plan from now, service or inline (the lower of the two applies)
    gap_tolerance: float = 0.01
    freeze_horizon_min: float = 15.0
    replan_seeing_change_arcsec: float = 0.2
    replan_pwv_change_mm: float = 1.0
    heartbeat_min: float = 30.0
    # The science value (docs/solver.md): steep priorities, urgency across nights, balance.
    priority_ratio: float = 2.0  # weight of priority p is priority_ratio ** (p - 5)
    lookahead_nights: int = 60  # horizon of the remaining-opportunities count
    urgency_max: float = 4.0  # urgency factor of a request whose last opportunity is tonight
    balance_max: float = 2.0  # a program's balance factor stays within [1/balance_max, balance_max]
    allow_overfill: bool = False  # plan programs past their allocated hours (at the lowest balance)
    opportunity_step_min: int = 10  # coarse grid of the opportunities count, minutes
    # warn (plan build, service log, status) when forecasts cover less than this share of the night
    min_forecast_share: float = 0.5
    # A deterministic work budget instead of the clock for every build and re-plan (an integer
    # from 1 to 1000, solve/budget.py): the same queue, conditions, effort and seed give the same
    # plan on any machine. None: the time limits above apply.
    effort: int | None = None
    seed: int = 0  # seeds the randomized searches (and CP-SAT)


@dataclass(frozen=True)
class ServiceSettings:
    # a feed file is taken once its size and modification time have stayed the same this long
    feed_settle_s: float = 5.0


@dataclass(frozen=True)
class ClimatologyRef:
    """Where the site's weather statistics live (for the season outlook)."""

    file: str  # as written in the config: relative to the config file's folder, or absolute


@dataclass(frozen=True)
class ObservatoryConfig:
    site: Site
    telescope: Telescope
    bands: dict[str, Band]
    instruments: tuple[Instrument, ...]
    safety: Safety
    defaults: ConditionDefaults
    planning: Planning = field(default_factory=Planning)
    path: str | None = None
    service: ServiceSettings = field(default_factory=ServiceSettings)
    climatology: ClimatologyRef | None = None

    def climatology_path(self) -> Path | None:
        """The climatology file, resolved against the config file's folder; None if not configured."""
        if self.climatology is None:
            return None
        p = Path(self.climatology.file).expanduser()
        if not p.is_absolute() and self.path:
            p = Path(self.path).resolve().parent / p
        return p

    def band(self, name: str) -> Band:
        try:
            return self.bands[name]
        except KeyError:
            raise ConfigError("band", f"unknown band {name!r}; allowed: {' '.join(self.bands)}") from None

    def instrument_for(self, band: str, instrument: str | None = None) -> Instrument:
        """The named instrument (it must offer the band), else the first one that offers it."""
        if instrument:
            for inst in self.instruments:
                if inst.name == instrument:
                    if band not in inst.bands:
                        raise ConfigError(
                            "instrument", f"{instrument!r} does not offer band {band!r}; it offers {' '.join(inst.bands)}"
                        )
                    return inst
            names = " ".join(i.name for i in self.instruments)
            raise ConfigError("instrument", f"unknown instrument {instrument!r}; allowed: {names}")
        for inst in self.instruments:
            if band in inst.bands:
                return inst
        raise ConfigError("band", f"no instrument offers band {band!r}")

    def diffraction_limit_arcsec(self, band: str) -> float:
        """First dark ring of the Airy pattern, 1.22 lambda/D, for this telescope in this band."""
        return 1.22 * self.band(band).wavelength_um * 1e-6 / self.telescope.aperture_m * RAD_TO_ARCSEC


RAD_TO_ARCSEC = 180.0 / math.pi * 3600.0


def site_dict(config: ObservatoryConfig) -> dict[str, Any]:
    return {"name": config.site.name, "lat_deg": config.site.latitude_deg, "lon_deg": config.site.longitude_deg,
            "elevation_m": config.site.elevation_m, "timezone": config.site.timezone}


def telescope_dict(config: ObservatoryConfig) -> dict[str, Any]:
    tel = config.telescope
    return {"name": tel.name, "aperture_m": tel.aperture_m, "slew_rate_az_deg_s": tel.slew_rate_az_deg_s,
            "slew_rate_alt_deg_s": tel.slew_rate_alt_deg_s, "settle_s": tel.settle_s}


# --------------------------------------------------------------------------- validation

def _suggest(key: str, allowed: tuple[str, ...]) -> str:
    close = difflib.get_close_matches(key, allowed, n=1, cutoff=0.6)
    if close:
        return f"unknown key; did you mean {close[0]!r}? (allowed: {', '.join(allowed)})"
    return f"unknown key; allowed: {', '.join(allowed)}"


class _Table:
    """A TOML table being read. Unknown keys are refused first, with the closest valid key
    suggested (a misspelt required key would otherwise be reported as missing)."""

    def __init__(self, data: Any, name: str, keys: tuple[str, ...]):
        if not isinstance(data, dict):
            raise ConfigError(name or "config", "must be a table")
        self.data = dict(data)
        self.name = name
        for k in sorted(self.data, key=str):
            if k not in keys:
                raise ConfigError(self.key(safe_name(k)), _suggest(str(k), keys))

    def key(self, k: str) -> str:
        return f"{self.name}.{k}" if self.name else k

    def _take(self, k: str, default: Any, required: bool) -> Any:
        if k in self.data:
            return self.data.pop(k)
        if required:
            raise ConfigError(self.key(k), "is required")
        return default

    def num(self, k: str, lo: float, hi: float, default: float | None = None, *, required: bool = True,
            lo_open: bool = False) -> float:
        v = self._take(k, default, required and default is None)
        if v is None:
            return None  # type: ignore[return-value]
        rng = f"greater than {lo:g} and at most {hi:g}" if lo_open else f"from {lo:g} to {hi:g}"
        if isinstance(v, bool) or not isinstance(v, (int, float)):
            raise ConfigError(self.key(k), f"must be a number, not {type_name(v)}; allowed {rng}")
        try:
            x = float(v)
        except OverflowError:  # an integer of hundreds of digits
            raise ConfigError(self.key(k), f"{shown(v)} is out of range; allowed {rng}") from None
        if not math.isfinite(x) or x < lo or x > hi or (lo_open and x == lo):
            raise ConfigError(self.key(k), f"{shown(v)} is out of range; allowed {rng}")
        return x

    def text(self, k: str, default: str | None = None, choices: tuple[str, ...] | None = None) -> str:
        v = self._take(k, default, default is None)
        if not isinstance(v, str) or not v.strip() or len(v.strip()) > 200:
            got = "" if isinstance(v, str) else f", not {type_name(v)}"
            raise ConfigError(self.key(k), f"must be a non-empty string of at most 200 characters{got}")
        try:
            out = check_text(v, self.key(k), max_len=200)
        except InputError as e:
            raise ConfigError(e.field, e.message) from None
        if choices and out not in choices:
            raise ConfigError(self.key(k), f"{shown(out)} not allowed; choose one of {', '.join(choices)}")
        return out  # type: ignore[return-value]

    def flag(self, k: str, default: bool) -> bool:
        v = self._take(k, default, False)
        if not isinstance(v, bool):
            raise ConfigError(self.key(k), f"must be true or false, not {type_name(v)}")
        return v


SITE_KEYS = ("name", "latitude_deg", "longitude_deg", "elevation_m", "timezone", "turbulence_height_m",
             "air_temperature_c")
TELESCOPE_KEYS = ("name", "aperture_m", "min_altitude_deg", "max_altitude_deg", "slew_rate_az_deg_s",
                  "slew_rate_alt_deg_s", "settle_s", "surface_rms_um", "surface_rms_day_um",
                  "surface_efficiency_floor")
BAND_KEYS = ("name", "wavelength_um", "extinction_mag", "tau_dry", "tau_per_mm_pwv", "twilight",
             "seeing_limited", "dark_sky_mag", "moon_color_mag", "source", "thermal")
INSTRUMENT_KEYS = ("name", "bands", "setup_s", "filter_change_s", "instrument_change_s", "fwhm_arcsec",
                   "ao_seeing_limit_arcsec", "ao_min_wavelength_um", "ao_actuator_pitch_m", "ao_fitting_coeff",
                   "ao_strehl_min", "ao_servo_lag_ms")
SAFETY_KEYS = ("sun_avoidance_deg", "max_wind_ms", "max_humidity_pct")
DEFAULTS_KEYS = ("seeing_arcsec", "pwv_mm", "cloud_mag", "wind_ms", "humidity_pct", "dome_open")
PLANNING_KEYS = ("step_s", "time_limit_s", "replan_time_limit_s", "gap_tolerance", "freeze_horizon_min",
                 "replan_seeing_change_arcsec", "replan_pwv_change_mm", "heartbeat_min", "min_forecast_share",
                 "priority_ratio", "lookahead_nights", "urgency_max", "balance_max", "allow_overfill",
                 "opportunity_step_min", "effort", "seed")
SERVICE_KEYS = ("feed_settle_s",)
CLIMATOLOGY_KEYS = ("file",)
ROOT_KEYS = ("site", "telescope", "band", "instrument", "safety", "defaults", "planning", "service", "climatology")

# Lower bounds of rates and sizes that must be positive. A slew rate of 1e-300 deg/s once passed
# "greater than 0" and made every slew longer than any index can hold; these floors are far
# below any real telescope and far above where arithmetic breaks (common practice).
MIN_SLEW_DEG_S = 0.01
MIN_APERTURE_M = 0.01
MIN_SEEING_ARCSEC = 0.05


def _site(t: _Table) -> Site:
    tz = t.text("timezone")
    try:
        ZoneInfo(tz)
    except (ZoneInfoNotFoundError, ValueError, OSError):  # OSError: a folder such as "America"
        raise ConfigError("site.timezone", f"{shown(tz)} is not an IANA time zone name "
                                           "(e.g. America/Argentina/Salta)") from None
    return Site(
        name=t.text("name"),
        latitude_deg=t.num("latitude_deg", -90, 90),
        longitude_deg=t.num("longitude_deg", -180, 180),
        elevation_m=t.num("elevation_m", -500, 9000),
        timezone=tz,
        turbulence_height_m=t.num("turbulence_height_m", 0, 30000, required=False, lo_open=True),
        air_temperature_c=t.num("air_temperature_c", -90, 60, 5.0),
    )


def _telescope(t: _Table) -> Telescope:
    tel = Telescope(
        name=t.text("name"),
        aperture_m=t.num("aperture_m", MIN_APERTURE_M, 1000),
        min_altitude_deg=t.num("min_altitude_deg", 0, 89),
        max_altitude_deg=t.num("max_altitude_deg", 1, 90, 90.0),
        slew_rate_az_deg_s=t.num("slew_rate_az_deg_s", MIN_SLEW_DEG_S, 100),
        slew_rate_alt_deg_s=t.num("slew_rate_alt_deg_s", MIN_SLEW_DEG_S, 100),
        settle_s=t.num("settle_s", 0, 3600),
        surface_rms_um=t.num("surface_rms_um", 0, 1e5, required=False, lo_open=True),
        surface_rms_day_um=t.num("surface_rms_day_um", 0, 1e5, required=False, lo_open=True),
        surface_efficiency_floor=t.num("surface_efficiency_floor", 0, 1, 0.3),
    )
    if tel.surface_rms_day_um is not None and tel.surface_rms_um is None:
        raise ConfigError("telescope.surface_rms_day_um", "needs surface_rms_um (the night value) as well")
    if tel.max_altitude_deg <= tel.min_altitude_deg:
        raise ConfigError("telescope.max_altitude_deg", f"must be above min_altitude_deg ({tel.min_altitude_deg})")
    return tel


def _band(t: _Table) -> Band:
    b = Band(
        name=t.text("name"),
        wavelength_um=t.num("wavelength_um", 0.1, 1e7),
        extinction_mag=t.num("extinction_mag", 0, 10, 0.0),
        tau_dry=t.num("tau_dry", 0, 20, 0.0),
        tau_per_mm_pwv=t.num("tau_per_mm_pwv", 0, 20, 0.0),
        twilight=t.text("twilight", "astronomical", tuple(TWILIGHT_SUN_ALT_DEG)),
        seeing_limited=t.flag("seeing_limited", True),
        dark_sky_mag=t.num("dark_sky_mag", 0, 30, required=False),
        moon_color_mag=t.num("moon_color_mag", -10, 10, required=False),
        source=t.text("source", "-"),
        thermal=t.flag("thermal", False),
    )
    if b.thermal and b.tau_dry == 0 and b.extinction_mag == 0:
        raise ConfigError(f"{t.name}.tau_dry", "a thermal band needs a dry opacity above 0 (the sky's emissivity "
                                               "at zero water vapour sets its best background)")
    if len(b.name) > 16 or not (b.name.replace("_", "").replace("-", "").isalnum() and b.name.isascii()):
        raise ConfigError(f"{t.name}.name", "band names are 1-16 ASCII letters, digits, '-' or '_'")
    return b


def _instrument(t: _Table, bands: dict[str, Band]) -> Instrument:
    raw_bands = t._take("bands", None, True)
    if not isinstance(raw_bands, list) or not raw_bands or not all(isinstance(b, str) for b in raw_bands):
        raise ConfigError(t.key("bands"), "must be a non-empty list of band names")
    for b in raw_bands:
        if b not in bands:
            raise ConfigError(t.key("bands"), f"unknown band {shown(b)}; defined bands: {' '.join(bands)}")
    return Instrument(
        name=t.text("name"),
        bands=tuple(raw_bands),
        setup_s=t.num("setup_s", 0, 7200),
        filter_change_s=t.num("filter_change_s", 0, 3600, 0.0),
        instrument_change_s=t.num("instrument_change_s", 0, 7200, 0.0),
        fwhm_arcsec=t.num("fwhm_arcsec", 0, 60, 0.0),
        ao_seeing_limit_arcsec=t.num("ao_seeing_limit_arcsec", MIN_SEEING_ARCSEC, 10, required=False),
        ao_min_wavelength_um=t.num("ao_min_wavelength_um", 0.1, 1e7, 1.0),
        ao_actuator_pitch_m=t.num("ao_actuator_pitch_m", 0, 10, required=False, lo_open=True),
        ao_fitting_coeff=t.num("ao_fitting_coeff", 0, 10, 0.3, lo_open=True),
        ao_strehl_min=t.num("ao_strehl_min", 0, 1, 0.3, lo_open=True),
        ao_servo_lag_ms=t.num("ao_servo_lag_ms", 0, 1000, required=False),
    )


def _tables(value: Any, name: str) -> list[Any]:
    if not isinstance(value, list) or not value:
        raise ConfigError(name, f"at least one [[{name}]] table is required")
    return value


def parse_config(data: dict[str, Any], path: str | None = None) -> ObservatoryConfig:
    """Validate a parsed TOML document into an ObservatoryConfig."""
    root = _Table(data, "", ROOT_KEYS)
    site = _site(_Table(root._take("site", None, True), "site", SITE_KEYS))
    telescope = _telescope(_Table(root._take("telescope", None, True), "telescope", TELESCOPE_KEYS))

    bands: dict[str, Band] = {}
    for i, rb in enumerate(_tables(root._take("band", None, True), "band")):
        b = _band(_Table(rb, f"band[{i}]", BAND_KEYS))
        if b.name in bands:
            raise ConfigError(f"band[{i}].name", f"duplicate band {shown(b.name)}")
        bands[b.name] = b

    instruments: list[Instrument] = []
    for i, ri in enumerate(_tables(root._take("instrument", None, True), "instrument")):
        inst = _instrument(_Table(ri, f"instrument[{i}]", INSTRUMENT_KEYS), bands)
        if any(x.name == inst.name for x in instruments):
            raise ConfigError(f"instrument[{i}].name", f"duplicate instrument {shown(inst.name)}")
        instruments.append(inst)
    for i, inst in enumerate(instruments):
        if inst.ao_turbulence_model and site.turbulence_height_m is None:
            raise ConfigError("site.turbulence_height_m", f"is required: instrument {inst.name!r} has "
                                                          "ao_actuator_pitch_m (allowed greater than 0 and at most 30000 m)")
    orphan = [b for b in bands if not any(b in inst.bands for inst in instruments)]
    if orphan:
        raise ConfigError("band", f"band {shown(orphan[0])} is offered by no instrument")

    st = _Table(root._take("safety", None, True), "safety", SAFETY_KEYS)
    safety = Safety(
        sun_avoidance_deg=st.num("sun_avoidance_deg", 0, 180),
        max_wind_ms=st.num("max_wind_ms", 0, 200, lo_open=True),
        max_humidity_pct=st.num("max_humidity_pct", 0, 100, lo_open=True),
    )

    dt = _Table(root._take("defaults", None, True), "defaults", DEFAULTS_KEYS)
    defaults = ConditionDefaults(
        seeing_arcsec=dt.num("seeing_arcsec", MIN_SEEING_ARCSEC, 20),
        pwv_mm=dt.num("pwv_mm", 0, 100),
        cloud_mag=dt.num("cloud_mag", 0, 20),
        wind_ms=dt.num("wind_ms", 0, 200),
        humidity_pct=dt.num("humidity_pct", 0, 100),
        dome_open=dt.flag("dome_open", True),
    )

    pt = _Table(root._take("planning", {}, False), "planning", PLANNING_KEYS)
    step = pt.num("step_s", 10, 3600, 60)
    if step != int(step):
        raise ConfigError("planning.step_s", "must be a whole number of seconds from 10 to 3600")
    planning = Planning(
        step_s=int(step),
        time_limit_s=pt.num("time_limit_s", 0.1, 3600, 10.0),
        replan_time_limit_s=pt.num("replan_time_limit_s", 0.1, 3600, 4.0),
        gap_tolerance=pt.num("gap_tolerance", 0, 1, 0.01),
        freeze_horizon_min=pt.num("freeze_horizon_min", 0, 600, 15.0),
        replan_seeing_change_arcsec=pt.num("replan_seeing_change_arcsec", 0, 10, 0.2),
        replan_pwv_change_mm=pt.num("replan_pwv_change_mm", 0, 100, 1.0),
        heartbeat_min=pt.num("heartbeat_min", 1, 1440, 30.0),
        priority_ratio=pt.num("priority_ratio", 1, 10, 2.0),
        lookahead_nights=_whole(pt, "lookahead_nights", 1, 366, 60),
        urgency_max=pt.num("urgency_max", 1, 100, 4.0),
        balance_max=pt.num("balance_max", 1, 10, 2.0),
        allow_overfill=pt.flag("allow_overfill", False),
        opportunity_step_min=_whole(pt, "opportunity_step_min", 1, 60, 10),
        min_forecast_share=pt.num("min_forecast_share", 0, 1, 0.5),
        effort=_whole(pt, "effort", 1, MAX_EFFORT, None),
        seed=_whole(pt, "seed", 0, MAX_SEED, 0),
    )

    sv = _Table(root._take("service", {}, False), "service", SERVICE_KEYS)
    service = ServiceSettings(feed_settle_s=sv.num("feed_settle_s", 0, 3600, 5.0))
    climatology = _climatology(root._take("climatology", None, False))
    return ObservatoryConfig(site, telescope, bands, tuple(instruments), safety, defaults, planning, path,
                             service, climatology)


def _whole(t: _Table, k: str, lo: int, hi: int, default: int | None) -> int | None:
    """A whole number from lo to hi; ``default`` None makes the key optional (absent: None)."""
    v = t.num(k, lo, hi, default, required=default is not None)
    if v is None:
        return None
    if v != int(v):
        raise ConfigError(t.key(k), f"must be a whole number from {lo} to {hi}")
    return int(v)


def _climatology(raw: Any) -> ClimatologyRef | None:
    if raw is None:
        return None
    t = _Table(raw, "climatology", CLIMATOLOGY_KEYS)
    return ClimatologyRef(file=t.text("file"))


MAX_CONFIG_BYTES = 1_000_000


def load_config(path: str | Path) -> ObservatoryConfig:
    p = Path(path)
    if not p.is_file():
        raise ConfigError("config", f"{p} not found; run `nightplan init` or pass --config FILE")
    raw = p.read_bytes()
    if len(raw) > MAX_CONFIG_BYTES:
        raise ConfigError("config", f"{p} is larger than {MAX_CONFIG_BYTES} bytes")
    try:
        data = tomllib.loads(raw.decode("utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as e:
        raise ConfigError("config", f"{p} is not valid TOML: {str(e).splitlines()[0][:200]}") from None
    except RecursionError:  # arrays or tables nested thousands deep
        raise ConfigError("config", f"{p} is not usable TOML: nested too deeply") from None
    except ValueError:  # Python refuses to read an integer of more than 4300 digits
        raise ConfigError("config", f"{p} is not usable TOML: it holds an integer of thousands of digits; "
                                    "every number here is far smaller") from None
    return parse_config(data, str(p))


def starter_config_text() -> str:
    """The observatory.toml that `nightplan init` writes (an invented site)."""
    return (Path(__file__).resolve().parents[1] / "data" / "observatory.toml").read_text(encoding="utf-8")


def starter_config() -> ObservatoryConfig:
    return parse_config(tomllib.loads(starter_config_text()), "<starter>")
