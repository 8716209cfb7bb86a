#!/usr/bin/env python3
"""Priors bench (issue 6, section 4): how much earlier a forecast within 10 % appears with a prior
learned from past episodes of the item's class, and whether a wrong prior is overridden.

For each case of a family (the parameter ranges of scripts/bench_forecast.py's PARAMS, fixed there
before any tuning) a class is drawn: its k and ambient.  Eight past episodes of the class (each
episode's k within ~15 % of the class's, 1 sd, its ambient within ~1 degC) are simulated to past
their crossing, fitted WITHOUT a prior and taught to an empty prior exactly as the daemon does
(``predictors.prior.learnable`` / ``learn``).  A new episode of the same class is then forecast on
its first readings, growing, at 34 instants from 2 % to 90 % of the time to its true crossing:

- "within 10 % from": the earliest instant after which every later forecast's ETA is within 10 %
  of the truth, as a share of the time to the crossing and in minutes (median over cases);
- the relative ETA error at 25 / 50 / 75 % of that time (median) and the 90 % interval's coverage,
  with no prior, the right prior, and a wrong prior: a different product, the learned prior's k
  multiplied by 3 or divided by 3 (same spread), ambient as learned; and k x 3 with the ambient
  5 degC too warm (another product in another room; with a given ambient only k is used).

    python scripts/bench_prior.py             # 40 cases per family
    python scripts/bench_prior.py --quick     # 3 cases per family
"""

from __future__ import annotations

import argparse
import math
import sys
import time
from dataclasses import replace
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_forecast import IRREGULAR, MIN, PARAMS, QUANTUM, draw
from thermeta.daemon.simulation import synth
from thermeta.daemon.simulation.synth import Corruption
from thermeta.predictors import forecast
from thermeta.predictors.prior import Prior, learn, learnable

FAMILIES = ("chill_fitted", "warm_fitted", "warm_known")
N_PAST = 8
SD_LOGK_EPISODE = 0.15  # how much one episode's k differs from its class's (1 sd of ln k)
SD_AMBIENT_EPISODE_C = 1.0
GRID = np.unique(np.concatenate([np.geomspace(0.02, 0.9, 31), [0.25, 0.5, 0.75]]))
PROGRESS = (0.25, 0.50, 0.75)
WITHIN = 0.10
MIN_POINTS = 4  # the warming families log every 1-5 min: 8 readings would take up to 40 min
PAST_SPAN = 1.2  # past episodes are seen to 1.2 x their crossing time, and at least ...
PAST_MIN_TAU = 1.0  # ... one time constant (a load past its limit is watched until dealt with)
VARIANTS = ("none", "right", "k x 3", "k / 3", "k x 3, ambient +5")


def episode(
    seed: int, p: dict, k: float, ambient: float, span: float, min_tau: float = 0.0
) -> synth.Synth:
    """One episode lasting span x its time to the crossing (at least min_tau / k), readings as
    in bench_forecast (noise, 0.1 degC steps, +-10 % jitter)."""
    cross = synth.lumped_crossing_s(p["T0"], ambient, k, p["threshold"])
    c = Corruption(noise=p["noise"], quantum=QUANTUM, irregular=IRREGULAR)
    return synth.lumped(
        seed,
        T0=p["T0"],
        ambient=ambient,
        k_per_s=k,
        threshold=p["threshold"],
        duration_s=max(span * cross, min_tau / k),
        dt_s=p["dt_s"],
        corruption=c,
    )


def given_ambient(fam: str, p: dict, ambient: float) -> dict:
    return {"ambient": ambient + p["ambient_error"]} if fam == "warm_known" else {}


def learned_prior(fam: str, rng: np.random.Generator, k_c: float, amb_c: float) -> Prior:
    """Teach an empty prior N_PAST past episodes of the class, as the daemon would."""
    prior = Prior()
    for _ in range(N_PAST):
        p = draw(PARAMS[fam], rng)
        k = k_c * math.exp(SD_LOGK_EPISODE * rng.standard_normal())
        amb = amb_c + SD_AMBIENT_EPISODE_C * rng.standard_normal()
        s = episode(int(rng.integers(2**31)), p, k, amb, PAST_SPAN, PAST_MIN_TAU)
        fc = forecast(
            s.t,
            s.y,
            p["threshold"],
            limit=p["limit"],
            min_points=MIN_POINTS,
            **given_ambient(fam, p, amb),
        )
        if learnable(fc):
            prior = learn(prior, fc)
    return prior


def run_case(fam: str, seed: int) -> dict:
    rng = np.random.default_rng(seed)
    cls = draw(PARAMS[fam], rng)
    k_c, amb_c = 1.0 / cls["tau_s"], cls["ambient"]
    right = learned_prior(fam, rng, k_c, amb_c)
    priors: dict[str, Prior | None] = {
        "none": None,
        "right": right,
        "k x 3": replace(right, logk_mean=right.logk_mean + math.log(3.0)),
        "k / 3": replace(right, logk_mean=right.logk_mean - math.log(3.0)),
        "k x 3, ambient +5": replace(
            right,
            logk_mean=right.logk_mean + math.log(3.0),
            ambient_mean_c=right.ambient_mean_c + 5.0,
        ),
    }
    p = draw(PARAMS[fam], rng)
    k = k_c * math.exp(SD_LOGK_EPISODE * rng.standard_normal())
    amb = amb_c + SD_AMBIENT_EPISODE_C * rng.standard_normal()
    s = episode(int(rng.integers(2**31)), p, k, amb, 1.0)
    cross = synth.lumped_crossing_s(p["T0"], amb, k, p["threshold"])
    t0 = synth.T_START
    out: dict = {"n_episodes": right.n_episodes, "cross_s": cross}
    for name, prior in priors.items():
        errs, cov = [], []
        for f in GRID:
            sel = s.t <= t0 + f * cross
            if sel.sum() < MIN_POINTS:
                errs.append(math.inf)
                cov.append(False)
                continue
            tt, yy = s.t[sel], s.y[sel]
            eta_true = t0 + cross - tt.max()
            fc = forecast(
                tt,
                yy,
                p["threshold"],
                limit=p["limit"],
                min_points=MIN_POINTS,
                prior=prior,
                **given_ambient(fam, p, amb),
            )
            e = math.inf if (not fc.ok or fc.eta_s is None) else abs(fc.eta_s - eta_true) / eta_true
            errs.append(e)
            lo = fc.eta_lo_s if fc.eta_lo_s is not None else math.inf
            hi = fc.eta_hi_s if fc.eta_hi_s is not None else math.inf
            cov.append(fc.ok and fc.eta_s is not None and lo <= eta_true <= hi)
        errs_a = np.array(errs)
        bad = np.nonzero(errs_a > WITHIN)[0]
        first = (
            GRID[0]
            if bad.size == 0
            else (GRID[bad[-1] + 1] if bad[-1] + 1 < GRID.size else math.inf)
        )
        out[name] = {"first": first, "errs": errs_a, "cov": np.array(cov)}
    return out


def summarise(fam: str, cases: list[dict]) -> list[str]:
    idx = [int(np.argmin(np.abs(GRID - f))) for f in PROGRESS]
    cross_min = np.array([c["cross_s"] for c in cases]) / MIN
    rows = []
    for v in VARIANTS:
        first = np.array([c[v]["first"] for c in cases])
        med = float(np.median(first))
        minutes = float(np.median(first * cross_min))
        errs = [float(np.median([c[v]["errs"][i] for c in cases])) for i in idx]
        cov = [float(np.mean([c[v]["cov"][i] for c in cases])) for i in idx]
        never = int(np.sum(~np.isfinite(first)))
        rows.append(
            f"| {fam} | {v} | {_pct(med)} | {_min(minutes)} | {never}/{len(cases)} | "
            + " | ".join(_pct(e) for e in errs)
            + " | "
            + " | ".join(f"{c:.0%}" for c in cov)
            + " |"
        )
    # medians of the first-within times (a "never" counts as later than any time)
    base = np.array([c["none"]["first"] for c in cases])
    with_ = np.array([c["right"]["first"] for c in cases])
    b_med, w_med = float(np.median(base)), float(np.median(with_))
    gain = b_med - w_med if math.isfinite(b_med) else math.inf
    ratio = b_med / w_med if w_med > 0 else math.inf
    gain_min = float(np.median(base * cross_min) - np.median(with_ * cross_min))
    rows.append(
        f"| {fam} | right prior earlier by (difference of medians) | {_pct(gain)} | "
        f"{_min(gain_min)} | | ratio {ratio:.1f}x |"
        " | | | | |"
    )
    return rows


def _pct(x: float) -> str:
    return "never" if not math.isfinite(x) else f"{100 * x:.1f} %"


def _min(x: float) -> str:
    return "never" if not math.isfinite(x) else f"{x:.1f} min"


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cases", type=int, default=40, help="cases per family (default 40)")
    ap.add_argument("--quick", action="store_true", help="3 cases per family")
    ap.add_argument("--seed", type=int, default=6)
    ap.add_argument("--families", default=",".join(FAMILIES))
    args = ap.parse_args(argv)
    n = 3 if args.quick else args.cases
    fams = [f for f in args.families.split(",") if f]
    for f in fams:
        if f not in FAMILIES:
            print(
                f"bench_prior: unknown family {f!r} (one of {', '.join(FAMILIES)})", file=sys.stderr
            )
            return 2
    t_start = time.perf_counter()
    lines = [
        (
            "| family | prior | within 10 % from (share of time to crossing) | (minutes) | never |"
            " err 25 % | err 50 % | err 75 % | cov 25 % | cov 50 % | cov 75 % |"
        ),
        "|---|---|---|---|---|---|---|---|---|---|---|",
    ]
    learned = []
    for fi, fam in enumerate(fams):
        cases = [run_case(fam, args.seed * 1000 + 100 * fi + i) for i in range(n)]
        learned.append(f"{fam}: {np.median([c['n_episodes'] for c in cases]):.0f} of {N_PAST}")
        lines.extend(summarise(fam, cases))
    print(
        f"Priors learned from past episodes: {n} cases per family, seed {args.seed}; "
        f"median past episodes learnable: {', '.join(learned)}; errors are medians, "
        f"coverage of the 90 % interval; {time.perf_counter() - t_start:.0f} s\n"
    )
    print("\n".join(lines))
    return 0


if __name__ == "__main__":
    sys.exit(main())
