"""The benchmark's queues and report (scheduler/bench.py). The figures themselves are measured
by running it; these tests check what it generates and how it summarises, never a speed."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest

from scheduler import bench
from scheduler.model.config import starter_config
from scheduler.sky.night import night_for

CFG = starter_config()


@pytest.fixture(scope="module")
def night():
    return night_for(CFG.site, bench.BENCH_DATE, 60)


def test_dense_profile_is_short_repeated_and_time_critical(night):
    reqs, weights = bench.generate_queue(CFG, 500, night=night, profile="dense")
    exp_min = np.array([r.exposure_s / 60 for r in reqs])
    assert exp_min.min() >= 2 and exp_min.max() <= 15 and np.median(exp_min) <= 3
    assert np.mean([r.repeats > 1 for r in reqs]) > 0.4
    windows = [r for r in reqs if r.not_before is not None]
    assert 0.18 < len(windows) / len(reqs) < 0.32
    assert all((r.not_after - r.not_before).total_seconds() <= 3600 + r.exposure_s for r in windows)
    std, _ = bench.generate_queue(CFG, 500, night=night)
    assert np.median([r.exposure_s for r in std]) > 3 * np.median(exp_min * 60)
    assert bench.generate_queue(CFG, 50, night=night, profile="dense")[0] == \
        bench.generate_queue(CFG, 50, night=night, profile="dense")[0]  # deterministic for a seed
    with pytest.raises(ValueError, match="profile"):
        bench.generate_queue(CFG, 5, profile="sparse")


def _row(total, obj, improved, load=1.0, overrun_limit=10.0):
    return {"profile": "standard", "requests": 500, "time_limit_s": overrun_limit, "total_s": total,
            "overrun": total / overrun_limit - 1, "gap": 0.01, "vs_greedy": 0.1, "peak_rss_mib": 200.0,
            "objective": obj, "bound": 27.0, "greedy_objective": 22.0, "status": "FEASIBLE", "entries": 12,
            "dark_fraction_used": 0.9, "mean_airmass": 1.2, "cpsat": "skipped", "cpsat_improved": improved,
            "load_average": [load, load, load], "timings": {"sky": 0.3, "feasibility": 0.1, "model": 0.2,
                                                             "solve": 8.0, "check": 0.01}, "baseline_rss_mib": 150.0}


def test_summary_takes_medians_counts_cpsat_and_reports_the_worst_overrun():
    s = bench.summarise([_row(9.0, 26.0, False, 1.5), _row(10.3, 26.2, True, 4.0), _row(9.5, 26.1, False, 2.0)])
    assert s["total_s"] == 9.5 and s["objective"] == 26.1 and s["runs"] == 3
    assert s["max_overrun"] == pytest.approx(0.03) and s["cpsat_improved"] == 1
    assert s["load_average_1min"] == [1.5, 4.0]
    assert s["objective_spread"] == pytest.approx(0.2 / 26.1)


def test_report_names_every_column_and_marks_missed_targets(tmp_path):
    rows = [_row(9.0, 26.0, False), _row(10.3, 26.2, True), _row(9.5, 26.1, False)]
    data = {"machine": "test", "night": "2026-12-05", "n_times": 615, "step_s": 60, "dark_hours": 8.4,
            "effort": None, "seed": 0, "runs": 3, "runs_all": rows, "summary": [bench.summarise(rows)],
            "replans": [],
            "commands": {"requests": 500, "runs": 5, "via": "nightplan", "load_average": [0.5, 0.5, 0.5],
                         "commands": {"status": {"median_s": 0.62, "min_s": 0.6, "max_s": 0.7},
                                      "--help": {"median_s": 0.11, "min_s": 0.1, "max_s": 0.12}}}}
    bench.write_docs(tmp_path, data)
    md = (tmp_path / "benchmarks.md").read_text()
    assert "MISSED: `nightplan status` (500 requests) in 0.62 s (target 0.5 s)" in md
    assert "met: `nightplan --help` (500 requests) in 0.11 s" in md and "`nightplan status`: 0.62 s (0.60-0.70)" in md
    for col in ("total s", "overrun", "gap", "vs greedy", "CP-SAT better", "peak RSS MiB", "load"):
        assert col in md
    assert "MISSED: standard 500: largest overrun +3.0 %" in md  # 10.3 s on a 10 s limit
    assert "met: standard 500 end to end in 9.5 s" in md
    saved = json.loads((tmp_path / "benchmarks.json").read_text())
    assert len(saved["runs_all"]) == 3 and saved["summary"][0]["cpsat_improved"] == 1


@pytest.mark.slow
def test_benchmark_runs_end_to_end_under_an_effort(tmp_path):
    proc = subprocess.run([sys.executable, "-m", "scheduler.bench", "--profile", "dense", "--sizes", "100",
                           "--runs", "1", "--effort", "1", "--spread-runs", "0", "--out", str(tmp_path)],
                          capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr[-2000:]
    data = json.loads((tmp_path / "benchmarks.json").read_text())
    row = data["runs_all"][0]
    assert row["profile"] == "dense" and row["requests"] == 100 and row["violations"] == 0
    assert row["objective"] >= row["greedy_objective"] - 1e-9 and row["overrun"] is None
    assert "dense" in (tmp_path / "benchmarks.md").read_text()
    # the commands, timed in new processes on a 500-request SQLite file (the times are not judged here)
    cm = data["commands"]
    assert cm["requests"] == 500 and set(cm["commands"]) == {"--help", "request add", "request list --json", "status"}
    assert all(0 < t["min_s"] <= t["median_s"] <= t["max_s"] for t in cm["commands"].values())
