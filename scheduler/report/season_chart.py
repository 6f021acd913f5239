"""Charts of the season outlook (`nightplan season simulate --out DIR`), from its JSON document.

- completion per program: the mean share of its queued work done, with the 10-90 % range over
  realizations, programs grouped by tier;
- cumulative charged hours through the season, by tier: the mean and the 10-90 % band.

Colours: the Okabe-Ito palette (Okabe & Ito 2008, "Color Universal Design"), chosen to stay
distinguishable with the common colour-vision deficiencies. Matplotlib's object API (no
pyplot, no display, no global state).
"""

from __future__ import annotations

from datetime import date
from pathlib import Path
from typing import Any, Mapping

OKABE_ITO = ("#0072B2", "#E69F00", "#009E73", "#CC79A7", "#56B4E9", "#D55E00", "#F0E442", "#000000")
CAUTION = "Statistics of the site's weather, not a forecast; plans are advisory."


def _tier_colour(tier: Any, tiers: list[str]) -> str:
    key = "none" if tier is None else str(tier)
    return OKABE_ITO[tiers.index(key) % len(OKABE_ITO)] if key in tiers else OKABE_ITO[-1]


def _tiers(doc: Mapping[str, Any]) -> list[str]:
    return list(doc.get("cumulative_charged_h_by_tier", {}).get("tiers", {}))


def completion_chart(doc: Mapping[str, Any], path: str | Path) -> None:
    from matplotlib.figure import Figure

    progs = [p for p in doc["programs"] if p["completion"]["mean"] is not None]
    tiers = _tiers(doc)
    fig = Figure(figsize=(9.0, max(2.5, 0.45 * len(progs) + 1.6)), dpi=110)
    ax = fig.add_subplot(1, 1, 1)
    y = list(range(len(progs)))[::-1]
    means = [100 * p["completion"]["mean"] for p in progs]
    lo = [100 * (p["completion"]["mean"] - p["completion"]["p10"]) for p in progs]
    hi = [100 * (p["completion"]["p90"] - p["completion"]["mean"]) for p in progs]
    colours = [_tier_colour(p["tier"], tiers) for p in progs]
    ax.barh(y, means, color=colours, height=0.6)
    ax.errorbar(means, y, xerr=[lo, hi], fmt="none", ecolor="#333333", capsize=4, linewidth=1.2)
    ax.set_yticks(y, [f"{p['code']} (tier {p['tier'] if p['tier'] is not None else '-'})" for p in progs])
    ax.set_xlim(0, 105)
    ax.set_xlabel("completion: share of the work queued at the season's start that gets done (%)")
    ax.set_title(f"Season outlook {doc['from']} to {doc['to']}: completion per program\n"
                 f"bar: mean; whiskers: 10-90 % of {doc['realizations']} realizations", fontsize=10)
    ax.grid(axis="x", color="#dddddd")
    ax.set_axisbelow(True)
    fig.text(0.01, 0.01, CAUTION, fontsize=8, color="#555555")
    fig.tight_layout(rect=(0, 0.04, 1, 1))
    fig.savefig(str(path), format="png")


def charged_by_tier_chart(doc: Mapping[str, Any], path: str | Path) -> None:
    from matplotlib.figure import Figure

    cum = doc["cumulative_charged_h_by_tier"]
    dates = [date.fromisoformat(d) for d in cum["dates"]]
    tiers = list(cum["tiers"])
    fig = Figure(figsize=(9.0, 4.8), dpi=110)
    ax = fig.add_subplot(1, 1, 1)
    for t in tiers:
        v = cum["tiers"][t]
        c = _tier_colour(None if t == "none" else t, tiers)
        label = "no tier" if t == "none" else f"tier {t}"
        ax.plot(dates, v["mean"], color=c, linewidth=2, label=f"{label} (mean)", marker="o" if len(dates) < 15 else None)
        ax.fill_between(dates, v["p10"], v["p90"], color=c, alpha=0.25, linewidth=0, label=f"{label} (10-90 %)")
    ax.set_ylabel("charged hours since the season's start")
    ax.set_xlabel("night (local evening date)")
    ax.set_title(f"Season outlook {doc['from']} to {doc['to']}: cumulative charged hours by tier "
                 f"({doc['realizations']} realizations)", fontsize=10)
    ax.grid(color="#dddddd")
    ax.set_axisbelow(True)
    top = max((max(v["p90"], default=0.0) for v in cum["tiers"].values()), default=0.0)
    ax.set_ylim(0, max(1.0, 1.15 * top))
    if tiers:
        ax.legend(fontsize=8, loc="best")
    from matplotlib.dates import DateFormatter, DayLocator

    ax.xaxis.set_major_locator(DayLocator(interval=max(1, (len(dates) + 7) // 8)))  # whole nights, about 8 labels
    ax.xaxis.set_major_formatter(DateFormatter("%Y-%m-%d"))
    fig.autofmt_xdate()
    fig.text(0.01, 0.01, CAUTION, fontsize=8, color="#555555")
    fig.tight_layout(rect=(0, 0.04, 1, 1))
    fig.savefig(str(path), format="png")
