"""Site weather statistics (the climatology file) and the weather model drawn from them.

The model is statistics, not a forecast: it draws weather histories that share the site's
monthly medians, spreads and fractions, with persistence from night to night and within a
night. docs/season.md gives every assumption and where each number comes from.

Climatology CSV: ``#`` lines are comments; a header, then one row per calendar month 1-12
(any order, each month once). Columns (all required, any order):

    month                  calendar month, 1-12
    seeing_median_arcsec   median 500 nm zenith seeing (log-normal), arcsec
    seeing_sigma_ln        spread of ln(seeing): standard deviation
    pwv_median_mm          median precipitable water vapour (log-normal), mm
    pwv_sigma_ln           spread of ln(PWV)
    lost_night_frac        fraction of nights lost to weather (dome closed all night)
    cloudy_frac            fraction of nights with cloud (not lost); lost + cloudy <= 1
    cloud_median_mag       median cloud extinction on a cloudy night (log-normal), mag
    cloud_sigma_ln         spread of ln(cloud extinction)
    wind_closure_frac      fraction of the night time, on nights not lost, with the wind over
                           the configured closure limit (safety.max_wind_ms)
    humidity_closure_frac  the same for humidity (safety.max_humidity_pct)

Seeing and PWV statistics are over all night-time values of the month (what a site monitor
records). Errors: one ``InputError`` naming the file, the row (the file's line number, the
header is line 1), the column and the allowed range.

The draws: every quantity q has a standard-normal latent x_q(night, t) = sqrt(s) N_q(night)
+ sqrt(1 - s) W_q(night, t), N an AR(1) from night to night, W an AR(1) on the plan grid
within the night, s the share of the variance that is the night's level. Seeing, PWV and
cloud are median * exp(sigma_ln * x): log-normal with the file's median and spread at every
time whatever the persistence. The night's state (clear, cloudy, lost) thresholds a further
night-to-night AR(1), so the file's fractions hold and bad nights come in spells. All draws
come from numpy Generators seeded from ``SeedSequence(seed, spawn_key=(realization, ...))``
with the night's date in the key: a night's draw does not depend on which process draws it
or which other nights are drawn with it.
"""

from __future__ import annotations

import csv
import io
import math
from dataclasses import dataclass, field
from datetime import date
from pathlib import Path
from statistics import NormalDist
from typing import Sequence

import numpy as np

from scheduler.conditions.ingest import LIMITS as SAMPLE_LIMITS, Sample
from scheduler.model.config import Safety
from scheduler.model.errors import InputError
from scheduler.model.timegrid import utc
from scheduler.textfile import read_text_file

MAX_BYTES = 100_000

# column -> (low, high, low is exclusive, unit). Upper limits are sanity bounds (common
# practice): they catch unit mistakes (PWV in micrometres, percentages for fractions).
LIMITS: dict[str, tuple[float, float, bool, str]] = {
    "seeing_median_arcsec": (0.0, 10.0, True, " arcsec"),
    "seeing_sigma_ln": (0.0, 2.0, False, ""),
    "pwv_median_mm": (0.0, 50.0, True, " mm"),
    "pwv_sigma_ln": (0.0, 2.0, False, ""),
    "lost_night_frac": (0.0, 1.0, False, ""),
    "cloudy_frac": (0.0, 1.0, False, ""),
    "cloud_median_mag": (0.0, 10.0, True, " mag"),
    "cloud_sigma_ln": (0.0, 2.0, False, ""),
    "wind_closure_frac": (0.0, 1.0, False, ""),
    "humidity_closure_frac": (0.0, 1.0, False, ""),
}
COLUMNS = ("month",) + tuple(LIMITS)


@dataclass(frozen=True)
class Climatology:
    """The file's table: each field an array [12], index 0 = January."""

    seeing_median_arcsec: np.ndarray
    seeing_sigma_ln: np.ndarray
    pwv_median_mm: np.ndarray
    pwv_sigma_ln: np.ndarray
    lost_night_frac: np.ndarray
    cloudy_frac: np.ndarray
    cloud_median_mag: np.ndarray
    cloud_sigma_ln: np.ndarray
    wind_closure_frac: np.ndarray
    humidity_closure_frac: np.ndarray
    source: str = "climatology"


# --------------------------------------------------------------------------- the file

def read_climatology_file(path: str | Path) -> Climatology:
    """Size-checked, UTF-8, parsed and validated. The CLI edge's entry point."""
    p = Path(path)
    return parse_climatology(read_text_file(p, MAX_BYTES), source_name=p.name)


def parse_climatology(text: str, source_name: str = "climatology") -> Climatology:
    src = source_name
    rows = [(n, cells) for n, cells in _csv_rows(text, src) if not cells[0].lstrip().startswith("#")]
    if not rows:
        raise InputError("file", "is empty; expected a header line and 12 monthly rows", source=src)
    names = _header(rows[0][1], rows[0][0], src)
    seen: dict[int, int] = {}
    table = {c: np.full(12, np.nan) for c in LIMITS}
    for line, cells in rows[1:]:
        if len(cells) != len(names):
            raise InputError("columns", f"has {len(cells)} values; the header has {len(names)} columns",
                             row=line, source=src)
        raw = dict(zip(names, cells))
        m = _month(raw["month"], line, src)
        if m in seen:
            raise InputError("month", f"{m} repeats row {seen[m]}; allowed each month 1 to 12 once", row=line, source=src)
        seen[m] = line
        for c in LIMITS:
            table[c][m - 1] = _value(c, raw[c], line, src)
        _check_sum(table["lost_night_frac"][m - 1], table["cloudy_frac"][m - 1], line, src)
    missing = [m for m in range(1, 13) if m not in seen]
    if missing:
        raise InputError("month", f"{missing[0]} is missing; allowed one row for each month 1 to 12", source=src)
    return Climatology(**table, source=src)


def _csv_rows(text: str, src: str):
    text = text.lstrip("\ufeff")
    reader = csv.reader(io.StringIO(text, newline=""))
    try:
        for cells in reader:
            if cells and any(c.strip() for c in cells):
                yield reader.line_num, cells
    except csv.Error as e:
        raise InputError("row", f"not valid CSV: {e}", row=reader.line_num, source=src) from None


def _header(cells: list[str], line: int, src: str) -> list[str]:
    names = [c.strip() for c in cells]
    for n in names:
        if n not in COLUMNS:
            raise InputError(n or "header", f"unknown column; allowed: {','.join(COLUMNS)}", row=line, source=src)
    for n in names:
        if names.count(n) > 1:
            raise InputError(n, "column appears twice", row=line, source=src)
    for c in COLUMNS:
        if c not in names:
            raise InputError(c, f"column is required; the columns are: {','.join(COLUMNS)}", row=line, source=src)
    return names


def _month(v: str, line: int, src: str) -> int:
    try:
        m = int(v.strip())
    except ValueError:
        m = 0
    if not 1 <= m <= 12:
        raise InputError("month", f"{v.strip()!r} is out of range; allowed whole numbers from 1 to 12",
                         row=line, source=src)
    return m


def _range_text(c: str) -> str:
    lo, hi, lo_open, unit = LIMITS[c]
    return f"greater than {lo:g} and at most {hi:g}{unit}" if lo_open else f"from {lo:g} to {hi:g}{unit}"


def _value(c: str, v: str, line: int, src: str) -> float:
    lo, hi, lo_open, _ = LIMITS[c]
    try:
        x = float(v.strip())
    except ValueError:
        raise InputError(c, f"{v.strip()!r} is not a number; allowed {_range_text(c)}", row=line, source=src) from None
    if not math.isfinite(x) or x < lo or x > hi or (lo_open and x == lo):
        raise InputError(c, f"{v.strip()} is out of range; allowed {_range_text(c)}", row=line, source=src)
    return x


def _check_sum(lost: float, cloudy: float, line: int, src: str) -> None:
    if lost + cloudy > 1.0 + 1e-9:
        raise InputError("cloudy_frac", f"{cloudy:g} is out of range; allowed from 0 to {1.0 - lost:g} "
                         "(lost_night_frac + cloudy_frac at most 1)", row=line, source=src)


# --------------------------------------------------------------------------- the model's constants

@dataclass(frozen=True)
class Persistence:
    """How a quantity's latent varies: its night's level and its course within the night."""

    nightly_share: float  # share of the latent's variance that is the night's level
    length_nights: float  # night-to-night AR(1): correlation exp(-lag / length_nights)
    time_h: float  # within-night AR(1): correlation exp(-dt / time_h)

    @property
    def phi_night(self) -> float:
        return math.exp(-1.0 / self.length_nights)

    def phi_step(self, step_s: float) -> float:
        return math.exp(-step_s / (3600.0 * self.time_h))


@dataclass(frozen=True)
class ForecastError:
    """The forecast's miss: ln units for seeing, PWV and cloud; latent units for wind and humidity."""

    level: float  # standard deviation of the part constant over the night
    detail: float  # standard deviation of the part varying on the quantity's own time scale


QUANTITIES = ("seeing", "pwv", "cloud", "wind", "humidity")
CLEAR, CLOUDY, LOST = 0, 1, 2
STATE_NAMES = ("clear", "cloudy", "lost")


@dataclass(frozen=True)
class WeatherModel:
    """Every constant of the model. Values and reasons: docs/season.md (common practice)."""

    seeing: Persistence = Persistence(0.5, 1.5, 1.0)
    pwv: Persistence = Persistence(0.85, 3.0, 4.0)
    cloud: Persistence = Persistence(0.5, 1.0, 1.0)
    wind: Persistence = Persistence(0.6, 1.5, 1.5)
    humidity: Persistence = Persistence(0.7, 2.0, 2.0)
    bad_weather_length_nights: float = 2.0  # persistence of the clear / cloudy / lost state
    errors: dict[str, ForecastError] = field(default_factory=lambda: {
        "seeing": ForecastError(0.20, 0.20), "pwv": ForecastError(0.15, 0.10),
        "cloud": ForecastError(0.40, 0.40), "wind": ForecastError(0.40, 0.40),
        "humidity": ForecastError(0.40, 0.40)})
    state_hit: float = 0.85  # probability the forecast names the night's state right
    forecast_step_s: float = 1800.0  # a forecast is issued as half-hourly samples
    wind_slope_ln: float = 0.3  # ln(wind) per unit of latent
    humidity_slope_pct: float = 12.0  # humidity % per unit of latent
    min_closure_frac: float = 1e-6  # closure odds are clamped to [min, 1 - min] (finite thresholds)

    def persistence(self, q: str) -> Persistence:
        return getattr(self, q)


DEFAULT_MODEL = WeatherModel()


# --------------------------------------------------------------------------- seeding and AR(1)

def realization_seed(seed: int, realization: int) -> np.random.SeedSequence:
    """The realization's own seed: the same as SeedSequence(seed).spawn(n)[realization], for any n."""
    return np.random.SeedSequence(seed, spawn_key=(realization,))


def _child(seq: np.random.SeedSequence, *keys: int) -> np.random.SeedSequence:
    return np.random.SeedSequence(seq.entropy, spawn_key=tuple(seq.spawn_key) + tuple(int(k) for k in keys))


def ar1(innovations: np.ndarray, phi: float) -> np.ndarray:
    """Unit-variance AR(1) along the last axis, started from its stationary law.

    x[0] = e[0]; x[k] = phi x[k-1] + sqrt(1 - phi^2) e[k]. Vectorised as scaled cumulative
    sums in chunks short enough that phi^-k stays under 1e6 (rounding grows at most that much);
    the only Python loop is over chunks.
    """
    e = np.asarray(innovations, dtype=np.float64)
    if not 0.0 <= phi < 1.0:
        raise ValueError("phi must be in [0, 1)")
    n = e.shape[-1]
    if phi == 0.0 or n == 0:
        return e.copy()
    c = math.sqrt(1.0 - phi * phi)
    chunk = max(1, int(math.log(1e6) / -math.log(phi)))
    out = np.empty_like(e)
    prev = None
    for s in range(0, n, chunk):
        blk = e[..., s:s + chunk] * c
        if s == 0:
            blk[..., 0] = e[..., 0]
        j = np.arange(blk.shape[-1], dtype=np.float64)
        x = np.cumsum(blk * phi ** -j, axis=-1) * phi ** j
        if prev is not None:
            x += prev[..., None] * phi ** (j + 1)
        out[..., s:s + chunk] = x
        prev = x[..., -1]
    return out


def _upper_z(p: np.ndarray) -> np.ndarray:
    """z with P(N(0,1) > z) = p; +inf for p = 0, -inf for p = 1."""
    nd = NormalDist()
    return np.array([math.inf if q <= 0 else -math.inf if q >= 1 else nd.inv_cdf(1.0 - q)
                     for q in np.asarray(p, dtype=np.float64).ravel()]).reshape(np.shape(p))


# --------------------------------------------------------------------------- night to night

@dataclass(frozen=True)
class SeasonDraw:
    """One realization's night-to-night part: states and the nights' levels."""

    dates: tuple[date, ...]
    month_index: np.ndarray  # [n] 0 = January
    state: np.ndarray  # [n] CLEAR / CLOUDY / LOST
    forecast_state: np.ndarray  # [n] the state the forecast named
    level: np.ndarray  # [len(QUANTITIES), n] unit-variance nightly latents N_q

    def index(self, night: date) -> int:
        return self.dates.index(night)


def draw_season(clim: Climatology, dates: Sequence[date], seq: np.random.SeedSequence,
                model: WeatherModel = DEFAULT_MODEL) -> SeasonDraw:
    """The nights' states and levels for consecutive ``dates`` (one realization)."""
    dates = tuple(dates)
    n = len(dates)
    rng = np.random.default_rng(_child(seq, 0))
    e = rng.standard_normal((len(QUANTITIES) + 1, n))
    u = rng.random(n)
    phis = [model.persistence(q).phi_night for q in QUANTITIES] + [math.exp(-1.0 / model.bad_weather_length_nights)]
    latent = np.stack([ar1(e[k], phis[k]) for k in range(len(phis))]) if n else e
    m = np.array([d.month - 1 for d in dates], dtype=np.int64)
    lost_f, cloudy_f = clim.lost_night_frac[m], clim.cloudy_frac[m]
    bad = latent[-1]
    state = np.where(bad > _upper_z(lost_f), LOST,
                     np.where(bad > _upper_z(np.minimum(lost_f + cloudy_f, 1.0)), CLOUDY, CLEAR)).astype(np.int8)
    freq = np.stack([1.0 - lost_f - cloudy_f, cloudy_f, lost_f], axis=-1).clip(0.0, 1.0)
    return SeasonDraw(dates, m, state, _forecast_state(state, freq, u, model.state_hit), latent[:-1])


def _forecast_state(state: np.ndarray, freq: np.ndarray, u: np.ndarray, hit: float) -> np.ndarray:
    """Right with probability ``hit``; otherwise one of the other states by their frequency."""
    n = state.shape[0]
    other = freq.copy()
    other[np.arange(n), state] = 0.0
    total = other.sum(axis=-1)
    miss = (u >= hit) & (total > 0)
    # reuse the miss's own uniform, rescaled to [0, 1), to pick among the other states
    v = np.where(miss, (u - hit) / max(1.0 - hit, 1e-12), 0.0)
    cum = np.cumsum(other, axis=-1) / np.where(total > 0, total, 1.0)[:, None]
    pick = np.minimum((v[:, None] >= cum).sum(axis=-1), 2)
    pick = np.where(other[np.arange(n), pick] > 0, pick, np.argmax(other, axis=-1))
    return np.where(miss, pick, state).astype(np.int8)


# --------------------------------------------------------------------------- within the night

@dataclass(frozen=True)
class WeatherSeries:
    """Conditions at a set of times, in the planner's sample shape (see ``samples``)."""

    times_unix: np.ndarray  # [n]
    seeing_arcsec: np.ndarray
    pwv_mm: np.ndarray
    cloud_mag: np.ndarray
    wind_ms: np.ndarray
    humidity_pct: np.ndarray
    dome_open: np.ndarray  # bool

    def samples(self) -> tuple[Sample, ...]:
        """As conditions samples: feed them to conditions_on_grid like any report."""
        cols = zip(self.times_unix.tolist(), self.seeing_arcsec.tolist(), self.pwv_mm.tolist(),
                   self.cloud_mag.tolist(), self.wind_ms.tolist(), self.humidity_pct.tolist(), self.dome_open.tolist())
        return tuple(Sample(utc(t), s, p, c, w, h, bool(d))
                     for t, s, p, c, w, h, d in cols)


@dataclass(frozen=True)
class NightDraw:
    date: date
    state: int  # CLEAR / CLOUDY / LOST: the weather that came
    forecast_state: int
    actual: WeatherSeries  # on the plan grid
    forecast: WeatherSeries  # on the forecast's own times (every forecast_step_s, and the grid's last time)


def draw_night(clim: Climatology, season: SeasonDraw, i: int, times_unix: np.ndarray, safety: Safety,
               seq: np.random.SeedSequence, model: WeatherModel = DEFAULT_MODEL) -> NightDraw:
    """Night ``i`` of ``season`` on the plan grid ``times_unix`` (regular, unix seconds)."""
    t = np.asarray(times_unix, dtype=np.float64)
    n_t = t.shape[0]
    step = float(t[1] - t[0]) if n_t > 1 else 60.0
    key = season.dates[i].toordinal()
    w = np.random.default_rng(_child(seq, 1, key)).standard_normal((len(QUANTITIES), n_t))
    frng = np.random.default_rng(_child(seq, 2, key))
    lev, det = frng.standard_normal(len(QUANTITIES)), frng.standard_normal((len(QUANTITIES), n_t))

    x = np.empty((len(QUANTITIES), n_t))
    err = np.empty((len(QUANTITIES), n_t))
    for k, q in enumerate(QUANTITIES):  # five quantities; time is vectorised
        p = model.persistence(q)
        phi = p.phi_step(step)
        x[k] = math.sqrt(p.nightly_share) * season.level[k, i] + math.sqrt(1.0 - p.nightly_share) * ar1(w[k], phi)
        fe = model.errors[q]
        err[k] = fe.level * lev[k] + fe.detail * ar1(det[k], phi)

    m = int(season.month_index[i])
    state, fstate = int(season.state[i]), int(season.forecast_state[i])
    actual = _series(t, clim, m, x, np.zeros_like(x), state, safety, model)
    idx = _forecast_index(n_t, step, model.forecast_step_s)
    forecast = _series(t[idx], clim, m, x[:, idx], err[:, idx], fstate, safety, model)
    return NightDraw(season.dates[i], state, fstate, actual, forecast)


def _forecast_index(n_t: int, step_s: float, forecast_step_s: float) -> np.ndarray:
    if n_t == 0:
        return np.zeros(0, dtype=np.int64)
    k = max(1, int(round(forecast_step_s / step_s)))
    return np.unique(np.r_[np.arange(0, n_t, k), n_t - 1])


def _series(t: np.ndarray, clim: Climatology, m: int, x: np.ndarray, off: np.ndarray, state: int,
            safety: Safety, model: WeatherModel) -> WeatherSeries:
    """Values from latents ``x`` (+ offsets: ln units for seeing/PWV/cloud, latent for wind/humidity)."""
    def lognormal(median: np.ndarray, sigma: np.ndarray, k: int, cap: str) -> np.ndarray:
        return np.minimum(median[m] * np.exp(sigma[m] * x[k] + off[k]), SAMPLE_LIMITS[cap][1])

    lo, hi = model.min_closure_frac, 1.0 - model.min_closure_frac
    z_wind = _upper_z(np.clip(clim.wind_closure_frac[m], lo, hi))
    z_hum = _upper_z(np.clip(clim.humidity_closure_frac[m], lo, hi))
    cloud = lognormal(clim.cloud_median_mag, clim.cloud_sigma_ln, 2, "cloud_mag")
    return WeatherSeries(
        times_unix=t,
        seeing_arcsec=lognormal(clim.seeing_median_arcsec, clim.seeing_sigma_ln, 0, "seeing_arcsec"),
        pwv_mm=lognormal(clim.pwv_median_mm, clim.pwv_sigma_ln, 1, "pwv_mm"),
        cloud_mag=cloud if state == CLOUDY else np.zeros_like(cloud),
        wind_ms=np.minimum(safety.max_wind_ms * np.exp(model.wind_slope_ln * (x[3] + off[3] - z_wind)),
                           SAMPLE_LIMITS["wind_ms"][1]),
        humidity_pct=np.clip(safety.max_humidity_pct + model.humidity_slope_pct * (x[4] + off[4] - z_hum), 0.0, 100.0),
        dome_open=np.full(t.shape[0], state != LOST),
    )
