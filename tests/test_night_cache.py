"""A night's Sun events kept on disk between processes (scheduler/sky/night.py, kept_night).

The reference is the computation itself (compute_night, checked against PyEphem in
tests/test_sky.py): the kept night must be the computed one exactly, and any doubt about the
file must mean computing again, never a wrong sunset.
"""

from __future__ import annotations

import json
from dataclasses import fields
from datetime import date

import numpy as np
import pytest

from scheduler.model.config import starter_config
from scheduler.sky import night as night_mod
from scheduler.sky import offline

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
    raw = path.read_bytes()
    magic = night_mod._NIGHT_MAGIC
    body = json.loads(raw[len(magic) + 65:])
    if damage == "garbage":
        path.write_bytes(b"not a kept night")
    elif damage == "truncated":
        path.write_bytes(raw[: len(raw) // 2])
    elif damage == "edited sunset":  # three hours of daylight; the checksum no longer matches
        body["sunset"] -= 3 * 3600
        path.write_bytes(raw[: len(magic) + 65] + json.dumps(body).encode())
    elif damage == "wrong date":  # a sound file, but it answers for another night
        body["date"] = "2026-12-17"
        offline.write_private(path, magic, json.dumps(body).encode())
    else:
        path.chmod(0o666)
    assert night_mod._read_night(path, DAY, 60) is None
    _same(night_mod.kept_night(SITE, DAY, 60), computed)


def test_no_cache_dir_means_computing(monkeypatch):
    monkeypatch.setenv("NIGHTPLAN_CACHE_DIR", "")
    assert night_mod._night_cache_path(SITE, DAY, 60) is None
    _same(night_mod.kept_night(SITE, DAY, 60), night_mod.compute_night(SITE, DAY, 60))
