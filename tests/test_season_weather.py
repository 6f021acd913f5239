"""The season weather model: the climatology file, its statistics reproduced, persistence, seeding.

Statistical tolerances. Every estimate here pools R independent realizations (seeded, so each
test is deterministic; the tolerance says how far a correct model may land). The tolerance is
4 standard errors (a correct model lands outside with probability ~6e-5 under a normal
approximation). Standard errors are bounded with Gebelein's theorem (the maximal correlation
of a bivariate normal pair is |rho|; Gebelein 1941, Lancaster 1957, from memory): any function
of the latent (an indicator of "lost", of "wind over the limit", of "below the median") has
pairwise correlations at most the latent's, so the variance of its mean is at most
Var(f) x Var(mean of the latent). The latent's mean variance follows from the AR(1) sums.
The sample median's error is then ~ SE(empirical CDF at the median) / density at the median
(Bahadur's representation): sqrt(pi/2) x SE of the latent's mean, in latent units.
"""

from __future__ import annotations

import math
import re
import tomllib
from datetime import date, datetime, timezone
from pathlib import Path

import numpy as np
import pytest

from scheduler.conditions.grid import conditions_on_grid
from scheduler.model.config import parse_config, starter_config, starter_config_text
from scheduler.model.errors import ConfigError, InputError
from scheduler.season.weather import (
    CLEAR, CLOUDY, COLUMNS, DEFAULT_MODEL, LOST, QUANTITIES, ar1, draw_night, draw_season, parse_climatology,
    read_climatology_file, realization_seed,
)

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "scheduler" / "data" / "demo_queue" / "climatology.csv"
SAFETY = starter_config().safety
STEP_S = 120.0
N_STEPS = 300  # a 10-hour night at 2-minute steps (the statistics do not need 1-minute steps)
Z4 = 4.0  # tolerances are 4 standard errors


def ar1_mean_var(phi: float, n: int) -> float:
    """Variance of the mean of n consecutive values of a unit-variance AR(1) with lag-1 correlation phi."""
    if n <= 0:
        return math.inf
    if phi == 0:
        return 1.0 / n
    return ((1 + phi) / (1 - phi) - 2 * phi * (1 - phi ** n) / (n * (1 - phi) ** 2)) / n


def latent_mean_var(q: str, nights: int, steps: int) -> float:
    """One realization: the variance of the mean of latent x = sqrt(s) N + sqrt(1 - s) W over its times."""
    p = DEFAULT_MODEL.persistence(q)
    return (p.nightly_share * ar1_mean_var(p.phi_night, nights)
            + (1 - p.nightly_share) * ar1_mean_var(p.phi_step(STEP_S), steps) / nights)


def grid(d: date) -> np.ndarray:
    return datetime(d.year, d.month, d.day, 23, tzinfo=timezone.utc).timestamp() + np.arange(N_STEPS) * STEP_S


def month_dates(year: int, month: int) -> list[date]:
    days = (date(year + month // 12, month % 12 + 1, 1) - date(year, month, 1)).days
    return [date(year, month, d) for d in range(1, days + 1)]


@pytest.fixture(scope="module")
def clim():
    return read_climatology_file(DEMO)


@pytest.fixture(scope="module")
def february(clim):
    """200 realizations of February 2027 at the demo site: seasons and every night's draw."""
    dates = month_dates(2027, 2)
    seasons, nights = [], []
    for r in range(200):
        seq = realization_seed(2027, r)
        s = draw_season(clim, dates, seq)
        seasons.append(s)
        nights.append([draw_night(clim, s, i, grid(d), SAFETY, seq) for i, d in enumerate(dates)])
    return dates, seasons, nights


def stack(nights, what: str, field: str) -> np.ndarray:
    return np.array([[getattr(getattr(n, what), field) for n in real] for real in nights])


# --------------------------------------------------------------------------- the file

def test_demo_climatology_reads_every_month(clim):
    assert clim.seeing_median_arcsec.shape == (12,)
    assert clim.seeing_median_arcsec[6] == pytest.approx(0.92)  # July, from the file
    assert clim.lost_night_frac[1] == pytest.approx(0.22)  # February
    assert np.all(clim.lost_night_frac + clim.cloudy_frac <= 1)
    assert clim.source == "climatology.csv"


def _demo_lines() -> list[str]:
    return [ln for ln in DEMO.read_text(encoding="utf-8").splitlines() if not ln.startswith("#")]


def _with(lines: list[str]) -> str:
    return "\n".join(lines) + "\n"


def _set(lines: list[str], month: int, column: str, value: str) -> list[str]:
    header = lines[0].split(",")
    out = list(lines)
    for k, ln in enumerate(out[1:], start=1):
        cells = ln.split(",")
        if cells[0] == str(month):
            cells[header.index(column)] = value
            out[k] = ",".join(cells)
    return out


def _bad_cases():
    lines = _demo_lines()
    yield "unknown column", _with([lines[0].replace("pwv_median_mm", "pwv_mm")] + lines[1:]), \
        r"^clim\.csv: row 1: pwv_mm: unknown column; allowed: month,"
    yield "missing column", _with([",".join(c.split(",")[:-1]) for c in lines]), \
        r"^clim\.csv: row 1: humidity_closure_frac: column is required"
    yield "month missing", _with([ln for ln in lines if not ln.startswith("7,")]), \
        r"^clim\.csv: month: 7 is missing; allowed one row for each month 1 to 12$"
    yield "month repeated", _with(lines + [lines[3]]), \
        r"^clim\.csv: row 14: month: 3 repeats row 4; allowed each month 1 to 12 once$"
    yield "month out of range", _with(lines[:1] + ["13" + lines[1][1:]] + lines[2:]), \
        r"^clim\.csv: row 2: month: '13' is out of range; allowed whole numbers from 1 to 12$"
    yield "median zero", _with(_set(lines, 5, "pwv_median_mm", "0")), \
        r"^clim\.csv: row 6: pwv_median_mm: 0 is out of range; allowed greater than 0 and at most 50 mm$"
    yield "fraction as percent", _with(_set(lines, 2, "lost_night_frac", "22")), \
        r"^clim\.csv: row 3: lost_night_frac: 22 is out of range; allowed from 0 to 1$"
    yield "not a number", _with(_set(lines, 8, "seeing_sigma_ln", "wide")), \
        r"^clim\.csv: row 9: seeing_sigma_ln: 'wide' is not a number; allowed from 0 to 2$"
    yield "lost and cloudy over 1", _with(_set(lines, 1, "cloudy_frac", "0.9")), \
        r"^clim\.csv: row 2: cloudy_frac: 0.9 is out of range; allowed from 0 to 0.82 "
    yield "ragged row", _with(lines[:5] + [lines[5] + ",1"] + lines[6:]), \
        r"^clim\.csv: row 6: columns: has 12 values; the header has 11 columns$"
    yield "empty", "# only a comment\n", r"^clim\.csv: file: is empty"


@pytest.mark.parametrize("name, text, pattern", list(_bad_cases()), ids=[c[0] for c in _bad_cases()])
def test_bad_climatology_files_are_refused_with_one_line(tmp_path, name, text, pattern):
    path = tmp_path / "clim.csv"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(InputError) as err:
        read_climatology_file(path)
    assert "\n" not in str(err.value)
    assert err.value.__class__ is InputError
    assert re.search(pattern, str(err.value)), str(err.value)


def test_columns_may_come_in_any_order(tmp_path):
    lines = [ln.split(",") for ln in _demo_lines()]
    order = list(reversed(range(len(COLUMNS))))
    text = _with([",".join(cells[k] for k in order) for cells in lines])
    a, b = parse_climatology(text), read_climatology_file(DEMO)
    for f in ("seeing_median_arcsec", "pwv_sigma_ln", "humidity_closure_frac"):
        assert np.array_equal(getattr(a, f), getattr(b, f))


def test_a_missing_file_is_named(tmp_path):
    with pytest.raises(InputError, match="not found"):
        read_climatology_file(tmp_path / "nope.csv")


# --------------------------------------------------------------------------- the config section

def test_starter_config_shows_the_climatology_section_commented():
    text = starter_config_text()
    assert "# [climatology]" in text
    assert starter_config().climatology is None
    data = tomllib.loads(text.replace("# [climatology]\n# file =", "[climatology]\nfile ="))
    cfg = parse_config(data, "/srv/site/observatory.toml")
    assert cfg.climatology_path() == Path("/srv/site/climatology.csv")


def test_climatology_path_is_relative_to_the_config_file(tmp_path):
    data = tomllib.loads(starter_config_text())
    data["climatology"] = {"file": "weather/site.csv"}
    cfg = parse_config(data, str(tmp_path / "observatory.toml"))
    assert cfg.climatology_path() == tmp_path.resolve() / "weather" / "site.csv"
    data["climatology"] = {"file": "/abs/site.csv"}
    assert parse_config(data, str(tmp_path / "observatory.toml")).climatology_path() == Path("/abs/site.csv")


@pytest.mark.parametrize("table, pattern", [
    ({"file": "a.csv", "path": "b.csv"}, r"^climatology.path: unknown key; allowed: file$"),
    ({}, r"^climatology.file: is required$"),
    ({"file": ""}, r"^climatology.file: must be a non-empty string"),
    ({"file": 3}, r"^climatology.file: must be a non-empty string"),
])
def test_bad_climatology_section_is_named(table, pattern):
    data = tomllib.loads(starter_config_text())
    data["climatology"] = table
    with pytest.raises(ConfigError, match=pattern):
        parse_config(data)


# --------------------------------------------------------------------------- statistics reproduced

def test_sampled_nights_reproduce_the_medians(clim, february):
    dates, seasons, nights = february
    m, R, n = 1, len(nights), len(dates)
    for q, field, med, sig in (("seeing", "seeing_arcsec", clim.seeing_median_arcsec, clim.seeing_sigma_ln),
                               ("pwv", "pwv_mm", clim.pwv_median_mm, clim.pwv_sigma_ln)):
        values = stack(nights, "actual", field)
        got = float(np.median(values))
        se_ln = sig[m] * math.sqrt(math.pi / 2 * latent_mean_var(q, n, N_STEPS) / R)
        assert abs(math.log(got / med[m])) <= Z4 * se_ln, (q, got, med[m], Z4 * se_ln)
        # the spread: 16th-84th percentile half-width in ln is sigma_ln (looser: a ratio check)
        lo, hi = np.percentile(np.log(values), [15.87, 84.13])
        assert (hi - lo) / 2 == pytest.approx(sig[m], rel=0.1)


def test_sampled_nights_reproduce_the_cloud_median_on_cloudy_nights(clim, february):
    dates, seasons, nights = february
    state = np.array([[n.state for n in real] for real in nights])
    cloud = stack(nights, "actual", "cloud_mag")
    assert np.all(cloud[state != CLOUDY] == 0)
    got = float(np.median(cloud[state == CLOUDY]))
    per_real = max(1, int(np.sum(state == CLOUDY) / len(nights)))
    # cloudy nights are scattered; treating them as consecutive over-states their correlation (conservative)
    se_ln = clim.cloud_sigma_ln[1] * math.sqrt(math.pi / 2 * latent_mean_var("cloud", per_real, N_STEPS) / len(nights))
    assert abs(math.log(got / clim.cloud_median_mag[1])) <= Z4 * se_ln, (got, Z4 * se_ln)


def test_sampled_nights_reproduce_the_closure_odds(clim, february):
    dates, seasons, nights = february
    state = np.array([[n.state for n in real] for real in nights])
    is_open = state != LOST
    R, n_open = len(nights), int(len(dates) * (1 - clim.lost_night_frac[1]))
    for q, field, limit, frac in (("wind", "wind_ms", SAFETY.max_wind_ms, clim.wind_closure_frac),
                                  ("humidity", "humidity_pct", SAFETY.max_humidity_pct, clim.humidity_closure_frac)):
        over = stack(nights, "actual", field)[is_open] > limit
        p = frac[1]
        se = math.sqrt(p * (1 - p) * latent_mean_var(q, n_open, N_STEPS) / R)
        assert abs(over.mean() - p) <= Z4 * se, (q, over.mean(), p, Z4 * se)


def test_sampled_seasons_reproduce_the_night_fractions(clim):
    dates = month_dates(2027, 2)
    R = 4000
    states = np.array([draw_season(clim, dates, realization_seed(11, r)).state for r in range(R)])
    phi = math.exp(-1 / DEFAULT_MODEL.bad_weather_length_nights)
    for code, p in ((LOST, clim.lost_night_frac[1]), (CLOUDY, clim.cloudy_frac[1]),
                    (CLEAR, 1 - clim.lost_night_frac[1] - clim.cloudy_frac[1])):
        se = math.sqrt(p * (1 - p) * ar1_mean_var(phi, len(dates)) / R)
        got = float(np.mean(states == code))
        assert abs(got - p) <= Z4 * se, (code, got, p, Z4 * se)


def test_lost_nights_come_in_spells(clim):
    """P(lost | lost the night before) is well above the lost fraction (persistence), as documented."""
    dates = month_dates(2027, 2)
    states = np.array([draw_season(clim, dates, realization_seed(12, r)).state for r in range(2000)])
    lost = states == LOST
    after_lost = lost[:, 1:][lost[:, :-1]]
    assert after_lost.mean() > 2 * clim.lost_night_frac[1]


def test_month_boundaries_switch_the_statistics():
    lines = _demo_lines()
    lines = _set(_set(lines, 3, "lost_night_frac", "1"), 3, "cloudy_frac", "0")
    lines = _set(lines, 4, "lost_night_frac", "0")
    c = parse_climatology(_with(lines))
    dates = month_dates(2027, 3) + month_dates(2027, 4)
    s = draw_season(c, dates, realization_seed(3, 0))
    march = np.array([d.month == 3 for d in dates])
    assert np.all(s.state[march] == LOST)
    assert not np.any(s.state[~march] == LOST)


# --------------------------------------------------------------------------- persistence

def test_nightly_levels_have_the_documented_lag1_correlation(clim):
    """Bartlett (1946): the lag-1 autocorrelation of an AR(1) has variance ~ (1 - phi^2) / N pairs."""
    dates = month_dates(2027, 7)
    R = 2000
    levels = np.array([draw_season(clim, dates, realization_seed(5, r)).level for r in range(R)])  # [R, q, n]
    for k, q in enumerate(QUANTITIES):
        phi = DEFAULT_MODEL.persistence(q).phi_night
        x = levels[:, k, :]
        r1 = float(np.sum(x[:, :-1] * x[:, 1:]) / np.sum(x[:, :-1] ** 2))
        se = math.sqrt((1 - phi ** 2) / x[:, 1:].size)
        assert abs(r1 - phi) <= Z4 * se, (q, r1, phi, Z4 * se)
    assert DEFAULT_MODEL.seeing.phi_night == pytest.approx(math.exp(-1 / 1.5))  # docs/season.md: 1.5 nights


def test_within_night_series_has_the_documented_correlation_time(clim, february):
    """The within-night part of ln(seeing), recovered exactly, correlates exp(-1) at one correlation time."""
    dates, seasons, nights = february
    p = DEFAULT_MODEL.seeing
    lag = int(round(p.time_h * 3600 / STEP_S))
    ln_s = np.log(stack(nights, "actual", "seeing_arcsec"))  # [R, n, t]
    x = (ln_s - math.log(clim.seeing_median_arcsec[1])) / clim.seeing_sigma_ln[1]
    level = np.array([s.level[0] for s in seasons])[:, :, None]
    w = (x - math.sqrt(p.nightly_share) * level) / math.sqrt(1 - p.nightly_share)
    r = float(np.sum(w[..., :-lag] * w[..., lag:]) / np.sum(w[..., :-lag] ** 2))
    psi = p.phi_step(STEP_S)
    # Bartlett's lag-k variance for one AR(1) series of m points, pooled over independent nights
    m, nights_n = N_STEPS, w.shape[0] * w.shape[1]
    var = ((1 + psi ** 2) * (1 + psi ** (2 * lag)) / (1 - psi ** 2) - 2 * lag * psi ** (2 * lag)) / m / nights_n
    assert abs(r - math.exp(-1)) <= Z4 * math.sqrt(var), (r, math.sqrt(var))


def test_ar1_matches_its_recursion():
    rng = np.random.default_rng(0)
    e = rng.standard_normal((2, 3000))
    for phi in (0.0, 0.2, 0.6065, 0.9834, 0.99999):
        ref = np.empty_like(e)
        ref[:, 0] = e[:, 0]
        c = math.sqrt(1 - phi * phi)
        for k in range(1, e.shape[1]):
            ref[:, k] = phi * ref[:, k - 1] + c * e[:, k]
        assert np.allclose(ar1(e, phi), ref, rtol=0, atol=1e-9)
    with pytest.raises(ValueError):
        ar1(e, 1.0)


# --------------------------------------------------------------------------- seeding

def _draw(clim, seed: int, order):
    dates = month_dates(2027, 2)[:6]
    seq = realization_seed(seed, 3)
    s = draw_season(clim, dates, seq)
    return s, {i: draw_night(clim, s, i, grid(dates[i]), SAFETY, seq) for i in order}


def test_same_seed_same_draws_whatever_the_order(clim):
    s1, n1 = _draw(clim, 99, range(6))
    s2, n2 = _draw(clim, 99, reversed(range(6)))
    assert np.array_equal(s1.state, s2.state) and np.array_equal(s1.level, s2.level)
    for i in range(6):
        for f in ("seeing_arcsec", "pwv_mm", "cloud_mag", "wind_ms", "humidity_pct", "dome_open"):
            assert np.array_equal(getattr(n1[i].actual, f), getattr(n2[i].actual, f))
            assert np.array_equal(getattr(n1[i].forecast, f), getattr(n2[i].forecast, f))
    _, n3 = _draw(clim, 100, range(6))
    assert not np.array_equal(n1[0].actual.seeing_arcsec, n3[0].actual.seeing_arcsec)


def test_realization_seed_is_the_spawned_child():
    children = np.random.SeedSequence(42).spawn(5)
    for r in (0, 4):
        assert np.array_equal(realization_seed(42, r).generate_state(4), children[r].generate_state(4))


# --------------------------------------------------------------------------- samples and the forecast

def test_samples_feed_the_planners_grid_unchanged(clim, february):
    dates, seasons, nights = february
    cfg = starter_config()
    for night in (nights[0][0], next(n for real in nights for n in real if n.state == LOST)):
        t = night.actual.times_unix
        cond = conditions_on_grid(night.actual.samples(), t, cfg.defaults)
        assert cond.covered.all()
        for f in ("seeing_arcsec", "pwv_mm", "cloud_mag", "wind_ms", "humidity_pct", "dome_open"):
            assert np.allclose(getattr(cond, f), getattr(night.actual, f), rtol=1e-12, atol=0)
        assert bool(cond.dome_open.any()) == (night.state != LOST)
        fc = conditions_on_grid(night.forecast.samples(), t, cfg.defaults)
        assert fc.covered.all()  # the forecast spans the whole grid (its last sample is the grid's last time)
        assert len(night.forecast.samples()) == math.ceil(N_STEPS * STEP_S / DEFAULT_MODEL.forecast_step_s) + 1


def test_forecast_error_has_the_documented_size(clim, february):
    dates, seasons, nights = february
    fe = DEFAULT_MODEL.errors["seeing"]
    idx = np.arange(0, N_STEPS, int(DEFAULT_MODEL.forecast_step_s / STEP_S))
    diffs = np.array([np.log(n.forecast.seeing_arcsec[:len(idx)] / n.actual.seeing_arcsec[idx])
                      for real in nights for n in real])  # [nights, forecast times]
    n_nights, m_f = diffs.shape
    var = float(np.mean(diffs ** 2))
    psi_f = DEFAULT_MODEL.seeing.phi_step(DEFAULT_MODEL.forecast_step_s)
    se = fe.level ** 2 * math.sqrt(2 / n_nights) \
        + fe.detail ** 2 * math.sqrt(2 * (1 + psi_f) / ((1 - psi_f) * n_nights * m_f))
    assert abs(var - (fe.level ** 2 + fe.detail ** 2)) <= Z4 * se, (var, Z4 * se)


def test_forecast_names_the_state_right_at_the_documented_rate(clim):
    dates = month_dates(2027, 2)
    seasons = [draw_season(clim, dates, realization_seed(8, r)) for r in range(4000)]
    state = np.concatenate([s.state for s in seasons])
    fstate = np.concatenate([s.forecast_state for s in seasons])
    hit = DEFAULT_MODEL.state_hit
    se = math.sqrt(hit * (1 - hit) / state.size)  # one independent uniform per night
    assert abs(np.mean(fstate == state) - hit) <= Z4 * se
    # a missed clear night is called lost or cloudy in proportion to their frequencies
    missed_clear = fstate[(state == CLEAR) & (fstate != state)]
    p = clim.lost_night_frac[1] / (clim.lost_night_frac[1] + clim.cloudy_frac[1])
    se = math.sqrt(p * (1 - p) / missed_clear.size)
    assert abs(np.mean(missed_clear == LOST) - p) <= Z4 * se
