"""A record (``record.py``) as a PDF: matplotlib figures on A4 pages (``PdfPages``).

    page 1   the item, the span or episode, the caution, each level's outcome (first pass, the
             deadline made or missed, time and degree-minutes beyond, the budget used), the mean
             kinetic temperature, and a picture of the readings with the levels and deadlines
    then     the forecast history (what was forecast when, and how it turned out), the alerts
             with their deliveries and the acknowledgements, and the readings

Times are local with their zone; temperatures in the item's unit.  Long tables are thinned to
fit a few pages, saying so; the CSV and JSON forms carry every row.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from thermeta.daemon.timefmt import duration, local_clock
from thermeta.daemon.units import UNIT_SIGN
from thermeta.daemon.views.record import Record

A4 = (8.27, 11.69)  # inches
LINES_PER_PAGE = 62
MAX_FORECAST_ROWS = 120
MAX_READING_ROWS = 2000
C_READ, C_LEVEL, C_TARGET, C_DEADLINE, C_START = "#2f6f8f", "#b3261e", "#2e7d32", "#7a5c99", "#555"


def _t(epoch_s: float | None) -> str:
    return local_clock(epoch_s, with_date=True) if epoch_s is not None else "-"


def _temp(v: float | None, sign: str) -> str:
    return "-" if v is None else f"{v:.1f} {sign}"


def _outcome(d: dict[str, Any]) -> str:
    if d.get("made") is True:
        return "made"
    if d.get("made") is False:
        return "MISSED"
    if d.get("deadline_at_s") is not None:
        return "open"
    return ""


def summary_lines(rec: Record) -> list[str]:
    """The first page's text: one level a line, then the episode's figures."""
    sign = UNIT_SIGN.get(rec.unit, rec.unit)
    out = [
        f"{'level':<12} {'kind':<6} {'threshold':>10} {'side':<6} {'first passed':<22} "
        f"{'deadline':<22} {'outcome':<7}"
    ]
    for d in rec.levels:
        out.append(
            f"{d['name'][:12]:<12} {d['kind']:<6} {_temp(d['threshold'], sign):>10} "
            f"{d['side'] or '?':<6} {_t(d['first_passed_at_s']):<22} "
            f"{_t(d['deadline_at_s']):<22} {_outcome(d):<7}"
        )
    out.append("")
    for d in rec.levels:
        if "beyond_s" in d:
            line = (
                f"beyond {d['name']} ({d['side']} {_temp(d['threshold'], sign)}): "
                f"{duration(d['beyond_s'])}, {d['degree_minutes']:.1f} {sign}·min"
            )
            b = d.get("budget")
            if b:
                line += (
                    f"; budget {duration(b['allowed_s'])}: used "
                    f"{duration(b['used_s'])}, left {duration(b['left_s'])}"
                )
            out.append(line)
    mkt = "-" if rec.mkt is None else f"{rec.mkt:.2f} {sign}"
    out.append(
        f"mean kinetic temperature {mkt} (USP <1079.2>, dH/R = 10,000 K); "
        f"readings {len(rec.readings)}, covering {duration(rec.covered_s)}"
        + (f", gaps {duration(rec.gap_s)}" if rec.gap_s else "")
    )
    return out


def forecast_lines(rec: Record) -> list[str]:
    """The forecasts made while each level was still ahead, thinned by refit (all levels of a
    refit kept together)."""
    ahead = [
        r
        for r in rec.forecasts
        if r["forecast_at_s"] is not None and r["state"] not in ("reached", "crossed", "missed")
    ]
    made = sorted({r["made_at_s"] for r in ahead})
    step = max(1, math.ceil(len(ahead) / MAX_FORECAST_ROWS))
    keep = set(made[::step])
    rows = [r for r in ahead if r["made_at_s"] in keep]
    out = [
        f"{'made':<22} {'level':<10} {'state':<11} {'forecast':<22} {'90 % from':<11} "
        f"{'to':<11} {'actual':<11} {'error':>9}"
    ]
    for r in rows:
        err = r.get("error_s")
        err_t = "" if err is None else ("-" if err < 0 else "+") + duration(abs(err))
        out.append(
            f"{_t(r['made_at_s']):<22} {str(r['level'])[:10]:<10} {str(r['state'])[:11]:<11} "
            f"{_t(r['forecast_at_s']):<22} {local_clock(r['lo_at_s']):<11} "
            f"{local_clock(r['hi_at_s']) if r['hi_at_s'] else 'no bound':<11} "
            f"{local_clock(r['actual_at_s']):<11} {err_t:>9}"
        )
    if step > 1:
        out.append(f"(every {step}th of {len(made)} refits; the CSV and JSON forms hold them all)")
    return out if rows else out + ["(none ahead of a level)"]


def alert_lines(rec: Record) -> list[str]:
    out = []
    for a in rec.alerts:
        sent = ", ".join(a["delivered"]) or ("waiting" if a["pending"] else "no hook")
        out.append(f"{_t(a['at_s'])} {a['event']} ({a['level'] or 'item'}) -> {sent}")
        out += _wrap("    " + a["sentence"], 100)
    for k in rec.acks:
        note = f": {k['note']}" if k.get("note") else ""
        out.append(f"{_t(k['at_s'])} incident {k['incident']} acknowledged by {k['by']}{note}")
    return out or ["(none)"]


def reading_lines(rec: Record) -> list[str]:
    sign = UNIT_SIGN.get(rec.unit, rec.unit)
    rows = rec.readings
    step = max(1, math.ceil(len(rows) / MAX_READING_ROWS))
    cells = [f"{_t(t):<22} {v:8.2f} {sign}" for t, v in rows[::step]]
    per_line = 3
    out = ["  ".join(cells[i : i + per_line]) for i in range(0, len(cells), per_line)]
    if step > 1:
        out.append(
            f"(every {step}th of {len(rows)} readings; the CSV and JSON forms hold them all)"
        )
    return out or ["(none)"]


def _wrap(text: str, width: int) -> list[str]:
    import textwrap

    return textwrap.wrap(text, width, subsequent_indent="    ") or [text]


def _text_pages(pdf: Any, title: str, lines: list[str], caution: str) -> None:
    from matplotlib.figure import Figure

    for i in range(0, max(1, len(lines)), LINES_PER_PAGE):
        fig = Figure(figsize=A4)
        fig.text(0.06, 0.965, title + (" (continued)" if i else ""), fontsize=12, weight="bold")
        chunk = lines[i : i + LINES_PER_PAGE]
        fig.text(0.06, 0.94, "\n".join(chunk), fontsize=7, family="monospace", va="top")
        fig.text(0.06, 0.02, caution, fontsize=7, color="#444444")
        pdf.savefig(fig)


def _plot(fig: Any, rec: Record, rect: tuple[float, float, float, float]) -> None:
    import matplotlib.dates as mdates
    from thermeta.daemon.views.plotting import _local_tz, _to_date, _to_dates

    ax = fig.add_axes(rect)
    sign = UNIT_SIGN.get(rec.unit, rec.unit)
    if rec.readings:
        t = np.array([r[0] for r in rec.readings])
        y = np.array([r[1] for r in rec.readings])
        ax.plot(_to_dates(t), y, "-", lw=1.3, color=C_READ, label="readings", gid="readings")
    for d in rec.levels:
        colour = C_TARGET if d["kind"] == "target" else C_LEVEL
        ax.axhline(d["threshold"], color=colour, lw=1.0, ls="--", gid="level")
        ax.annotate(
            f"{d['name']} {d['threshold']:g} {sign}",
            (0.0, d["threshold"]),
            xycoords=("axes fraction", "data"),
            textcoords="offset points",
            xytext=(3, 3),
            fontsize=7,
            color=colour,
        )
        if d.get("deadline_at_s") is not None and rec.since <= d["deadline_at_s"] <= rec.until:
            ax.axvline(_to_date(d["deadline_at_s"]), color=C_DEADLINE, lw=1.0, ls=":")
            ax.annotate(
                f"{d['name']} due",
                (_to_date(d["deadline_at_s"]), 1.0),
                xycoords=("data", "axes fraction"),
                textcoords="offset points",
                xytext=(2, -10),
                fontsize=7,
                color=C_DEADLINE,
            )
        if d.get("first_passed_at_s") is not None:
            ax.plot(
                [_to_date(d["first_passed_at_s"])],
                [d["threshold"]],
                "o",
                ms=6,
                color=colour,
                mec="white",
                gid="passed",
            )
    if rec.episode is not None:
        ax.axvline(_to_date(rec.since), color=C_START, lw=1.0, ls="-.", label="episode start")
    tz = _local_tz()
    ax.xaxis.set_major_locator(mdates.AutoDateLocator(tz=tz, minticks=4, maxticks=9))
    ax.xaxis.set_major_formatter(mdates.DateFormatter("%H:%M", tz=tz))
    ax.set_xlim(_to_date(rec.since), _to_date(rec.until))
    ax.set_ylabel(f"temperature ({sign})")
    ax.set_xlabel("local time")
    ax.grid(True, alpha=0.3)
    ax.legend(loc="upper right", fontsize=7, frameon=False)


def write_pdf(rec: Record, path: str) -> None:
    """The record as a PDF at ``path``."""
    from matplotlib.backends.backend_pdf import PdfPages
    from matplotlib.figure import Figure

    with PdfPages(path) as pdf:
        fig = Figure(figsize=A4)
        fig.text(0.06, 0.955, f"thermeta record: {rec.item}", fontsize=16, weight="bold")
        head = [f"from {_t(rec.since)} to {_t(rec.until)}; made {_t(rec.made_at)}"]
        if rec.site:
            head.append(f"site {rec.site}")
        if rec.episode:
            e = rec.episode
            name = f" ({e['batch']})" if e.get("batch") else ""
            head.append(
                f"episode {e['id']}{name}: started {_t(rec.since)} by {e['started_by']}"
                + (f", ended {_t(rec.until)} by {e['ended_by']}" if e.get("ended_at") else "")
            )
        fig.text(0.06, 0.93, "\n".join(head), fontsize=8.5, va="top")
        fig.text(
            0.06,
            0.875,
            rec.caution,
            fontsize=9,
            weight="bold",
            color="#8a1c1c",
            wrap=True,
            va="top",
        )
        fig.text(
            0.06, 0.835, "\n".join(summary_lines(rec)), fontsize=7, family="monospace", va="top"
        )
        _plot(fig, rec, (0.1, 0.08, 0.84, 0.5))
        fig.text(0.06, 0.02, "page 1 · " + rec.caution, fontsize=7, color="#444444")
        pdf.savefig(fig)
        _text_pages(pdf, "Forecast history", forecast_lines(rec), rec.caution)
        _text_pages(pdf, "Alerts and acknowledgements", alert_lines(rec), rec.caution)
        _text_pages(pdf, "Readings", reading_lines(rec), rec.caution)
        d = pdf.infodict()
        d["Title"] = f"thermeta record: {rec.item}"
        d["Creator"] = "thermeta"
