"""A night's Sun events kept on disk between processes (scheduler/sky/night.py, kept_night).

The reference is the computation itself (compute_night, checked against PyEphem in
tests/test_sky.py): the kept night must be the computed one exactly, and any doubt about the
file must mean computing again, never a wrong sunset.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import fields
from datetime import date

import numpy as np
import pytest

from scheduler.model.config import starter_config
from scheduler.sky import night as night_mod

SITE = starter_config().site
DAY = date(2026, 12, 16)


def _same(a, b) -> None:
    for f in fields(a):
        x, y = getattr(a, f.name), getattr(b, f.name)
        if isinstance(x, np.ndarray):
            assert np.array_equal(x, y), f.name
        else:
            assert x == y, f.name


@pytest.fixture
def cache(monkeypatch, tmp_path):
    monkeypatch.setenv("NIGHTPLAN_CACHE_DIR", str(tmp_path))
    return tmp_path


def test_a_kept_night_is_the_computed_night(cache):
    computed = night_mod.compute_night(SITE, DAY, 60)
    first = night_mod.kept_night(SITE, DAY, 60)  # computes and writes
    files = list((cache / "nights").glob("*.json"))
    assert len(files) == 1 and (files[0].stat().st_mode & 0o077) == 0  # readable by its owner only
    again = night_mod.kept_night(SITE, DAY, 60)  # read back
    _same(first, computed)
    _same(again, computed)
    # another date, step or site is another file
    night_mod.kept_night(SITE, DAY, 120)
    night_mod.kept_night(SITE, date(2026, 12, 17), 60)
    assert len(list((cache / "nights").glob("*.json"))) == 3


@pytest.mark.parametrize("damage", ["garbage", "edited sunset", "wrong date", "world-writable", "truncated"])
def test_a_doubtful_file_is_computed_again(cache, damage):
    computed = night_mod.compute_night(SITE, DAY, 60)
    night_mod.kept_night(SITE, DAY, 60)
    path = night_mod._night_cache_path(SITE, DAY, 60)
    text = path.read_text(encoding="utf-8")
    if damage == "garbage":
        path.write_text("not json", encoding="utf-8")
    elif damage == "truncated":
        path.write_text(text[: len(text) // 2], encoding="utf-8")
    elif damage in ("edited sunset", "wrong date"):
        outer = json.loads(text)
        body = json.loads(outer["body"])
        if damage == "edited sunset":
            body["sunset"] -= 3 * 3600  # three hours of daylight: the checksum no longer matches
            outer["body"] = json.dumps(body)
        else:  # consistent checksum, but the file answers for another night
            body["date"] = "2026-12-17"
            outer["body"] = json.dumps(body)
            outer["sha256"] = hashlib.sha256(outer["body"].encode()).hexdigest()
        path.write_text(json.dumps(outer), encoding="utf-8")
    else:
        path.chmod(0o666)
    assert night_mod._read_night(path, DAY, 60) is None
    _same(night_mod.kept_night(SITE, DAY, 60), computed)


def test_no_cache_dir_means_computing(monkeypatch):
    monkeypatch.setenv("NIGHTPLAN_CACHE_DIR", "")
    assert night_mod._night_cache_path(SITE, DAY, 60) is None
    _same(night_mod.kept_night(SITE, DAY, 60), night_mod.compute_night(SITE, DAY, 60))
