"""The constraint catalog is the single list of constraints: one entry per Reason bit, and every
entry is evaluated by feasibility, explained by `plan why` and caught by the independent checker.

"Checked" is shown by behaviour, not by a shared name: for each entry a hand-built scene breaks
that constraint alone, and the checker (which imports nothing of the catalog) must refuse an
entry placed there, while the same scene with the constraint satisfied passes. A new catalog
entry without a scene here fails ``test_every_entry_has_a_scene``.
"""

from __future__ import annotations

import ast
import re
from collections import Counter
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from pathlib import Path
from typing import Callable

import numpy as np
import pytest

from scheduler.constraints import catalog
from scheduler.constraints.catalog import BY_NAME, CATALOG, STEP_BITS, Constraint, Reason
from scheduler.constraints.feasibility import evaluate
from scheduler.constraints.explain import binding
from scheduler.model.plan import PlanEntry
from scheduler.planning.explain import why_not
from scheduler.report.why import explain, time_formatter
from scheduler.service.validity import _why
from scheduler.sky.airmass import kasten_young_1989
from scheduler.solve import checker
from scheduler.solve.checker import check_plan
from scheduler.solve.problem import _REASON_LABELS, failing_constraint, never_feasible_reason

from test_feasibility import CFG, T0, cond, req, sky

ROOT = Path(__file__).resolve().parents[1]
FMT = time_formatter(CFG.site.timezone)


# --------------------------------------------------------------------------- the list itself

def test_every_reason_bit_has_exactly_one_entry():
    per_bit = Counter(c.reason for c in CATALOG)
    assert set(per_bit) == set(Reason)
    assert all(n == 1 for n in per_bit.values()), per_bit
    assert [int(c.reason) for c in CATALOG] == sorted(int(r) for r in Reason)  # ordered by bit
    for c in CATALOG:
        assert bin(int(c.reason)).count("1") == 1
        assert c.layer in (catalog.STATIC, catalog.CONDITIONS, catalog.START)
        assert c.label and c.wording and "\n" not in c.wording
        # each entry evaluates and explains itself (no inherited placeholder)
        assert type(c).fails is not Constraint.fails and type(c).detail is not Constraint.detail, c
        for field in c.limits:
            assert field in catalog.LIMIT_FIELDS
    for attr in ("label", "wording"):
        values = [getattr(c, attr) for c in CATALOG]
        assert len(set(values)) == len(values), attr
    assert STEP_BITS == sum(int(c.reason) for c in CATALOG if c.layer != catalog.START)


def test_the_solver_labels_are_the_catalogs():
    assert _REASON_LABELS == {int(c.reason): c.label for c in CATALOG if c.layer != catalog.START}
    assert failing_constraint(np.array([int(Reason.PWV)] * 3 + [int(Reason.SEEING)])) == "pwv"


def _imported_modules(path: Path) -> set[str]:
    mods = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom) and node.module:
            mods.add(node.module)
        elif isinstance(node, ast.Import):
            mods.update(a.name for a in node.names)
    return mods


def test_the_checker_stays_independent_of_the_catalog():
    mods = _imported_modules(ROOT / "scheduler" / "solve" / "checker.py")
    assert not [m for m in mods if m.startswith("scheduler.constraints")], mods
    # the one shared policy number is written twice on purpose; they must agree
    assert checker.TRANSMISSION_FLOOR == catalog.TRANSMISSION_FLOOR


# --------------------------------------------------------------------------- one scene per entry

N_T = 30
STEP_S = 60


@dataclass(frozen=True)
class Scene:
    """A hand-built night where ``broken`` fails the constraint alone and the other passes all."""

    make: Callable[[bool], tuple]  # broken -> (request, sky, conditions)
    config: object = None  # the observatory, when the starter one cannot show the constraint


def _ao(broken: bool):
    # The starter NIR camera's AO (3.8 m, 0.2 m pitch, Strehl threshold 0.3) in 0.6" seeing:
    # 0.3" in K needs the corrected core (the uncorrected image is ~0.48"). On axis the predicted
    # Strehl is ~0.98; 40" from the guide star, beyond the ~13" isoplanatic angle in K, ~0.002.
    r = req("K", id=1, resolution_arcsec=0.3, guide_star_sep_arcsec=40.0 if broken else 0.0)
    return r, sky(np.full(N_T, 60.0)), cond(N_T, seeing=0.6)


def _dish_config():
    """An invented submillimetre dish: 20 um rms at night, 60 um sunlit, floor 0.5."""
    from dataclasses import replace as _replace

    from scheduler.model.config import Band, Instrument
    tel = _replace(CFG.telescope, surface_rms_um=20.0, surface_rms_day_um=60.0, surface_efficiency_floor=0.5)
    smm = Band(name="smm870", wavelength_um=870.0, extinction_mag=0.0, tau_dry=0.07, tau_per_mm_pwv=0.18,
               twilight="day", seeing_limited=False)
    rx = Instrument(name="rx", bands=("smm870",), setup_s=60.0, filter_change_s=0.0, instrument_change_s=0.0)
    return _replace(CFG, telescope=tel, bands={**CFG.bands, "smm870": smm}, instruments=CFG.instruments + (rx,))


DISH = _dish_config()


def _surface(broken: bool):
    # Ruze (1966) at 870 um: exp(-(4 pi 20 / 870)^2) = 0.92 at night; sunlit, 60 um rms,
    # exp(-(4 pi 60 / 870)^2) = 0.47, under the floor 0.5.
    return req("smm870", id=1), sky(np.full(N_T, 60.0), sun_alt=20.0 if broken else -20.0), cond(N_T)


def _scene(req_kw=None, sky_good=None, sky_bad=None, cond_good=None, cond_bad=None, band="R", n_t=N_T) -> Scene:
    def make(broken: bool):
        s_kw = dict((sky_bad if broken else sky_good) or {})
        c_kw = (cond_bad if broken else cond_good) or {}
        alt = s_kw.pop("alt", 60.0)
        r = req(band, id=1, **(req_kw or {}))
        return r, sky(np.full(n_t, alt), **s_kw), cond(n_t, **c_kw)
    return Scene(make)


def _night_end(broken: bool):
    n_t = 5 if broken else N_T  # R: 180 s setup + 300 s = 8 steps; 5 steps cannot hold it
    return req("R", id=1), sky(np.full(n_t, 60.0)), cond(n_t)


def _window(broken: bool):
    r = req("R", id=1, not_before=T0 + timedelta(hours=2) if broken else T0)  # the grid is 30 min long
    return r, sky(np.full(N_T, 60.0)), cond(N_T)


SCENES: dict[str, Scene] = {
    "ALTITUDE": _scene(sky_good={"alt": 60.0}, sky_bad={"alt": 12.0}),
    "TWILIGHT": _scene(sky_good={"sun_alt": -30.0}, sky_bad={"sun_alt": -8.0}),
    "MOON_SEP": _scene({"min_moon_sep_deg": 30.0}, {"moon_alt": 20.0, "moon_sep": 90.0},
                       {"moon_alt": 20.0, "moon_sep": 10.0}),
    "SKY_BRIGHTNESS": _scene({"max_moon_illum": 0.5}, {"moon_alt": 20.0, "illum": 0.3},
                             {"moon_alt": 20.0, "illum": 0.9}),
    "SEEING": _scene({"max_seeing_arcsec": 0.8}, cond_good={"seeing": 0.6}, cond_bad={"seeing": 1.2}),
    "RESOLUTION": _scene({"resolution_arcsec": 0.7}, cond_good={"seeing": 0.3}, cond_bad={"seeing": 1.2}),
    "PWV": _scene({"max_pwv_mm": 2.0}, cond_good={"pwv": 1.0}, cond_bad={"pwv": 4.0}),
    # Q band at 80 deg: T = exp(-(0.20 + 0.30 PWV) X) (band table, Beer-Lambert) is 0.07 at 8 mm, 0.60 at 1 mm
    "TRANSMISSION": _scene(band="Q", sky_good={"alt": 80.0}, sky_bad={"alt": 80.0},
                           cond_good={"pwv": 1.0}, cond_bad={"pwv": 8.0}),
    "CLOUD": _scene({"max_cloud_mag": 0.5}, cond_good={"cloud": 0.0}, cond_bad={"cloud": 0.8}),
    "CLOSURE": _scene(cond_good={"dome": True}, cond_bad={"dome": False}),
    "SUN": _scene(sky_good={"sun_sep": 120.0}, sky_bad={"sun_sep": 30.0}),
    "WINDOW": Scene(_window),
    "NIGHT_END": Scene(_night_end),
    "AO_STREHL": Scene(_ao),
    "SURFACE": Scene(_surface, DISH),
}


def _entry(spec, d: int, step_s: int = STEP_S) -> PlanEntry:
    start = T0
    return PlanEntry(request_id=spec.id, execution=0, start=start, end=start + timedelta(seconds=d * step_s),
                     start_step=0, end_step=d, slew_s=0.0, transition_s=0.0, setup_s=180.0, airmass_start=1.0,
                     airmass_end=1.0, predicted_fwhm_arcsec=1.0, predicted_pwv_mm=1.0, transmission=1.0, merit=1.0,
                     moon_sep_deg=90.0, value=1.0)


def test_every_entry_has_a_scene():
    assert set(SCENES) == set(BY_NAME)


@pytest.mark.parametrize("name", [c.name for c in CATALOG])
def test_entry_is_evaluated_explained_and_checked(name):
    c = BY_NAME[name]
    bit = int(c.reason)
    config = SCENES[name].config or CFG
    for broken in (False, True):
        spec, sk, cd = SCENES[name].make(broken)
        f = evaluate([spec], np.array([0]), sk, cd, config)
        d = int(f.duration_steps[0])
        violations = check_plan([_entry(spec, d)], {1: spec}, {1: 0}, sk, cd, config)
        if not broken:
            assert f.start_ok[0, 0] and not (f.reasons[0, : N_T - d] & bit).any()
            assert violations == [], violations
            continue
        # evaluated: feasibility sets this bit, and (for a step constraint) nothing else, at every step
        assert np.all(f.reasons[0] & bit) and not f.start_ok[0].any()
        if c.layer != catalog.START:
            assert np.all((f.reasons[0] & STEP_BITS) == bit)
            assert never_feasible_reason(f.reasons[0], f.ok[0], 0, d, STEP_S) == f"never feasible: {c.label}"
            assert _why(bit, spec, cd, 0, N_T) == c.breach(spec, cd, 0, N_T)
        else:
            assert f.ok[0].all()
        assert binding(f.reasons[0], d, 0)["constraints"] == [name]
        # explained: `plan why` names it as binding, in the catalog's wording, with its own detail
        w = why_not(config, spec, sk, cd, T0, [], {"P1": 1.0}, FMT)
        assert w.displaced is None and w.unobservable.binding == [name]
        assert w.unobservable.wording == [c.wording]
        assert dict(w.unobservable.details).get(name), w.unobservable.details
        # checked: the independent checker refuses an entry there
        assert violations and all(v.request_id == 1 for v in violations), violations


def test_validity_reasons_carry_the_numbers_in_catalog_order():
    spec = req("R", id=1, max_pwv_mm=2.0, max_seeing_arcsec=0.8)
    cd = cond(4, pwv=np.array([1.0, 3.0, 4.0, 1.0]), seeing=np.array([0.5, 1.1, 0.9, 0.5]))
    text = _why(int(Reason.PWV | Reason.SEEING | Reason.MOON_SEP), spec, cd, 1, 3)
    assert text == ("moon separation, seeing up to 1.10 arcsec over its 0.8 arcsec limit, "
                    "PWV up to 4.0 mm over its 2 mm limit")


# --------------------------------------------------------------------------- plan why after a mid-night re-plan

def _doc(planned_from: datetime) -> dict:
    return {"plan": {"version": 2, "planned_from": planned_from.strftime("%Y-%m-%dT%H:%M:%SZ"), "gap": 0.0},
            "night": {"date": "2026-03-09"}, "entries": [], "unscheduled": []}


def test_why_altitude_and_airmass_are_read_at_the_same_times():
    """After a re-plan from step 20: steps 20-34 the target is high but too close to the Moon,
    steps 35-59 only the altitude fails (5..12 deg). The altitude figure comes from the times when
    only the binding constraint fails; the airmass figure must come from the same times."""
    n_t, now = 60, 20
    alt = np.full(n_t, 60.0)
    alt[35:] = np.linspace(12.0, 5.0, n_t - 35)
    moon_sep = np.full((1, n_t), 90.0)
    moon_sep[0, :35] = 10.0
    sk = sky(alt, moon_alt=20.0, moon_sep=moon_sep)
    spec = req("R", id=7, max_airmass=2.0, min_moon_sep_deg=30.0)
    night = sk.night
    res = explain(CFG, spec, night, sk, cond(n_t), _doc(T0 + timedelta(seconds=now * STEP_S)), {"P1": 1.0})
    assert res["state"] == "never_feasible" and res["binding"] == ["ALTITUDE"]
    text = res["details"]["ALTITUDE"]
    m = re.search(r"highest altitude (-?[\d.]+) deg at (\d\d:\d\d) UTC.*lowest airmass ([\d.]+)", text)
    assert m, text
    assert float(m.group(1)) == pytest.approx(12.0, abs=0.05)
    # Kasten & Young (1989) airmass at the reported altitude, not the 60 deg time (1.15) the Moon forbids
    assert float(m.group(3)) == pytest.approx(float(kasten_young_1989(12.0)), abs=0.006)
    assert res["closest"]["time"] == datetime.fromtimestamp(night.times_unix[35], timezone.utc).strftime(
        "%Y-%m-%dT%H:%M:%SZ")
    assert m.group(2) == res["closest"]["time"][11:16]
    assert "after the plan's start" in res["explanation"][0]


def test_why_airmass_below_the_horizon_is_said_so():
    n_t = 40
    alt = np.linspace(-0.2, -9.0, n_t)
    sk = sky(alt)
    spec = req("R", id=8, max_airmass=2.0)
    res = explain(CFG, spec, sk.night, sk, cond(n_t), _doc(T0), {"P1": 1.0})
    assert res["binding"] == ["ALTITUDE"]
    assert "highest altitude -0.2 deg" in res["details"]["ALTITUDE"]
    assert "lowest airmass none (below the horizon)" in res["details"]["ALTITUDE"]
