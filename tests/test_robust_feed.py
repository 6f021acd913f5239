"""The conditions feed takes a file only when it is complete.

The writer's pauses are reproduced without sleeping: the file's modification time is set to
the past (what a paused writer leaves behind), so nothing here depends on machine speed. The
feed runs the service's own job code on a real SQLite file; the rename protocol also runs
through the real `nightplan serve` process.
"""

from __future__ import annotations

import dataclasses
import logging
import os
import re
import time
from datetime import datetime, timedelta, timezone
from pathlib import Path

import pytest

from conftest import run_cli
from scheduler.conditions.files import FileChanged, SettleWatch, take_feed_file
from scheduler.db.models import ConditionsReport
from scheduler.db.session import open_db
from scheduler.model.config import ServiceSettings, load_config
from scheduler.textfile import file_state

START = datetime(2026, 12, 16, 23, 0, tzinfo=timezone.utc)


def report_lines(n: int = 14) -> list[str]:
    lines = ["time,seeing_arcsec,pwv_mm,cloud_mag,wind_ms,humidity_pct,dome\n"]
    for k in range(n):
        t = START + timedelta(minutes=30 * k)
        lines.append(f"{t:%Y-%m-%dT%H:%M:%SZ},0.7,1.5,0.0,5.0,20,open\n")
    return lines


def age(path: Path, seconds: float) -> None:
    """Make the file look as if nothing was written to it for ``seconds``."""
    t = time.time() - seconds
    os.utime(path, (t, t))


class _Events(logging.Handler):
    def __init__(self):
        super().__init__()
        self.events: list[tuple[str, dict]] = []

    def emit(self, record):
        self.events.append((record.getMessage(), dict(getattr(record, "kv", {}))))


@pytest.fixture
def feed(workdir: Path):
    from scheduler.planning.planner import Planner
    from scheduler.service.clock import Clock
    from scheduler.service.jobs import Jobs
    from scheduler.service.log import EventLog

    config = dataclasses.replace(load_config(workdir / "observatory.toml"),
                                 service=ServiceSettings(feed_settle_s=60.0))
    db = open_db(str(workdir / "nightplan.sqlite"), create_file=False)
    logger = logging.getLogger(f"test.feed.{time.monotonic_ns()}")
    logger.propagate = False
    logger.setLevel(logging.INFO)
    events = _Events()
    logger.addHandler(events)
    folder = workdir / "feed"
    folder.mkdir()
    jobs = Jobs(db, config, Planner(config), Clock(START), EventLog(logger), watch=folder)
    jobs.events = events.events
    jobs.folder = folder
    yield jobs
    db.dispose()


def stored(jobs) -> list[int]:
    with jobs.db.session() as s:
        return [r.n_samples for r in s.query(ConditionsReport).order_by(ConditionsReport.id)]


def test_a_writer_pausing_at_a_line_boundary_is_not_stored_truncated(feed):
    f = feed.folder / "forecast.csv"
    lines = report_lines(14)
    f.write_text("".join(lines[:5]), encoding="utf-8")  # header and 4 of 14 samples
    age(f, 30)  # the writer has paused 30 s: longer than the old 1 s rule, shorter than feed_settle_s
    for _ in range(3):
        feed.ingest_folder()
    assert stored(feed) == [] and f.exists()

    with open(f, "a", encoding="utf-8") as out:  # the writer resumes and finishes
        out.write("".join(lines[5:]))
    assert feed.ingest_folder().stored == 0  # just changed: wait again
    age(f, 120)  # and then nothing more is written for longer than feed_settle_s
    res = feed.ingest_folder()
    assert res.stored == 1 and stored(feed) == [14]
    assert (feed.folder / "done" / "forecast.csv").is_file()
    event, kv = [e for e in feed.events if e[0] == "conditions_stored"][-1]
    assert kv["samples"] == 14 and kv["bytes"] == len("".join(lines).encode())
    assert re.fullmatch(r"[0-9a-f]{16}", kv["sha256"]) and kv["first"] == START
    assert kv["last"] == START + timedelta(minutes=30 * 13)


def test_a_writer_pausing_mid_line_is_not_rejected(feed):
    f = feed.folder / "forecast.csv"
    text = "".join(report_lines(14))
    f.write_text(text[: len(text) // 2 + 7], encoding="utf-8")  # cut inside a line
    age(f, 30)
    assert feed.ingest_folder().rejected == 0
    assert not (feed.folder / "rejected").exists() and stored(feed) == []
    f.write_text(text, encoding="utf-8")
    age(f, 300)
    assert feed.ingest_folder().stored == 1 and stored(feed) == [14]


def test_part_then_rename_protocol(feed):
    part = feed.folder / "forecast.csv.part"
    part.write_text("".join(report_lines(14)), encoding="utf-8")
    age(part, 600)
    assert feed.ingest_folder().stored == 0  # never read under its temporary name
    part.rename(feed.folder / "forecast.csv")
    assert feed.ingest_folder().stored == 1 and stored(feed) == [14]


def test_a_file_that_changes_while_read_is_left_for_later(tmp_path):
    f = tmp_path / "r.csv"
    f.write_text("".join(report_lines(4)), encoding="utf-8")
    state = file_state(f)
    with open(f, "a", encoding="utf-8") as out:
        out.write("".join(report_lines(6)[5:]))
    with pytest.raises(FileChanged):
        take_feed_file(f, state)
    taken = take_feed_file(f, file_state(f))
    assert len(taken.report) == 6 and taken.size == f.stat().st_size


def test_settle_watch_by_its_own_clock_and_by_modification_time():
    w = SettleWatch(10.0)
    wall = 1_000_000.0
    fresh = (100, int(wall * 1e9))  # written just now
    assert not w.settled("a", fresh, now_mono=0.0, now_wall=wall)
    assert not w.settled("a", fresh, now_mono=9.9, now_wall=wall)  # a clock-skewed stamp: own clock decides
    assert w.settled("a", fresh, now_mono=10.0, now_wall=wall)
    grown = (150, int(wall * 1e9))
    assert not w.settled("a", grown, now_mono=11.0, now_wall=wall)  # changed: the wait starts again
    assert w.settled("a", grown, now_mono=21.0, now_wall=wall)
    old = (100, int((wall - 11) * 1e9))  # last written 11 s ago: settled at the first look
    assert w.settled("b", old, now_mono=0.0, now_wall=wall)
    w.keep_only({"b"})
    assert not w.settled("a", grown, now_mono=22.0, now_wall=wall)  # forgotten once gone


@pytest.mark.slow
def test_real_service_takes_a_renamed_file_and_logs_what_it_took(workdir):
    cfg = workdir / "observatory.toml"
    cfg.write_text(cfg.read_text(encoding="utf-8").replace("feed_settle_s = 5", "feed_settle_s = 1"),
                   encoding="utf-8")
    (workdir / "feed").mkdir()
    part = workdir / "feed" / "tonight.csv.part"
    part.write_text("".join(report_lines(14)), encoding="utf-8")
    part.rename(workdir / "feed" / "tonight.csv")
    age(workdir / "feed" / "tonight.csv", 5)
    proc = run_cli("serve", "--once", "--watch", "feed", "--clock", "2026-12-16T20:00:00Z", cwd=workdir, timeout=120)
    assert (workdir / "feed" / "done" / "tonight.csv").is_file(), proc.stdout + proc.stderr
    line = next(x for x in proc.stdout.splitlines() if " conditions_stored " in x)
    assert " samples=14 " in line and " file=tonight.csv " in line
    assert re.search(r" bytes=\d+ sha256=[0-9a-f]{16} first=2026-12-16T23:00:00Z last=2026-12-17T05:30:00Z ", line)
