"""Running the bench: the command line, the worker pool, the files it writes."""

from __future__ import annotations

import argparse
import multiprocessing as mp
import os
import sys
import time
from pathlib import Path

from forecast_bench import misspecified
from forecast_bench.judge import Check, checks, tally
from forecast_bench.params import CASES, FAMILIES, QUICK_CASES
from forecast_bench.report import README_BEGIN, README_END, markdown, plot, readme_block
from forecast_bench.runs import run_unit
from forecast_bench.stats import summarise

ROOT = Path(__file__).resolve().parent.parent.parent
ALL_FAMILIES = FAMILIES + misspecified.FAMILIES
# the slow families first, so the pool's tail is short
SLOW = ("centre_", "cycling")


def units_for(families: tuple[str, ...], cases: dict, seed: int) -> list[tuple[str, int, int]]:
    units = []
    for fam in families:
        if fam in misspecified.FAMILIES:
            key = "misspecified"
        elif fam.startswith("centre_"):
            key = "centre"
        else:
            key = fam if fam in cases else "default"
        units += [(fam, i, seed) for i in range(cases[key])]
    units.sort(key=lambda u: 0 if u[0].startswith(SLOW) else 1)
    return units


def _commit() -> str:
    import subprocess

    try:
        out = subprocess.run(
            ["git", "rev-parse", "--short", "HEAD"],
            capture_output=True,
            text=True,
            check=False,
            cwd=ROOT,
            timeout=10,
        )
        return out.stdout.strip() or "unknown"
    except (OSError, subprocess.SubprocessError):
        return "unknown"


def run(
    families: tuple[str, ...], cases: dict, seed: int, jobs: int = 1
) -> tuple[list[dict], float]:
    """Every case of the chosen families; returns the records and the seconds it took."""
    units = units_for(families, cases, seed)
    t0 = time.perf_counter()
    records: list[dict] = []
    if jobs > 1:
        with mp.get_context("fork").Pool(jobs) as pool:
            for recs in pool.imap_unordered(run_unit, units, chunksize=2):
                records += recs
    else:
        for u in units:
            records += run_unit(u)
    return records, time.perf_counter() - t0


def parse_args(argv: list[str] | None) -> argparse.Namespace:
    """Command-line options; a bad value is a one-line error and exit code 2."""
    ap = argparse.ArgumentParser(description="Forecast quality bench")
    ap.add_argument("--quick", action="store_true", help="a few cases per family (smoke run)")
    ap.add_argument("--cases", type=int, help="cases per family (default: 200; see params.CASES)")
    ap.add_argument("--seed", type=int, default=2026)
    ap.add_argument("--families", help=f"comma list of: {', '.join(ALL_FAMILIES)}")
    ap.add_argument(
        "--jobs",
        type=int,
        default=os.cpu_count() or 1,
        help="worker processes (default: one per CPU)",
    )
    ap.add_argument(
        "--readme", action="store_true", help="also rewrite the block in README.md (its markers)"
    )
    ap.add_argument(
        "--figure",
        action="store_true",
        help="also redraw bench_forecast.png (by default only when it does not exist yet)",
    )
    ap.add_argument("--out", default=str(ROOT / "docs"), help="folder for bench_forecast.md/.png")
    args = ap.parse_args(argv)
    args.family_list = ALL_FAMILIES
    if args.families:
        args.family_list = tuple(f.strip() for f in args.families.split(",") if f.strip())
        bad = [f for f in args.family_list if f not in ALL_FAMILIES]
        if bad or not args.family_list:
            ap.exit(
                2,
                f"bench_forecast: unknown family {', '.join(bad) or '(none)'}; "
                f"choose from {', '.join(ALL_FAMILIES)}\n",
            )
    if (args.cases is not None and args.cases < 1) or args.jobs < 1:
        ap.exit(2, "bench_forecast: --cases and --jobs must be >= 1\n")
    args.case_counts = dict(QUICK_CASES if args.quick else CASES)
    if args.cases is not None:
        args.case_counts = {k: args.cases for k in args.case_counts}
    args.command = (
        "python scripts/bench_forecast.py "
        + " ".join(a for a in (argv if argv is not None else sys.argv[1:]))
    ).strip()
    return args


def bench(args: argparse.Namespace) -> tuple[dict, list[Check], str]:
    """Run, summarise, judge the targets, write the table (and the figure); returns all three."""
    sys.path.insert(0, str(ROOT / "scripts"))
    from readme_block import update_readme

    records, elapsed = run(args.family_list, args.case_counts, args.seed, args.jobs)
    summary = summarise(records)
    cs = checks(summary, args.family_list)
    meta = {
        "command": args.command,
        "elapsed_s": elapsed,
        "jobs": args.jobs,
        "seed": args.seed,
        "commit": _commit(),
        "cases": ", ".join(f"{k} {v}" for k, v in args.case_counts.items()) + " cases",
    }
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    text = markdown(summary, cs, meta)
    (out / "bench_forecast.md").write_text(text)
    png = out / "bench_forecast.png"
    if args.figure or not png.exists():
        plot(summary, png)
    if args.readme:
        err = update_readme(
            ROOT / "README.md", readme_block(summary, cs, meta), README_BEGIN, README_END
        )
        if err:
            print(f"bench_forecast: {err}", file=sys.stderr)
    crashed = sum(r["crashed"] for r in summary.values())
    n_pass, n_fail, n_na = tally(cs)
    text += (
        f"\n\n{len(records)} predictor runs in {elapsed:.1f} s with {args.jobs} worker(s); "
        f"targets: {n_pass} PASS, {n_fail} FAIL, {n_na} n/a; predictor exceptions: {crashed}\n"
        f"wrote {out / 'bench_forecast.md'}" + (f" and {png}" if args.figure else "")
    )
    return summary, cs, text


def main(argv: list[str] | None = None) -> int:
    args = parse_args(argv)
    print(bench(args)[2])
    return 0
