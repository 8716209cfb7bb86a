"""The bench's tables (markdown, the README's block) and its figure."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from forecast_bench import misspecified
from forecast_bench.judge import Check, fmt, series, tally
from forecast_bench.params import (
    CRB_FACTOR,
    GAP_CAP,
    IRREGULAR,
    MIN,
    PARAMS,
    PROGRESS,
    QUANTUM,
    SPIKES,
    TARGETS,
    VARIANT_FAMILIES,
    VARIANTS,
)
from forecast_bench.stats import med_p90, pooled

README_BEGIN = "<!-- bench_forecast: begin (written by scripts/bench_forecast.py --readme) -->"
README_END = "<!-- bench_forecast: end -->"


def _mp(pair) -> str:
    if pair is None:
        return "-"
    return f"{fmt(pair[0])} / {fmt(pair[1])}"


def _three(summary: dict, fam: str, var: str, key: str, idx: int | None = None) -> str:
    vals = series(summary, fam, var, key, idx)
    return " / ".join(fmt(v) for v in vals) if vals else "-"


def curve_table(summary: dict) -> list[str]:
    """Where the model is right: ours beside the Cramer-Rao-limited figures."""
    lines = [
        "| family | variant | median 25 / 50 / 75 % | CRB-limited median | p90 | CRB-limited p90 "
        "| spread / CRB | 90 % coverage |",
        "|---|---|---|---|---|---|---|---|",
    ]
    for fam in VARIANT_FAMILIES:
        for var in VARIANTS:
            if (fam, var, PROGRESS[0]) not in summary:
                continue
            spread = " / ".join(fmt(v, "ratio") for v in series(summary, fam, var, "crb"))
            lines.append(
                f"| {fam} | {var} | {_three(summary, fam, var, 'median')} | "
                f"{_three(summary, fam, var, 'crb_limited', 0)} | "
                f"{_three(summary, fam, var, 'p90')} | "
                f"{_three(summary, fam, var, 'crb_limited', 1)} | {spread} | "
                f"{_three(summary, fam, var, 'cover')} |"
            )
    return lines


def misspecified_table(summary: dict) -> list[str]:
    """Objects that are not one exponential: ours beside the two baselines, all points pooled."""
    lines = [
        '| family | ambient | ours median / p90 | straight line | plain curve_fit | "never" | '
        "90 % coverage |",
        "|---|---|---|---|---|---|---|",
    ]
    for fam in misspecified.FAMILIES:
        for mode in misspecified.MODES:
            name = f"{fam}/{mode}"
            ours = pooled(summary, name)
            if ours.size == 0:
                continue
            rows = [summary[k] for k in summary if k[0] == name]
            n = sum(r["n"] for r in rows)
            cover = sum(r["cover"] * r["n"] for r in rows) / n if n else math.nan
            lines.append(
                f"| {fam} | {mode} | {_mp(med_p90(ours))} | "
                f"{_mp(med_p90(pooled(summary, name, 'linear_errors')))} | "
                f"{_mp(med_p90(pooled(summary, name, 'lsq3_errors')))} | "
                f"{int(np.sum(ours >= 10.0))} of {ours.size} | {fmt(cover)} |"
            )
    return lines


def other_lines(summary: dict, cs: list[Check]) -> list[str]:
    by = {c.target: c for c in cs}
    lines = []
    for name, label in (
        ("regime change", "door opened and closed"),
        ("never-crossing asymptote", "never-crossing asymptotes"),
        ("healthy cycling cold room", "healthy cycling room"),
    ):
        c = by.get(name)
        if c is not None:
            lines.append(f"- {label}: {c.figure} {c.shown()} ({c.limit}: {c.result()})")
    return lines


def targets_table(cs: list[Check]) -> list[str]:
    lines = [
        "| target | figure | measured (25 / 50 / 75 %) | limit | result |",
        "|---|---|---|---|---|",
    ]
    for c in cs:
        lines.append(f"| {c.target} | {c.figure} | {c.shown()} | {c.limit} | {c.result()} |")
    return lines


def detail_table(summary: dict) -> list[str]:
    lines = [
        "| family | variant | seen | n | median | p90 | no ETA | 90 % cover | spread/CRB | "
        "CRB-limited med / p90 | linear med / p90 | LSQ-3 med / p90 | two-reading med / p90 |",
        "|---|---|---|---|---|---|---|---|---|---|---|---|---|",
    ]
    names = [*VARIANT_FAMILIES] + [
        f"{f}/{m}" for f in misspecified.FAMILIES for m in misspecified.MODES
    ]
    for fam in names:
        for var in VARIANTS:
            for frac in PROGRESS:
                r = summary.get((fam, var, frac))
                if r is None:
                    continue
                lines.append(
                    f"| {fam} | {var} | {100 * frac:.0f} % | {r['n']} | {fmt(r['median'])} | "
                    f"{fmt(r['p90'])} | {r['no_eta']} | {fmt(r['cover'])} | "
                    f"{fmt(r['crb'], 'ratio') if math.isfinite(r['crb']) else '-'} | "
                    f"{_mp(r.get('crb_limited'))} | {_mp(r.get('linear'))} | "
                    f"{_mp(r.get('lsq3'))} | {_mp(r.get('two_reading'))} |"
                )
    reg = sorted(k for k in summary if k[0] == "regime_door")
    if reg:
        lines += [
            "",
            "| door: after it closed | n | median | p90 | 90 % cover |",
            "|---|---|---|---|---|",
        ]
        for k in reg:
            r = summary[k]
            lines.append(
                f"| {k[2] / MIN:g} min | {r['n']} | {fmt(r['median'])} | {fmt(r['p90'])} | "
                f"{fmt(r['cover'])} |"
            )
    return lines


def params_table() -> list[str]:
    lines = ["| family | parameter ranges (uniform; log = log-uniform) |", "|---|---|"]
    specs = {**PARAMS, **{f: {**misspecified.COMMON, **p} for f, p in misspecified.PARAMS.items()}}
    for fam, spec in specs.items():
        parts = []
        for k, v in spec.items():
            if isinstance(v, tuple) and v and v[0] in ("log", "choice"):
                parts.append(f"{k} {v[0]} {', '.join(f'{x:g}' for x in v[1:])}")
            elif isinstance(v, tuple) and len(v) == 2:
                parts.append(f"{k} {v[0]:g} to {v[1]:g}")
            else:
                parts.append(f"{k} {v}")
        lines.append(f"| {fam} | {'; '.join(parts)} |")
    return lines


def markdown(summary: dict, cs: list[Check], meta: dict) -> str:
    n_pass, n_fail, n_na = tally(cs)
    head = [
        "# Forecast quality bench",
        "",
        f"Produced by `{meta['command']}` ({meta['elapsed_s']:.0f} s, {meta['jobs']} worker(s), "
        f"seed {meta['seed']}, {meta['cases']}, tree {meta['commit']}). Targets: {n_pass} PASS, "
        f"{n_fail} FAIL, {n_na} not measurable.",
        "",
        "Relative ETA error = |ETA - true ETA| / true ETA, the ETA counted from the newest "
        "reading, at 25 / 50 / 75 % of the time from the start to the true crossing; a missing "
        "ETA where the truth crosses counts as 1000 %. Where the model is right, each figure is "
        f"judged against {CRB_FACTOR:g} x the figure an efficient unbiased estimator would reach "
        "on the same cases (CRB-limited: |N(0, sd_CRB)| / true ETA, pooled; spread / CRB = "
        "median |z| / 0.6745 with z = (ETA - true) / sd_CRB). Coverage is judged one-sided where "
        "the interval's late end is open. The misspecified families (truth from solve_ivp, see "
        "scripts/forecast_bench/misspecified.py) are judged against the straight line through "
        "the last 30 min and the plain 3-parameter curve_fit on the same readings.",
        "",
        "Forecasts support decisions; they are not a food-safety plan or a regulatory record. "
        "Local codes and licensed practice decide the limits and actions.",
        "",
        "## Where the model is right",
        "",
        *curve_table(summary),
        "",
        *other_lines(summary, cs),
        "",
        "## Objects that are not one exponential",
        "",
        *misspecified_table(summary),
        "",
        "## Targets",
        "",
        *targets_table(cs),
        "",
        "## Per family and point of progress",
        "",
        *detail_table(summary),
        "",
        "## Scenario parameters (fixed before any result was seen)",
        "",
        *params_table(),
        "",
        f"Curve families: readings quantised to {QUANTUM:g} degC, sampling jitter "
        f"+-{100 * IRREGULAR:.0f} %. Spikes: {100 * SPIKES['spike_frac']:g} % of readings, "
        f"+-{SPIKES['spike_size']:g} degC (0.5-1.5 x). Dropouts: 1 gap (windows under 3 h) or 2, "
        f"each 10-30 min, capped at {100 * GAP_CAP:g} % of the window / number of gaps. The door "
        f"family's figure is {TARGETS['regime_after_s'] / MIN:g} min after the door closed.",
        "",
    ]
    return "\n".join(head)


def short_curve_table(summary: dict) -> list[str]:
    """The README's view where the model is right: the clean readings only, ours beside the
    efficient limit (the full table is in docs/bench_forecast.md)."""
    lines = [
        "| family | median error, 25 / 50 / 75 % of the way | efficient limit | "
        "90 % interval holds the truth |",
        "|---|---|---|---|",
    ]
    for fam in VARIANT_FAMILIES:
        if (fam, "clean", PROGRESS[0]) not in summary:
            continue
        lines.append(
            f"| {fam} | {_three(summary, fam, 'clean', 'median')} | "
            f"{_three(summary, fam, 'clean', 'crb_limited', 0)} | "
            f"{_three(summary, fam, 'clean', 'cover')} |"
        )
    return lines


def short_misspecified_table(summary: dict) -> list[str]:
    """The README's view of the objects that are not one exponential: median / p90, all points
    pooled, ambient given and fitted beside the straight line."""
    lines = [
        "| family | ours, ambient given | ours, ambient fitted | straight line |",
        "|---|---|---|---|",
    ]
    for fam in misspecified.FAMILIES:
        cells = []
        for mode in misspecified.MODES:
            ours = pooled(summary, f"{fam}/{mode}")
            cells.append(_mp(med_p90(ours)) if ours.size else "-")
        line = pooled(summary, f"{fam}/{misspecified.MODES[0]}", "linear_errors")
        if all(c == "-" for c in cells):
            continue
        cells.append(_mp(med_p90(line)) if line.size else "-")
        lines.append(f"| {fam} | {' | '.join(cells)} |")
    return lines


def readme_block(summary: dict, cs: list[Check], meta: dict) -> str:
    """Short: the README says how good the forecasts are; docs/bench_forecast.md has the rest."""
    n_pass, n_fail, n_na = tally(cs)
    failed = sorted({c.target for c in cs if c.ok is False})
    lines = [
        README_BEGIN,
        f"Measured by `{meta['command']}` ({meta['elapsed_s']:.0f} s with {meta['jobs']} "
        f"worker(s), seed {meta['seed']}, tree {meta['commit']}): {n_pass} targets PASS, "
        f"{n_fail} FAIL" + (f", {n_na} not measurable" if n_na else "") + ". Median relative "
        "error of the time to the crossing; the efficient limit is what an unbiased estimator "
        "could reach on the same readings (the Cramér-Rao bound).",
        "",
        *short_curve_table(summary),
        "",
        "Objects that are not one exponential (median / p90 over all points):",
        "",
        *short_misspecified_table(summary),
        "",
        *other_lines(summary, cs),
    ]
    if failed:
        lines += ["", f"Targets not met: {n_fail}, in " + "; ".join(failed) + "."]
    lines += [
        "",
        "Every target with its figure, the variants (spikes, dropouts), the baselines and the "
        "scenario ranges: [docs/bench_forecast.md](docs/bench_forecast.md).",
        README_END,
    ]
    return "\n".join(lines)


def plot(summary: dict, path: Path) -> None:
    """Median error per family against the points of progress, ours and the baselines."""
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib.figure import Figure

    fig = Figure(figsize=(13, 8), dpi=80)
    axes = fig.subplots(2, 4).ravel()
    x = [100 * f for f in PROGRESS]
    for ax, fam in zip(axes, VARIANT_FAMILIES):
        for var, style in zip(VARIANTS, ("-o", "--s", ":^")):
            m = series(summary, fam, var, "median")
            if m:
                ax.plot(x[: len(m)], [100 * v for v in m], style, label=f"thermeta, {var}")
        lim = series(summary, fam, "clean", "crb_limited", 0)
        if lim and all(math.isfinite(v) for v in lim):
            ax.plot(
                x[: len(lim)],
                [100 * v for v in lim],
                "-",
                color="black",
                lw=0.8,
                label="CRB-limited",
            )
        for b, style in (("linear", "-x"), ("lsq3", "-+")):
            m = series(summary, fam, "clean", b, 0)
            if m and all(math.isfinite(v) for v in m):
                ax.plot(x[: len(m)], [100 * v for v in m], style, color="grey", alpha=0.7, label=b)
        ax.set_yscale("log")
        ax.set_title(fam)
        ax.set_xlabel("seen, % of time to crossing")
        ax.set_ylabel("median relative ETA error, %")
        ax.grid(True, which="both", alpha=0.3)
        if ax.get_legend_handles_labels()[0]:
            ax.legend(fontsize=6)
    ax = axes[-1]
    names = [f"{f}/{m}" for f in misspecified.FAMILIES for m in misspecified.MODES]
    meds = [(n, med_p90(pooled(summary, n))[0]) for n in names if pooled(summary, n).size]
    if meds:
        pos = np.arange(len(meds))
        ax.barh(pos, [100 * v for _, v in meds], color="tab:blue", label="thermeta")
        lin = [100 * med_p90(pooled(summary, n, "linear_errors"))[0] for n, _ in meds]
        ax.plot(lin, pos, "x", color="grey", label="linear")
        ax.set_yticks(pos, [n for n, _ in meds], fontsize=6)
        ax.set_xlabel("median error, %")
        ax.set_title("misspecified families")
        ax.legend(fontsize=6)
    fig.tight_layout()
    fig.savefig(path)
