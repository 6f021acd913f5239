"""Season benchmark: python -m scheduler.season.bench [--sizes 300,1000] [--nights 3] [--run-nights 6]
[--run-realizations 4] [--workers 1,2] [--memory-nights 14] [--effort N] [--no-write]

Generated queues (scheduler.bench.generate_queue: invented programs and targets) at the
starter config's fictional site, the demo climatology, nights from 2026-12-05.

1. One plan of the first night at each effort 1..4 (300 requests): the default --effort is
   sized from it.
2. Seconds per simulated night (one realization, in this process, no Dask) at each size: wall
   and CPU time, plans built per night, the sky's share.
3. Resident memory night after night in one process with a worker's sky cache.
4. A whole run on a local Dask cluster with 1 and with 2 workers: wall time, speed-up and
   peak memory per worker; and the run asked for (90 nights x 300 requests x 8 realizations)
   extrapolated from it when it is smaller.

Writes the "Season simulation" section of docs/benchmarks.md (between its markers; the rest
of the file is left alone) and docs/benchmarks-season.json.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import time
from datetime import date, timedelta
from pathlib import Path

BEGIN = "<!-- season-benchmark:begin -->"
END = "<!-- season-benchmark:end -->"
START = date(2026, 12, 5)
FULL = (90, 300, 8)  # nights, requests, realizations: the run the figures are asked for


def _setup(n_requests: int, nights: int, effort: int, seed: int = 1):
    from scheduler.bench import generate_queue
    from scheduler.model.config import starter_config
    from scheduler.model.program import ProgramState
    from scheduler.season.engine import SeasonSetup
    from scheduler.season.weather import read_climatology_file

    cfg = starter_config()
    specs, weights = generate_queue(cfg, n_requests)
    clim = read_climatology_file(Path(__file__).resolve().parents[1] / "data" / "demo_queue" / "climatology.csv")
    dates = tuple(START + timedelta(days=k) for k in range(nights))
    progs = tuple(ProgramState(code, weight=weights[code], hours_allocated=40.0) for code in sorted(weights))
    return SeasonSetup(cfg, clim, tuple(specs), progs, dates, seed, effort)


def plan_times(n_requests: int, efforts: list[int]) -> list[dict]:
    """One whole-night plan from a drawn forecast, per effort: wall and CPU seconds."""
    from scheduler.conditions.grid import conditions_on_grid
    from scheduler.planning.pipeline import BuildOptions, build_plan
    from scheduler.season.engine import season_draw
    from scheduler.season.weather import CLEAR, draw_night, realization_seed
    from scheduler.sky.ephemeris import SkyCache, sky_for
    from scheduler.sky.night import night_for

    setup = _setup(n_requests, 1, 1)
    cfg = setup.config
    night = night_for(cfg.site, START, cfg.planning.step_s)
    for r in range(100):  # the first realization whose forecast is a clear night: a full plan
        nd = draw_night(setup.climatology, season_draw(setup, r), 0, night.times_unix, cfg.safety,
                        realization_seed(setup.seed, r))
        if nd.forecast_state == CLEAR:
            break
    cond = conditions_on_grid(nd.forecast.samples(), night.times_unix, cfg.defaults)
    cache = SkyCache()
    sky_for(cfg.site, night, list(setup.specs), cache)
    # one untimed build first: the opportunities count of the queue (the science value's urgency) is
    # then cached, as it is for every plan of a simulation after the first of its worker
    build_plan(cfg, list(setup.specs), setup.planner_programs({}), night, cond, sky=cache,
               options=BuildOptions(effort=1, seed=0))
    out = []
    for e in efforts:
        t0, c0 = time.perf_counter(), time.process_time()
        r = build_plan(cfg, list(setup.specs), setup.planner_programs({}), night, cond, sky=cache,
                       options=BuildOptions(effort=e, seed=0))
        out.append({"effort": e, "wall_s": time.perf_counter() - t0, "cpu_s": time.process_time() - c0,
                    "entries": len(r.entries), "status": r.solver_status, "objective": r.objective})
        print(f"plan of {n_requests} requests at effort {e}: {out[-1]['cpu_s']:.2f} s CPU", flush=True)
    return out


def per_night(n_requests: int, nights: int, effort: int) -> dict:
    """One realization through ``nights`` nights in this process: seconds per night."""
    from scheduler.season.engine import initial_state, simulate_nights
    from scheduler.sky.ephemeris import SkyCache, sky_for
    from scheduler.sky.night import night_for

    setup = _setup(n_requests, nights, effort)
    cache = SkyCache(max_nights=nights + 1)
    state = initial_state(setup, 0)
    rows = []
    for i in range(nights):
        cfg = setup.config
        night = night_for(cfg.site, setup.dates[i], cfg.planning.step_s)
        t0 = time.perf_counter()
        sky_for(cfg.site, night, list(setup.specs), cache)
        sky_s = time.perf_counter() - t0
        t0, c0 = time.perf_counter(), time.process_time()
        state = simulate_nights(setup, state, [i], cache)
        o = state.nights[-1]
        rows.append({"date": o.date.isoformat(), "wall_s": time.perf_counter() - t0 + sky_s,
                     "cpu_s": time.process_time() - c0 + sky_s, "sky_s": sky_s, "builds": o.builds,
                     "done": sum(o.done.values()), "failed": sum(o.failed.values())})
        print(f"{n_requests} requests, night {o.date}: {rows[-1]['cpu_s']:.1f} s CPU, {o.builds} plans", flush=True)
    n = len(rows)
    return {"requests": n_requests, "nights": n, "effort": effort, "nights_detail": rows,
            "wall_s_per_night": sum(r["wall_s"] for r in rows) / n, "cpu_s_per_night": sum(r["cpu_s"] for r in rows) / n,
            "plans_per_night": sum(r["builds"] for r in rows) / n, "sky_s_per_night": sum(r["sky_s"] for r in rows) / n}


def memory_growth(n_requests: int, nights: int, effort: int) -> dict:
    """One realization night after night with a worker's sky cache: resident memory after each night."""
    from scheduler.season.distribute import peak_rss_mib, worker_sky_cache
    from scheduler.season.engine import initial_state, simulate_nights

    setup = _setup(n_requests, nights, effort)
    state = initial_state(setup, 0)
    rss = []
    for i in range(nights):
        state = simulate_nights(setup, state, [i], worker_sky_cache())
        rss.append(_rss_mib())
    print(f"memory, {n_requests} requests over {nights} nights: {rss[0]:.0f} -> {rss[-1]:.0f} MiB", flush=True)
    return {"requests": n_requests, "nights": nights, "rss_mib": rss, "peak_rss_mib": peak_rss_mib()}


def _rss_mib() -> float:
    with open("/proc/self/status", encoding="ascii") as f:
        return next(int(line.split()[1]) / 1024.0 for line in f if line.startswith("VmRSS:"))


def dask_run(n_requests: int, nights: int, realizations: int, workers: int, effort: int) -> dict:
    from scheduler.season.distribute import dask_client, run_realizations
    from scheduler.season.simulate import aggregate

    setup = _setup(n_requests, nights, effort)
    t0 = time.perf_counter()
    with dask_client(None, workers) as client:
        t1 = time.perf_counter()
        outcomes, info = run_realizations(client, setup, realizations)
        t2 = time.perf_counter()
    doc = aggregate(setup.program_infos(), setup.request_infos(), outcomes, start=setup.dates[0], end=setup.dates[-1],
                    seed=setup.seed)
    row = {"requests": n_requests, "nights": nights, "realizations": realizations, "workers": workers,
           "effort": effort, "wall_s": time.perf_counter() - t0, "cluster_start_s": t1 - t0, "simulate_s": t2 - t1,
           "peak_rss_mib": list(info.peak_rss_mib.values()), "sky_nights_computed": list(info.sky_nights_computed.values()),
           "worker_cpu_s": list(info.cpu_s.values()),
           "json_sha": _sha(doc)}
    print(f"dask: {nights} nights x {n_requests} requests x {realizations} realizations on {workers} workers: "
          f"{row['wall_s']:.0f} s (peak RSS {row['peak_rss_mib']} MiB)", flush=True)
    return row


def _sha(doc) -> str:
    import hashlib

    return hashlib.sha256(json.dumps(doc, sort_keys=True).encode()).hexdigest()[:16]


def _load() -> str:
    try:
        a, b, c = os.getloadavg()
        return f"{a:.1f} / {b:.1f} / {c:.1f}"
    except OSError:
        return "unknown"


def section(data: dict) -> str:
    L = [BEGIN, "## Season simulation (`nightplan season simulate`)", "",
         "Generated by `python -m scheduler.season.bench` (this section only). Machine: " + data["machine"]
         + f"; load average while it ran (1 / 5 / 15 min): {data['load_before']} before, {data['load_after']} after. "
         "The machine was shared: wall times include waiting for the CPU, so CPU seconds are given too; "
         "on an idle core a single-process figure's wall time is its CPU time.", ""]
    L += ["**One plan** (the night's first build, 300 requests, a drawn forecast, sky and opportunities cached):", "",
          "| effort | CPU s | wall s | entries | status |", "|---|---|---|---|---|"]
    L += [f"| {r['effort']} | {r['cpu_s']:.2f} | {r['wall_s']:.2f} | {r['entries']} | {r['status']} |" for r in data["plans"]]
    below = [r for r in data["plans"] if r["cpu_s"] <= 1.0]
    above = [r for r in data["plans"] if r["cpu_s"] > 1.0]
    around = " and ".join(f"{r['effort']} ({r['cpu_s']:.2f} s)" for r in ([below[-1]] if below else [])
                          + ([above[0]] if above else []))
    L += ["", f"Default `--effort` {data['default_effort']}. The efforts on either side of 1 s of CPU in this run: "
          f"{around}; from run to run on this shared machine either comes closer, so the default is the one "
          "that searches more. A build under an effort uses one CP-SAT worker, so one plan is one core's "
          "work: on 2 cores two realizations plan at once.", ""]
    L += ["**Seconds per simulated night** (one realization in one process, no Dask; the demo climatology from "
          f"{START}; effort {data['default_effort']}; re-plans at the service's share of it):", "",
          "| requests | nights | CPU s / night | wall s / night | plans / night | sky s / night (first use) |",
          "|---|---|---|---|---|---|"]
    L += [f"| {r['requests']} | {r['nights']} | {r['cpu_s_per_night']:.1f} | {r['wall_s_per_night']:.1f} | "
          f"{r['plans_per_night']:.1f} | {r['sky_s_per_night']:.2f} |" for r in data["per_night"]]
    L += ["", "A night costs its first plan plus every re-plan the service's rule calls for (a report every 30 min; "
          "seeing, PWV and cloud moving past the thresholds re-plan most of them), so seconds per night are "
          "several plans' worth. The sky is computed once per night per worker and read from the cache by every "
          "later realization.", ""]
    mem = data.get("memory")
    if mem:
        r = mem["rss_mib"]
        L += [f"**Memory over a season** (one process, {mem['requests']} requests, the worker's sky cache, "
              f"{mem['nights']} nights): resident {r[0]:.0f} MiB after the first night, "
              f"{r[len(r) // 2]:.0f} MiB after night {len(r) // 2 + 1}, {r[-1]:.0f} MiB after the last; "
              f"peak {mem['peak_rss_mib']:.0f} MiB. The cache holds at most {mem['cache_nights']} nights' skies.", ""]
    runs = data["runs"]
    if runs:
        r0 = runs[0]
        L += [f"**A whole run on a local Dask cluster**: {r0['nights']} nights x {r0['requests']} requests x "
              f"{r0['realizations']} realizations, effort {r0['effort']}:", "",
              "| workers | wall s (total) | cluster start s | simulate s | speed-up (wall) | CPU s per worker | "
              "speed-up (CPU) | peak RSS per worker MiB | nights whose sky each worker computed | outlook digest |",
              "|---|---|---|---|---|---|---|---|---|---|"]
        base = r0["simulate_s"]
        for r in runs:
            L.append(f"| {r['workers']} | {r['wall_s']:.0f} | {r['cluster_start_s']:.1f} | {r['simulate_s']:.0f} | "
                     f"{base / r['simulate_s']:.2f} | {', '.join(f'{v:.0f}' for v in r['worker_cpu_s'])} | "
                     f"{sum(r0['worker_cpu_s']) / max(r['worker_cpu_s']):.2f} | "
                     f"{', '.join(f'{v:.0f}' for v in r['peak_rss_mib'])} | "
                     f"{', '.join(str(v) for v in r['sky_nights_computed'])} | `{r['json_sha']}` |")
        L += ["", "Speed-up (wall) is what this shared machine gave; the other users' processes took CPU from the "
              "workers. Speed-up (CPU) is the 1-worker run's CPU seconds over the busiest worker's in the run: the "
              "speed-up on cores nobody else uses (each worker's CPU seconds include its start, a few seconds)."]
        same = len({r["json_sha"] for r in runs}) == 1
        L += ["", f"The outlook is {'identical' if same else 'NOT identical'} across worker counts (digest of the "
              "JSON document).", ""]
        ex = data.get("extrapolated")
        if ex:
            L += [f"**{FULL[0]} nights x {FULL[1]} requests x {FULL[2]} realizations: not run on this shared machine; "
                  "extrapolated** from the run above in proportion to nights x realizations (each night of each "
                  f"realization is the same work in expectation): about {ex['one_worker_h']:.1f} h with 1 worker and "
                  f"{ex['two_workers_h']:.1f} h with 2 (wall speed-up {ex['speed_up']:.2f} as measured above, on "
                  "a shared machine). On cores nobody else uses, the CPU seconds per night above give about "
                  f"{ex['cpu_one_worker_h']:.1f} h with 1 worker and {ex['cpu_two_workers_h']:.1f} h with 2 "
                  f"(CPU speed-up {ex['cpu_speed_up']:.2f}; realizations share nothing but the setup). "
                  "Peak memory per worker does not grow with the season's length (above): the sky cache keeps "
                  "about two blocks of nights.", ""]
    L += [END]
    return "\n".join(L)


def write(docs: Path, data: dict) -> None:
    (docs / "benchmarks-season.json").write_text(json.dumps(data, indent=2) + "\n", encoding="utf-8")
    md = docs / "benchmarks.md"
    text = md.read_text(encoding="utf-8") if md.exists() else "# Benchmarks\n"
    block = section(data)
    if BEGIN in text and END in text:
        a, b = text.index(BEGIN), text.index(END) + len(END)
        text = text[:a] + block + text[b:]
    else:
        text = text.rstrip("\n") + "\n\n" + block + "\n"
    md.write_text(text, encoding="utf-8")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(prog="python -m scheduler.season.bench", description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="300,1000")
    ap.add_argument("--nights", type=int, default=3, help="nights per size for seconds per night")
    ap.add_argument("--run-nights", type=int, default=6)
    ap.add_argument("--run-realizations", type=int, default=4)
    ap.add_argument("--workers", default="1,2")
    ap.add_argument("--memory-nights", type=int, default=14, help="nights of the memory check (> two blocks)")
    ap.add_argument("--effort", type=int, default=None, help="default: the command's default effort")
    ap.add_argument("--no-write", action="store_true")
    ap.add_argument("--runs-only", action="store_true",
                    help="redo only the Dask runs; the other figures come from the last docs/benchmarks-season.json")
    ap.add_argument("--out", default=str(Path(__file__).resolve().parents[2] / "docs"))
    a = ap.parse_args(argv)
    from scheduler.season import DEFAULT_EFFORT

    effort = a.effort or DEFAULT_EFFORT
    data = {"machine": f"{platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}",
            "load_before": _load(), "default_effort": DEFAULT_EFFORT}
    if a.runs_only:
        last = json.loads((Path(a.out) / "benchmarks-season.json").read_text(encoding="utf-8"))
        data.update({k: last[k] for k in ("plans", "per_night", "memory")})
        data["load_before"] = last["load_before"]
    else:
        data["plans"] = plan_times(300, [1, 2, 3, 4])
        data["per_night"] = [per_night(int(n), a.nights, effort) for n in a.sizes.split(",") if n.strip()]
        from scheduler.season.distribute import worker_sky_cache

        data["memory"] = {**memory_growth(300, a.memory_nights, effort), "cache_nights": worker_sky_cache().max_nights}
    data["runs"] = [dask_run(300, a.run_nights, a.run_realizations, int(w), effort) for w in a.workers.split(",")]
    if data["runs"]:
        r1 = data["runs"][0]
        scale = (FULL[0] * FULL[2]) / (r1["nights"] * r1["realizations"])
        speed = r1["simulate_s"] / data["runs"][-1]["simulate_s"]
        cpu_speed = sum(r1["worker_cpu_s"]) / max(data["runs"][-1]["worker_cpu_s"])
        if scale > 1:
            cpu = next(r["cpu_s_per_night"] for r in data["per_night"] if r["requests"] == 300)
            data["extrapolated"] = {"scale": scale, "one_worker_h": r1["simulate_s"] * scale / 3600,
                                    "two_workers_h": r1["simulate_s"] * scale / speed / 3600, "speed_up": speed,
                                    "cpu_one_worker_h": cpu * FULL[0] * FULL[2] / 3600,
                                    "cpu_two_workers_h": cpu * FULL[0] * FULL[2] / cpu_speed / 3600,
                                    "cpu_speed_up": cpu_speed}
    data["load_after"] = _load()
    if not a.no_write:
        write(Path(a.out), data)
    print(json.dumps({k: v for k, v in data.items() if k not in ("per_night",)}, default=str)[:3000])
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
