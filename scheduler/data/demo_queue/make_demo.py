"""Write the invented demo scenario: programs, 150 requests, two forecasts for one night and a climatology.

Deterministic (fixed seed, no clock, no network): running it again rewrites identical files.
The invented comet's ephemeris table is computed from its invented orbit with nightplan's own
Keplerian code and astropy's built-in (offline) Earth ephemeris.
Everything here is invented: the programs, their PIs, the fields and the weather. The site is
the starter observatory.toml's fictional one; the night is the local evening of 2026-12-16
(a half Moon up for the first half of the night, then dark).

    python scheduler/data/demo_queue/make_demo.py   # rewrites the files beside this script
"""

from __future__ import annotations

import csv
import json
import math
import random
from datetime import datetime, timedelta, timezone
from pathlib import Path

HERE = Path(__file__).resolve().parent
SEED = 20261216
NIGHT = "2026-12-16"
# Sunset and sunrise at the fictional site that night are about 23:16 and 09:30 UTC; the
# forecasts cover a little more on each side.
FORECAST_START = datetime(2026, 12, 16, 22, 30, tzinfo=timezone.utc)
FORECAST_END = datetime(2026, 12, 17, 10, 0, tzinfo=timezone.utc)

PROGRAMS = [
    # code, PI (invented), allocated hours, weight
    ("GEV", "Dr. Ilse Varnholt", 40, 1.5),   # faint galaxy fields, optical, dark sky
    ("SFN", "Dr. Tomasz Quell", 35, 1.5),    # star-forming knots, near-infrared with AO
    ("MIR", "Dr. Amara Deleon", 25, 1.4),    # warm dust discs, mid-infrared, dry air
    ("TDS", "Dr. Kofi Arbenz", 20, 1.3),     # transient follow-up, short, urgent
    ("VSM", "Dr. Lucia Fenwright", 30, 1.2),  # variable stars, repeated visits
]

# The site's weather statistics per calendar month (invented, for `nightplan season simulate`).
# A dry southern high-desert site: summer brings humid air from the east (high PWV, cloud,
# some lost nights in January-February); winter brings fronts, wind and worse seeing.
CLIMATE_COLUMNS = [
    "month", "seeing_median_arcsec", "seeing_sigma_ln", "pwv_median_mm", "pwv_sigma_ln", "lost_night_frac",
    "cloudy_frac", "cloud_median_mag", "cloud_sigma_ln", "wind_closure_frac", "humidity_closure_frac",
]
CLIMATE = [
    (1, 0.78, 0.33, 4.2, 0.55, 0.18, 0.22, 0.35, 0.8, 0.02, 0.06),
    (2, 0.76, 0.33, 4.6, 0.55, 0.22, 0.24, 0.40, 0.8, 0.02, 0.08),
    (3, 0.74, 0.32, 3.1, 0.60, 0.10, 0.18, 0.30, 0.8, 0.02, 0.04),
    (4, 0.72, 0.32, 2.0, 0.60, 0.06, 0.12, 0.25, 0.8, 0.03, 0.02),
    (5, 0.80, 0.34, 1.5, 0.60, 0.08, 0.12, 0.25, 0.8, 0.05, 0.02),
    (6, 0.88, 0.35, 1.3, 0.60, 0.12, 0.14, 0.25, 0.8, 0.08, 0.02),
    (7, 0.92, 0.36, 1.2, 0.60, 0.14, 0.14, 0.25, 0.8, 0.09, 0.02),
    (8, 0.87, 0.35, 1.2, 0.60, 0.10, 0.12, 0.25, 0.8, 0.07, 0.01),
    (9, 0.80, 0.34, 1.4, 0.60, 0.06, 0.10, 0.25, 0.8, 0.05, 0.01),
    (10, 0.74, 0.33, 1.7, 0.55, 0.04, 0.08, 0.25, 0.8, 0.04, 0.01),
    (11, 0.72, 0.32, 2.2, 0.55, 0.05, 0.10, 0.25, 0.8, 0.03, 0.02),
    (12, 0.74, 0.32, 3.0, 0.55, 0.10, 0.16, 0.30, 0.8, 0.02, 0.04),
]

COLUMNS = [
    "program", "target", "ra", "dec", "band", "exposure_s", "resolution_arcsec", "max_seeing_arcsec",
    "max_pwv_mm", "max_airmass", "min_moon_sep_deg", "max_cloud_mag", "not_before", "not_after",
    "priority", "repeats", "min_spacing_s", "max_moon_illum", "period_epoch", "period_days",
    "phase_min", "phase_max", "too", "guide_star_sep_arcsec", "body", "ephemeris_file",
]

# An invented comet for the TDS program: an elliptic orbit made up for the demo (no real
# comet has it), perihelion 1.05 AU twelve days after the demo night, about 0.3 AU from the
# Earth that night, moving about 1 deg/day in RA and 2 deg/day in Dec. Its ephemeris table
# (geocentric astrometric ICRS, every 2 hours) is computed from the orbit with nightplan's
# own Keplerian code and the built-in Earth ephemeris, the way a PI's table would arrive.
COMET_FILE = "comet_tds_2026x1.csv"
COMET_ORBIT = dict(q_au=1.05, e=0.82, inc_deg=40.0, node_deg=240.0, peri_arg_deg=210.0)
COMET_PERIHELION = datetime(2026, 12, 29, 3, 0, tzinfo=timezone.utc)
COMET_TABLE_START = datetime(2026, 12, 15, 0, 0, tzinfo=timezone.utc)
COMET_TABLE_END = datetime(2026, 12, 19, 0, 0, tzinfo=timezone.utc)


def iso(t: datetime) -> str:
    return t.strftime("%Y-%m-%dT%H:%M:%SZ")


def _sexa(value: float) -> tuple[int, int, float]:
    tenths = round(value * 36000)  # whole tenths of a second first, so 59.96 s never prints as 60.0
    return tenths // 36000, tenths // 600 % 60, tenths % 600 / 10.0


def sexa_ra(deg: float) -> str:
    hh, mm, ss = _sexa(deg / 15.0)
    return f"{hh % 24:02d}:{mm:02d}:{ss:04.1f}"


def sexa_dec(deg: float) -> str:
    dd, mm, ss = _sexa(abs(deg))
    return f"{'-' if deg < 0 else '+'}{dd:02d}:{mm:02d}:{ss:04.1f}"


def field(rng: random.Random, dec_lo: float = -80.0, dec_hi: float = 25.0) -> tuple[float, float]:
    """A random field that is up some time that night: RA 22h..12h, uniform on the sphere in Dec."""
    ra = ((22.0 + rng.uniform(0.0, 14.0)) % 24.0) * 15.0
    s = rng.uniform(math.sin(math.radians(dec_lo)), math.sin(math.radians(dec_hi)))
    return round(ra, 4), round(math.degrees(math.asin(s)), 4)


def blank() -> dict:
    return {c: "" for c in COLUMNS}


def requests(rng: random.Random) -> list[dict]:
    rows: list[dict] = []

    def add(program: str, name: str, ra: float, dec: float, band: str, exposure: int, **kw) -> None:
        r = blank()
        r.update(program=program, target=name, band=band, exposure_s=exposure,
                 ra=sexa_ra(ra) if len(rows) % 2 else f"{ra:.4f}",  # both accepted forms
                 dec=sexa_dec(dec) if len(rows) % 2 else f"{dec:.4f}")
        for k, v in kw.items():
            r[k] = v
        rows.append(r)

    # GEV: deep optical fields; dark, good seeing, far from the Moon.
    for i in range(30):
        ra, dec = field(rng, -75, 15)
        add("GEV", f"GEV-F{i + 1:02d}", ra, dec, rng.choice("BVRI"), rng.choice([1200, 1800, 2400, 3600]),
            max_seeing_arcsec=rng.choice([0.8, 0.9, 1.0, 1.2]), max_airmass=rng.choice([1.5, 1.8, 2.0]),
            min_moon_sep_deg=rng.choice([40, 50, 60]), max_moon_illum=rng.choice(["", "", 0.6, 0.4]),
            max_cloud_mag=0.2, priority=rng.randint(3, 8))
    # SFN: near-infrared knots; some need AO-class resolution, all want moderate water.
    for i in range(35):
        ra, dec = field(rng, -80, 20)
        band = rng.choice("JHK")
        kw = dict(max_pwv_mm=rng.choice([4, 6, 8]), max_airmass=rng.choice([1.6, 1.8, 2.2]),
                  priority=rng.randint(4, 9))
        if i % 3 == 0:
            kw["resolution_arcsec"] = {"J": 0.25, "H": 0.3, "K": 0.3}[band]
        else:
            kw["max_seeing_arcsec"] = rng.choice([1.0, 1.2, 1.5])
        add("SFN", f"SFN-K{i + 1:02d}", ra, dec, band, rng.choice([600, 900, 1200, 1800, 2400]), **kw)
    # MIR: thermal infrared discs; N tolerates some water, Q wants it very dry.
    for i in range(25):
        ra, dec = field(rng, -70, 20)
        band = "Q" if i % 3 == 0 else "N"
        pwv = rng.choice([1.5, 2.0, 3.0]) if band == "Q" else rng.choice([4.0, 5.0, 7.0])
        add("MIR", f"MIR-D{i + 1:02d}", ra, dec, band, rng.choice([900, 1200, 1800]),
            max_pwv_mm=pwv, max_airmass=1.6, priority=rng.randint(3, 9))
    # TDS: transients; short, urgent, loose limits, some with a window tonight, some ToO.
    for i in range(30):
        ra, dec = field(rng, -70, 25)
        kw = dict(max_airmass=2.5, priority=rng.randint(5, 9), max_seeing_arcsec=rng.choice(["", 1.5, 2.0]))
        if i % 4 == 0:
            start = FORECAST_START + timedelta(minutes=rng.randint(60, 480))
            kw.update(not_before=iso(start), not_after=iso(start + timedelta(hours=rng.choice([2, 3]))))
        if i % 5 == 0:
            kw["too"] = "true"
        add("TDS", f"TDS-{2026}{chr(97 + i % 26)}{i // 26 + 1}", ra, dec, rng.choice("VRI"),
            rng.choice([300, 450, 600, 900]), **kw)
    # VSM: variable stars; repeated visits an hour apart, some eclipsing binaries by phase.
    for i in range(30):
        ra, dec = field(rng, -80, 20)
        kw = dict(max_airmass=2.0, priority=rng.randint(3, 8), max_seeing_arcsec=rng.choice(["", 1.5, 2.0]))
        if i % 3 == 0:
            kw.update(repeats=rng.choice([2, 3]), min_spacing_s=3600)
        elif i % 3 == 1:
            period = round(rng.uniform(0.3, 2.5), 4)
            kw.update(period_epoch=iso(FORECAST_START - timedelta(days=rng.uniform(1, 30))),
                      period_days=period, phase_min=0.9, phase_max=0.1)  # around primary eclipse
        add("VSM", f"VSM-V{i + 1:02d}", ra, dec, rng.choice("UBV"), rng.choice([300, 600, 900]), **kw)
    # Two honest mistakes a queue sees: a northern field that never rises here, and a Q-band
    # request drier than tonight's air ever gets.
    add("GEV", "GEV-NORTH", 105.0, 68.0, "R", 1800, max_seeing_arcsec=1.0, priority=5)
    rows[-1]["ra"], rows[-1]["dec"] = "105.0", "68.0"
    add("MIR", "MIR-DRY", 60.0, -30.0, "Q", 1200, max_pwv_mm=0.5, max_airmass=1.6, priority=6)
    rows[-1]["ra"], rows[-1]["dec"] = "60.0", "-30.0"
    # Replace two ordinary ones so the queue stays at 150.
    del rows[29]
    del rows[64]
    # Moving targets and off-axis adaptive optics: a planet in K, the invented comet from its
    # ephemeris table, and a K-band field whose only guide star is 8 arcsec away (the predicted
    # Strehl ratio clears the camera's threshold only in the better seeing).
    add("SFN", "SFN-SATURN", 0.0, 0.0, "K", 600, max_seeing_arcsec=1.2, max_airmass=2.0, priority=9)
    rows[-1].update(ra="", dec="", body="saturn")
    add("TDS", "TDS-C2026X1", 0.0, 0.0, "R", 900, max_airmass=2.2, max_moon_illum=0.8, priority=8)
    rows[-1].update(ra="", dec="", ephemeris_file=COMET_FILE)
    add("SFN", "SFN-AO-OFFAXIS", 62.5, -41.25, "K", 1200, resolution_arcsec=0.3, guide_star_sep_arcsec=8,
        max_pwv_mm=6, max_airmass=1.8, priority=8)
    for i in (130, 100, 50):  # three ordinary ones make room
        del rows[i]
    return rows


def comet_table() -> str:
    """The invented comet's ephemeris table (CSV time,ra,dec,delta_au)."""
    from astropy.time import Time

    from scheduler.sky.bodies import orbit_astrometric, orbit_elements, radec_deg

    t_peri = Time(COMET_PERIHELION.timestamp(), format="unix", scale="utc").tdb.jd
    elements = orbit_elements(perihelion_jd_tdb=t_peri, **COMET_ORBIT)
    times = []
    t = COMET_TABLE_START
    while t <= COMET_TABLE_END:
        times.append(t)
        t += timedelta(hours=2)
    vec, delta = orbit_astrometric(elements, [x.timestamp() for x in times])
    ra, dec = radec_deg(vec)
    lines = ["time,ra,dec,delta_au"]
    lines += [f"{iso(x)},{r:.5f},{d:.5f},{a:.5f}" for x, r, d, a in zip(times, ra, dec, delta)]
    return "\n".join(lines) + "\n"


def forecast(rng: random.Random, *, changed: bool) -> list[dict]:
    """Half-hourly samples. First forecast: good early, seeing and PWV degrade 03-06 UTC, partial
    recovery. Changed forecast: the degradation comes earlier and deeper, a wind closure
    04:00-05:00, and the end of the night clears better."""
    out = []
    t = FORECAST_START
    while t <= FORECAST_END:
        h = (t - datetime(2026, 12, 17, 0, 0, tzinfo=timezone.utc)).total_seconds() / 3600.0  # UTC hours after midnight
        if not changed:
            bump = math.exp(-0.5 * ((h - 4.5) / 1.1) ** 2)  # worst near 04:30 UTC
            seeing = 0.62 + 0.85 * bump + (0.15 if h > 6 else 0.0)
            pwv = 1.6 + 4.2 * bump + (1.0 if h > 6 else 0.0)
            wind = 7.0 + 3.0 * bump
        else:
            bump = math.exp(-0.5 * ((h - 3.3) / 1.3) ** 2)  # earlier, deeper, wider
            seeing = 0.62 + 1.2 * bump - (0.05 if h > 6.5 else 0.0)
            pwv = 1.6 + 6.5 * bump
            wind = 7.0 + 4.0 * bump + (8.0 if 4.0 <= h < 5.0 else 0.0)
        seeing += rng.uniform(-0.04, 0.04)
        pwv += rng.uniform(-0.1, 0.1)
        out.append({
            "time": iso(t),
            "seeing_arcsec": round(max(seeing, 0.4), 2),
            "pwv_mm": round(max(pwv, 0.5), 2),
            "cloud_mag": round(0.15 * bump, 2),
            "wind_ms": round(wind + rng.uniform(-0.5, 0.5), 1),
            "humidity_pct": round(18 + 25 * bump + rng.uniform(-2, 2)),
            "dome": "open",
        })
        t += timedelta(minutes=30)
    return out


def main() -> None:
    rng = random.Random(SEED)
    with open(HERE / "programs.csv", "w", newline="", encoding="utf-8") as f:
        w = csv.writer(f, lineterminator="\n")
        w.writerow(["code", "pi", "hours", "weight"])
        w.writerows(PROGRAMS)
    rows = requests(rng)
    assert len(rows) == 150, len(rows)
    with open(HERE / "requests.csv", "w", newline="", encoding="utf-8") as f:
        w = csv.DictWriter(f, COLUMNS, lineterminator="\n")
        w.writeheader()
        w.writerows(rows)
    (HERE / COMET_FILE).write_text(comet_table(), encoding="utf-8")
    first = forecast(rng, changed=False)
    with open(HERE / "forecast.csv", "w", newline="", encoding="utf-8") as f:
        w = csv.DictWriter(f, list(first[0]), lineterminator="\n")
        w.writeheader()
        w.writerows(first)
    update = {"issued": "2026-12-17T00:45:00Z", "source": "demo forecast desk, update 2 (invented)",
              "samples": forecast(rng, changed=True)}
    (HERE / "forecast_update.json").write_text(json.dumps(update, indent=1) + "\n", encoding="utf-8")
    (HERE / "scenario.json").write_text(json.dumps({
        "night": NIGHT, "seed": SEED, "programs": "programs.csv", "requests": "requests.csv",
        "forecast": "forecast.csv", "forecast_source": "demo forecast desk, issue 1 (invented)",
        "forecast_update": "forecast_update.json",
        "update_reason": "forecast update: seeing and PWV degrade from about 01:30 UTC instead of 03:00, "
                         "wind closure 04:00-05:00 UTC, clearer after 06:30 UTC",
    }, indent=1) + "\n", encoding="utf-8")
    with open(HERE / "climatology.csv", "w", newline="", encoding="utf-8") as f:
        f.write("# Invented weather statistics of the fictional Quebrada Tenue Observatory, per calendar month.\n"
                "# Not measurements of any real site. Columns: docs/season.md.\n")
        w = csv.writer(f, lineterminator="\n")
        w.writerow(CLIMATE_COLUMNS)
        w.writerows(CLIMATE)


if __name__ == "__main__":
    main()
