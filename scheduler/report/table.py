"""Terminal views of a plan document (rich): the night's summary, the entry table, `next`.

Reads only the plain document from report.export.plan_document; prints, computes nothing new.
Names, reasons and sources in it are user text: shown through report.safe_text.
"""

from __future__ import annotations

from datetime import datetime
from typing import Any

from rich.console import Console
from rich.table import Table
from rich.text import Text

from scheduler.report.safe_text import SafeTable, clean


def _t(s: str | None) -> datetime | None:
    return None if s is None else datetime.fromisoformat(s.replace("Z", "+00:00"))


def hm(s: str | None) -> str:
    """'HH:MM' of an ISO time (UTC or with an offset, shown in its own zone)."""
    t = _t(s)
    return "--:--" if t is None else t.strftime("%H:%M")


def _f(x: Any, fmt: str, dash: str = "-") -> str:
    return dash if x is None else fmt.format(x)


def _pct(x: float | None) -> str:
    return "-" if x is None else f"{100.0 * x:.1f} %"


def summary_lines(doc: dict[str, Any]) -> list[str]:
    """The night's summary above the table: what was planned, how well, on what assumptions."""
    p, n, sm, c = doc["plan"], doc["night"], doc["summary"], doc["plan"]["conditions"]
    state = "active" if p["active"] else f"superseded {p['superseded_at'] or ''}".strip()
    lines = [
        f"Plan version {p['version']} ({state}) for the night of {n['date']} at {doc['site']['name']}",
        f"  reason: {p['reason']}   built {p['created_at']}, planned from {p['planned_from']}",
        f"  night {hm(n['start'])}-{hm(n['end'])} UTC ({hm(n['start_local'])}-{hm(n['end_local'])} local, "
        f"{doc['site']['timezone']}); dark {hm(n['astronomical_dusk'])}-{hm(n['astronomical_dawn'])} UTC = "
        f"{n['dark_hours']:.2f} h",
        f"  {sm['entries']} entries, {sm['scheduled_hours']:.2f} h scheduled; {sm['dark_hours_used']:.2f} h of the "
        f"{sm['dark_hours']:.2f} dark hours used ({_pct(sm['dark_fraction_used'])}); transitions "
        f"{sm['transition_hours']:.2f} h (slew {sm['slew_hours']:.2f} h); idle {sm['idle_hours']:.2f} h",
        f"  solver {p['solver_status']}: objective {_f(p['objective'], '{:.3f}')}, bound {_f(p['bound'], '{:.3f}')}, "
        f"gap {_pct(p['gap'])}, greedy {_f(p['greedy_objective'], '{:.3f}')}, {_f(p['runtime_s'], '{:.1f}')} s; "
        f"{sm['unscheduled']} request{'' if sm['unscheduled'] == 1 else 's'} unscheduled"
        + (f" of {sm['queue_size']} in the queue" if sm.get("queue_size") is not None else ""),
    ]
    if c["report_id"] is None:
        lines.append(f"  conditions: {c['note']}")
    else:
        cov = c["covered_fraction"]
        older = [str(i) for i in c.get("report_ids") or [] if i != c["report_id"]]
        lines.append(f"  conditions assumed: report {c['report_id']} from {c['source']}, issued {c['issued_at']}"
                     + (f" (and, where it is silent, report{'s' if len(older) > 1 else ''} {', '.join(older)})"
                        if older else "")
                     + f"; covers {_pct(cov)} of the night" + ("" if cov is None or cov >= 0.999 else
                                                              " (defaults elsewhere)"))
    if c.get("warning"):
        lines.append(f"  warning: {c['warning']}")
    return lines


def entry_table(doc: dict[str, Any]) -> Table:
    tz = doc["site"]["timezone"]
    t = SafeTable(title=None, show_lines=False, header_style="bold", pad_edge=False)
    for name, just in (("UTC", "left"), ("local", "left"), ("id", "right"), ("target", "left"), ("prog", "left"),
                       ("band", "left"), ("exp s", "right"), ("airmass", "right"), ("FWHM\"", "right"),
                       ("PWV mm", "right"), ("trans", "right"), ("moon°", "right"), ("merit", "right")):
        t.add_column(name, justify=just, no_wrap=True)
    for e in doc["entries"]:
        am = f"{e['airmass_start']:.2f}-{e['airmass_end']:.2f}" if e["airmass_start"] is not None else "-"
        mark = "*" if e.get("fixed") else ""
        t.add_row(
            f"{hm(e['start'])}-{hm(e['end'])}", f"{hm(e['start_local'])}-{hm(e['end_local'])}",
            f"{e['request_id']}{mark}", e["target"] or "?", e["program"] or "?", e["band"] or "?",
            _f(e["exposure_s"], "{:.0f}"), am, _f(e["predicted_fwhm_arcsec"], "{:.2f}"),
            _f(e["predicted_pwv_mm"], "{:.1f}"), _f(e["transmission"], "{:.2f}"), _f(e["moon_sep_deg"], "{:.0f}"),
            _f(e["merit"], "{:.2f}"),
        )
    t.caption = f"times: UTC and local ({tz}); * = kept from the previous plan (in progress or frozen)"
    return t


def print_plan(console: Console, doc: dict[str, Any], *, unscheduled: bool = False) -> None:
    for line in summary_lines(doc):
        console.print(Text(clean(line)))
    console.print(Text(doc["caution"], style="yellow"))
    console.print(entry_table(doc))
    if unscheduled and doc["unscheduled"]:
        t = SafeTable("id", "target", "prog", "band", "why not", title="unscheduled", header_style="bold")
        for u in doc["unscheduled"]:
            t.add_row(str(u["request_id"]), u["target"] or "?", u["program"] or "?", u["band"] or "?", u["reason"])
        console.print(t)
    elif doc["unscheduled"]:
        console.print(Text(f"{len(doc['unscheduled'])} unscheduled requests: `nightplan plan show --unscheduled` "
                           f"lists them; `nightplan plan why ID` explains one."))


def entry_line(e: dict[str, Any]) -> str:
    """One entry on one line, for plain printing (user text escaped)."""
    return (f"#{e['request_id']} {clean(e['target'])} ({clean(e['program'])}) band {e['band']} {e['exposure_s']:.0f} s; "
            f"{hm(e['start'])}-{hm(e['end'])} UTC ({hm(e['start_local'])}-{hm(e['end_local'])} local); "
            f"RA {e['ra_deg']:.4f} Dec {e['dec_deg']:+.4f}; airmass {e['airmass_start']:.2f}->{e['airmass_end']:.2f}, "
            f"FWHM {_f(e['predicted_fwhm_arcsec'], '{:.2f}')}\", PWV {_f(e['predicted_pwv_mm'], '{:.1f}')} mm")
