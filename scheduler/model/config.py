"""observatory.toml: the site, telescope, instruments, bands, safety limits and planning knobs.

Loaded once, validated whole: an unknown key, a missing key or a value out of range raises
``ConfigError`` naming the key (for example ``telescope.aperture_m``) and the allowed range.
Pure: reads the file it is given and nothing else.
"""

from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from scheduler.model.errors import ConfigError

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


@dataclass(frozen=True)
class Telescope:
    name: str
    aperture_m: float
    min_altitude_deg: float
    max_altitude_deg: float  # above this the mount cannot track (zenith blind spot)
    slew_rate_az_deg_s: float
    slew_rate_alt_deg_s: float
    settle_s: float


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
    ao_seeing_limit_arcsec: float | None = None  # adaptive optics corrects when seeing is below this
    ao_min_wavelength_um: float = 1.0


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

class _Table:
    """A TOML table being read: takes keys one by one, then refuses any left over."""

    def __init__(self, data: Any, name: str):
        if not isinstance(data, dict):
            raise ConfigError(name, "must be a table")
        self.data = dict(data)
        self.name = name

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
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            raise ConfigError(self.key(k), f"must be a number from {lo} to {hi}")
        if v < lo or v > hi or (lo_open and v == lo):
            rng = f"greater than {lo} and at most {hi}" if lo_open else f"from {lo} to {hi}"
            raise ConfigError(self.key(k), f"{v} is out of range; allowed {rng}")
        return float(v)

    def text(self, k: str, default: str | None = None, choices: tuple[str, ...] | None = None) -> str:
        v = self._take(k, default, default is None)
        if not isinstance(v, str) or not v.strip() or len(v) > 200:
            raise ConfigError(self.key(k), "must be a non-empty string of at most 200 characters")
        if choices and v not in choices:
            raise ConfigError(self.key(k), f"{v!r} not allowed; choose one of {', '.join(choices)}")
        return v

    def flag(self, k: str, default: bool) -> bool:
        v = self._take(k, default, False)
        if not isinstance(v, bool):
            raise ConfigError(self.key(k), "must be true or false")
        return v

    def done(self) -> None:
        if self.data:
            extra = sorted(self.data)[0]
            raise ConfigError(self.key(extra), "unknown key")


def _site(t: _Table) -> Site:
    tz = t.text("timezone")
    try:
        ZoneInfo(tz)
    except (ZoneInfoNotFoundError, ValueError):
        raise ConfigError("site.timezone", f"{tz!r} is not an IANA time zone name (e.g. America/Argentina/Salta)") from None
    s = Site(
        name=t.text("name"),
        latitude_deg=t.num("latitude_deg", -90, 90),
        longitude_deg=t.num("longitude_deg", -180, 180),
        elevation_m=t.num("elevation_m", -500, 9000),
        timezone=tz,
    )
    t.done()
    return s


def _telescope(t: _Table) -> Telescope:
    tel = Telescope(
        name=t.text("name"),
        aperture_m=t.num("aperture_m", 0, 1000, lo_open=True),
        min_altitude_deg=t.num("min_altitude_deg", 0, 89),
        max_altitude_deg=t.num("max_altitude_deg", 1, 90, 90.0),
        slew_rate_az_deg_s=t.num("slew_rate_az_deg_s", 0, 100, lo_open=True),
        slew_rate_alt_deg_s=t.num("slew_rate_alt_deg_s", 0, 100, lo_open=True),
        settle_s=t.num("settle_s", 0, 3600),
    )
    t.done()
    if tel.max_altitude_deg <= tel.min_altitude_deg:
        raise ConfigError("telescope.max_altitude_deg", f"must be above min_altitude_deg ({tel.min_altitude_deg})")
    return tel


def _band(t: _Table) -> Band:
    b = Band(
        name=t.text("name"),
        wavelength_um=t.num("wavelength_um", 0.1, 1e7, lo_open=True),
        extinction_mag=t.num("extinction_mag", 0, 10, 0.0),
        tau_dry=t.num("tau_dry", 0, 20, 0.0),
        tau_per_mm_pwv=t.num("tau_per_mm_pwv", 0, 20, 0.0),
        twilight=t.text("twilight", "astronomical", tuple(TWILIGHT_SUN_ALT_DEG)),
        seeing_limited=t.flag("seeing_limited", True),
        dark_sky_mag=t.num("dark_sky_mag", -10, 30, required=False),
        moon_color_mag=t.num("moon_color_mag", -10, 10, required=False),
        source=t.text("source", "-"),
    )
    t.done()
    if len(b.name) > 16 or not b.name.replace("_", "").replace("-", "").isalnum():
        raise ConfigError(f"{t.name}.name", "band names are 1-16 letters, digits, '-' or '_'")
    return b


def _instrument(t: _Table, bands: dict[str, Band]) -> Instrument:
    raw_bands = t._take("bands", None, True)
    if not isinstance(raw_bands, list) or not raw_bands or not all(isinstance(b, str) for b in raw_bands):
        raise ConfigError(t.key("bands"), "must be a non-empty list of band names")
    for b in raw_bands:
        if b not in bands:
            raise ConfigError(t.key("bands"), f"unknown band {b!r}; defined bands: {' '.join(bands)}")
    inst = Instrument(
        name=t.text("name"),
        bands=tuple(raw_bands),
        setup_s=t.num("setup_s", 0, 7200),
        filter_change_s=t.num("filter_change_s", 0, 3600, 0.0),
        instrument_change_s=t.num("instrument_change_s", 0, 7200, 0.0),
        fwhm_arcsec=t.num("fwhm_arcsec", 0, 1e5, 0.0),
        ao_seeing_limit_arcsec=t.num("ao_seeing_limit_arcsec", 0, 10, required=False, lo_open=True),
        ao_min_wavelength_um=t.num("ao_min_wavelength_um", 0.1, 1e7, 1.0),
    )
    t.done()
    return inst


def parse_config(data: dict[str, Any], path: str | None = None) -> ObservatoryConfig:
    """Validate a parsed TOML document into an ObservatoryConfig."""
    root = _Table(data, "")
    site = _site(_Table(root._take("site", None, True), "site"))
    telescope = _telescope(_Table(root._take("telescope", None, True), "telescope"))

    raw_bands = root._take("band", None, True)
    if not isinstance(raw_bands, list) or not raw_bands:
        raise ConfigError("band", "at least one [[band]] table is required")
    bands: dict[str, Band] = {}
    for i, rb in enumerate(raw_bands):
        b = _band(_Table(rb, f"band[{i}]"))
        if b.name in bands:
            raise ConfigError(f"band[{i}].name", f"duplicate band {b.name!r}")
        bands[b.name] = b

    raw_inst = root._take("instrument", None, True)
    if not isinstance(raw_inst, list) or not raw_inst:
        raise ConfigError("instrument", "at least one [[instrument]] table is required")
    instruments = []
    for i, ri in enumerate(raw_inst):
        inst = _instrument(_Table(ri, f"instrument[{i}]"), bands)
        if any(x.name == inst.name for x in instruments):
            raise ConfigError(f"instrument[{i}].name", f"duplicate instrument {inst.name!r}")
        instruments.append(inst)
    orphan = [b for b in bands if not any(b in inst.bands for inst in instruments)]
    if orphan:
        raise ConfigError("band", f"band {orphan[0]!r} is offered by no instrument")

    st = _Table(root._take("safety", None, True), "safety")
    safety = Safety(
        sun_avoidance_deg=st.num("sun_avoidance_deg", 0, 180),
        max_wind_ms=st.num("max_wind_ms", 0, 200, lo_open=True),
        max_humidity_pct=st.num("max_humidity_pct", 0, 100, lo_open=True),
    )
    st.done()

    dt = _Table(root._take("defaults", None, True), "defaults")
    defaults = ConditionDefaults(
        seeing_arcsec=dt.num("seeing_arcsec", 0, 20, lo_open=True),
        pwv_mm=dt.num("pwv_mm", 0, 100),
        cloud_mag=dt.num("cloud_mag", 0, 20),
        wind_ms=dt.num("wind_ms", 0, 200),
        humidity_pct=dt.num("humidity_pct", 0, 100),
        dome_open=dt.flag("dome_open", True),
    )
    dt.done()

    pt = _Table(root._take("planning", {}, False), "planning")
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
    )
    pt.done()
    climatology = _climatology(root._take("climatology", None, False))
    root.done()
    return ObservatoryConfig(site, telescope, bands, tuple(instruments), safety, defaults, planning, path,
                             climatology)


def _climatology(raw: Any) -> ClimatologyRef | None:
    if raw is None:
        return None
    t = _Table(raw, "climatology")
    ref = ClimatologyRef(file=t.text("file"))
    t.done()
    return ref


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
        raise ConfigError("config", f"{p} is not valid TOML: {e}") from None
    return parse_config(data, str(p))


def starter_config_text() -> str:
    """The observatory.toml that `nightplan init` writes (an invented site)."""
    return (Path(__file__).resolve().parents[1] / "data" / "observatory.toml").read_text(encoding="utf-8")


def starter_config() -> ObservatoryConfig:
    return parse_config(tomllib.loads(starter_config_text()), "<starter>")
