"""The season outlook's aggregation over realizations, on synthetic per-realization outcomes.

Expected values are worked by hand from the definitions in scheduler/season/simulate.py;
percentiles follow numpy's default linear interpolation: for n sorted values the q-th
percentile sits at position q/100 x (n - 1).
"""

from __future__ import annotations

import csv
import io
import json
import random
from datetime import date, timedelta

import pytest

from scheduler.season.simulate import (
    NightOutcome, ProgramInfo, RealizationOutcome, RequestInfo, aggregate, completion, outlook_tables, spread,
)

START = date(2027, 3, 1)
DATES = [START + timedelta(days=k) for k in range(3)]

PROGRAMS = [ProgramInfo("ZED", 2, 10.0), ProgramInfo("ALF", 1, 8.0), ProgramInfo("EMPTY", 1, 2.0),
            ProgramInfo("LOOSE", None, 1.0)]
REQUESTS = [
    RequestInfo(1, "ALF", needed=2, hours_per_execution=1.0),
    RequestInfo(2, "ALF", needed=1, hours_per_execution=3.0),
    RequestInfo(3, "ZED", needed=1, hours_per_execution=0.5),  # never observed in any realization
]


def realization(r: int) -> RealizationOutcome:
    """Realization r (0..4): ALF is charged r + 1 hours on the first night; request 1 done r times (capped by need
    in completion), request 2 done in realizations 3 and 4; weather takes r hours on the second night."""
    nights = (
        NightOutcome(DATES[0], charged_h={"ALF": r + 1.0}, done={1: r} if r else {},
                     hours_by_band={"V": 0.5 * r, "K": 1.0}, weather_lost_h=0.0, idle_dark_h=1.0),
        NightOutcome(DATES[1], charged_h={"ZED": 2.0}, done={2: 1} if r >= 3 else {},
                     hours_by_band={"V": 1.0}, weather_lost_h=float(r), idle_dark_h=0.0),
        NightOutcome(DATES[2], charged_h={"LOOSE": 0.25}, weather_lost_h=10.0),
    )
    return RealizationOutcome(r, nights)


@pytest.fixture
def doc():
    return aggregate(PROGRAMS, REQUESTS, [realization(r) for r in range(5)], start=DATES[0], end=DATES[-1], seed=7)


def test_spread_is_mean_and_interpolated_percentiles():
    assert spread([1, 2, 3, 4, 5]) == {"mean": 3.0, "p10": 1.4, "p90": 4.6}  # positions 0.4 and 3.6
    assert spread([2.0, 4.0]) == {"mean": 3.0, "p10": 2.2, "p90": 3.8}
    assert spread([]) == {"mean": None, "p10": None, "p90": None}


def test_document_header(doc):
    assert (doc["from"], doc["to"], doc["realizations"], doc["seed"], doc["nights"]) == \
        ("2027-03-01", "2027-03-03", 5, 7, 3)
    json.dumps(doc)  # plain JSON types only


def test_programs_are_ordered_by_tier_then_code_with_their_spreads(doc):
    rows = {p["code"]: p for p in doc["programs"]}
    assert [p["code"] for p in doc["programs"]] == ["ALF", "EMPTY", "ZED", "LOOSE"]
    assert rows["ALF"]["tier"] == 1 and rows["ALF"]["allocated_h"] == 8.0
    assert rows["ALF"]["charged_h"] == {"mean": 3.0, "p10": 1.4, "p90": 4.6}
    assert rows["ZED"]["charged_h"] == {"mean": 2.0, "p10": 2.0, "p90": 2.0}
    # ALF needs 2 x 1 h + 1 x 3 h = 5 h. Done hours per realization: min(r, 2) + 3 (r >= 3):
    # 0, 1, 2, 5, 5 -> completion 0, 0.2, 0.4, 1, 1: mean 0.52, p10 at 0.4 -> 0.08, p90 at 3.6 -> 1.0
    assert rows["ALF"]["completion"] == {"mean": 0.52, "p10": 0.08, "p90": 1.0}
    assert rows["ZED"]["completion"] == {"mean": 0.0, "p10": 0.0, "p90": 0.0}
    assert rows["EMPTY"]["completion"] == {"mean": None, "p10": None, "p90": None}  # nothing queued
    assert rows["EMPTY"]["charged_h"]["mean"] == 0.0


def test_request_probability_of_completion(doc):
    p = {r["id"]: r["p_complete"] for r in doc["requests"]}
    assert p == {1: 0.6, 2: 0.4, 3: 0.0}  # request 1 needs 2: done in r = 2, 3, 4


def test_hours_by_band_weather_and_idle(doc):
    # V: 0.5 r + 1 -> 1, 1.5, 2, 2.5, 3; K: 1 each
    assert doc["hours_by_band"] == {"K": {"mean": 1.0, "p10": 1.0, "p90": 1.0},
                                    "V": {"mean": 2.0, "p10": 1.2, "p90": 2.8}}
    assert doc["weather_lost_h"] == {"mean": 12.0, "p10": 10.4, "p90": 13.6}  # r + 10
    assert doc["idle_dark_h"] == {"mean": 1.0, "p10": 1.0, "p90": 1.0}


def test_cumulative_charged_hours_by_tier(doc):
    cum = doc["cumulative_charged_h_by_tier"]
    assert cum["dates"] == [d.isoformat() for d in DATES]
    assert list(cum["tiers"]) == ["1", "2", "none"]
    assert cum["tiers"]["1"]["mean"] == [3.0, 3.0, 3.0]  # ALF on night 1 only
    assert cum["tiers"]["2"]["mean"] == [0.0, 2.0, 2.0]
    assert cum["tiers"]["none"]["p90"] == [0.0, 0.0, 0.25]
    assert cum["tiers"]["1"]["p10"] == [1.4, 1.4, 1.4]


def test_the_document_does_not_depend_on_arrival_order(doc):
    runs = [realization(r) for r in range(5)]
    random.Random(3).shuffle(runs)
    again = aggregate(list(reversed(PROGRAMS)), list(reversed(REQUESTS)), runs, start=DATES[0], end=DATES[-1], seed=7)
    assert json.dumps(again, sort_keys=True) == json.dumps(doc, sort_keys=True)


def test_inconsistent_realizations_are_refused():
    a, b = realization(0), realization(1)
    short = RealizationOutcome(2, b.nights[:2])
    with pytest.raises(ValueError, match="other nights"):
        aggregate(PROGRAMS, REQUESTS, [a, short], start=DATES[0], end=DATES[-1], seed=1)
    with pytest.raises(ValueError, match="twice"):
        aggregate(PROGRAMS, REQUESTS, [a, a], start=DATES[0], end=DATES[-1], seed=1)
    with pytest.raises(ValueError, match="no realizations"):
        aggregate(PROGRAMS, REQUESTS, [], start=DATES[0], end=DATES[-1], seed=1)


def test_completion_caps_over_execution():
    assert completion("ALF", REQUESTS, {1: 5, 2: 1}) == 1.0
    assert completion("ALF", REQUESTS, {1: 1}) == pytest.approx(0.2)
    assert completion("NOBODY", REQUESTS, {}) is None


def test_tables(doc):
    tables = outlook_tables(doc)
    progs = list(csv.DictReader(io.StringIO(tables["programs.csv"])))
    assert [p["code"] for p in progs] == ["ALF", "EMPTY", "ZED", "LOOSE"]
    assert progs[0]["charged_h_p90"] == "4.6" and progs[0]["completion_mean"] == "0.52"
    assert progs[1]["completion_mean"] == ""  # null completion is an empty cell
    assert progs[3]["tier"] == ""
    reqs = list(csv.DictReader(io.StringIO(tables["requests.csv"])))
    assert [(r["id"], r["p_complete"]) for r in reqs] == [("1", "0.6"), ("2", "0.4"), ("3", "0.0")]
    bands = list(csv.DictReader(io.StringIO(tables["bands.csv"])))
    assert [b["band"] for b in bands] == ["K", "V"]
