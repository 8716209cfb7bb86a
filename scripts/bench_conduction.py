"""Benchmark of the core-probe (conduction) model: time per fit, forecast error, interval coverage,
and how often the geometry is chosen right when it is not given.

    python scripts/bench_conduction.py            # about a minute on 2 cores
    python scripts/bench_conduction.py --cases 60 # more cases per family

Scenario ranges are fixed here before any tuning (seeded):
- chill: cooked food at 60-75 degC into a blast chiller at -5..3 degC, threshold 21 degC;
  a = alpha/L^2 in 1/40000..1/8000 1/s; Bi 0.3-5; readings every 30-60 s, noise 0.1-0.3 degC,
  quantised to 0.1; seen 35-65 % of the time to the crossing; ambient known, or fitted.
- warm: a load at 1-4 degC whose air warms from 3-5 degC toward 22-30 degC (time constant 1-3 h),
  threshold 8 degC, ambient measured by an air probe (truth by a method-of-lines solve_ivp).
Forecast errors are |eta - eta_true| / eta_true, counted from the newest reading.  Times are
process CPU time (robust to other load on a shared machine); run with OPENBLAS_NUM_THREADS=1 so
BLAS threads do not inflate them.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from thermeta.daemon.simulation.synth import Corruption
from thermeta.daemon.simulation.synth_conduction import core_probe
from thermeta.predictors.conduction import GEOMETRIES, fit_conduction, select_geometry


def chill_case(seed: int, geometry: str):
    rng = np.random.default_rng(seed)
    c = Corruption(noise=float(rng.uniform(0.1, 0.3)), quantum=0.1)
    amb = float(rng.uniform(-5.0, 3.0))
    s = core_probe(
        seed,
        geometry=geometry,
        biot=float(np.exp(rng.uniform(np.log(0.3), np.log(5)))),
        a_per_s=float(np.exp(rng.uniform(np.log(1 / 40000), np.log(1 / 8000)))),
        t_i=float(rng.uniform(60, 75)),
        ambient=amb,
        threshold=21.0,
        seen_fraction=float(rng.uniform(0.35, 0.65)),
        dt_s=float(rng.uniform(30, 60)),
        corruption=c,
    )
    return s, amb


def warm_case(seed: int, geometry: str, bi_range=(0.3, 5.0)):
    rng = np.random.default_rng(seed)
    c = Corruption(noise=float(rng.uniform(0.05, 0.2)), quantum=0.1)
    air0 = float(rng.uniform(3.0, 5.0))
    s = core_probe(
        seed,
        geometry=geometry,
        biot=float(np.exp(rng.uniform(np.log(bi_range[0]), np.log(bi_range[1])))),
        a_per_s=float(np.exp(rng.uniform(np.log(1 / 40000), np.log(1 / 8000)))),
        t_i=float(rng.uniform(1.0, 4.0)),
        ambient=air0,
        threshold=8.0,
        seen_fraction=float(rng.uniform(0.35, 0.65)),
        dt_s=60.0,
        corruption=c,
        ambient_rise=float(rng.uniform(22.0, 30.0)) - air0,
        ambient_k_per_s=1.0 / float(rng.uniform(3600, 10800)),
    )
    return s


def _err(eta, truth):
    return np.inf if eta is None else abs(eta - truth) / truth


def _row(name, errs, covered, n_pts, ms):
    e = np.asarray(errs)
    return (
        f"| {name} | {len(e)} | {np.median(n_pts):.0f} | {100 * np.median(e):.1f} | "
        f"{100 * np.quantile(e, 0.9):.1f} | {100 * np.mean(covered):.0f} | {np.median(ms):.0f} |"
    )


def accuracy(n_cases: int) -> list[str]:
    lines = [
        (
            "| family (right geometry given) | cases | points | median err % | p90 err % | "
            "90 % interval covers % | CPU ms per fit+interval |"
        ),
        "|---|---|---|---|---|---|---|",
    ]
    for mode in ("known", "fitted", "measured"):
        for g in GEOMETRIES:
            errs, cov, pts, ms = [], [], [], []
            for i in range(n_cases):
                seed = 1000 * (GEOMETRIES.index(g) + 1) + i
                if mode == "measured":
                    s = warm_case(seed, g)
                    kw = {"ambient_t": s.ambient_t, "ambient_y": s.ambient_y}
                else:
                    s, amb = chill_case(seed, g)
                    kw = {"ambient": amb} if mode == "known" else {}
                t0 = time.process_time()
                fit = fit_conduction(s.t, s.y, g, **kw)
                eta, lo, hi = fit.time_to_threshold(s.threshold)
                ms.append(1e3 * (time.process_time() - t0))
                errs.append(_err(eta, s.eta_true_s))
                cov.append(
                    lo is not None and lo <= s.eta_true_s and (hi is None or s.eta_true_s <= hi)
                )
                pts.append(s.t.size)
            name = {
                "known": "chill, ambient known",
                "fitted": "chill, ambient fitted",
                "measured": "warm, air measured",
            }[mode]
            lines.append(_row(f"{name}, {g}", errs, cov, pts, ms))
    return lines


def selection(n_cases: int) -> list[str]:
    lines = [
        (
            "| family (geometry not given) | cases | right geometry % | median err % "
            "(chosen) | p90 err % (chosen) |"
        ),
        "|---|---|---|---|---|",
    ]
    for mode in ("known", "fitted"):
        for g in GEOMETRIES:
            right, errs = 0, []
            for i in range(n_cases):
                s, amb = chill_case(5000 + 1000 * GEOMETRIES.index(g) + i, g)
                kw = {"ambient": amb} if mode == "known" else {}
                best, _ = select_geometry(s.t, s.y, **kw)
                right += best.geometry == g
                errs.append(_err(best.time_to_threshold(s.threshold)[0], s.eta_true_s))
            e = np.asarray(errs)
            lines.append(
                f"| chill, ambient {mode}, true {g} | {n_cases} | "
                f"{100 * right / n_cases:.0f} | {100 * np.median(e):.1f} | "
                f"{100 * np.quantile(e, 0.9):.1f} |"
            )
    return lines


def speed(repeats: int) -> list[str]:
    lines = [
        (
            "| geometry | ambient | points | median CPU ms (fit) | "
            "median CPU ms (fit + ETA interval) |"
        ),
        "|---|---|---|---|---|",
    ]
    for g in GEOMETRIES:
        for mode in ("known", "fitted", "measured"):
            if mode == "measured":
                s = warm_case(77, g)
                kw = {"ambient_t": s.ambient_t, "ambient_y": s.ambient_y}
            else:
                s, amb = chill_case(77, g)
                kw = {"ambient": amb} if mode == "known" else {}
            # ~200 points: subsample the case evenly
            idx = np.linspace(0, s.t.size - 1, min(200, s.t.size)).astype(int)
            t, y = s.t[np.argsort(s.t)][idx], s.y[np.argsort(s.t)][idx]
            fit_ms, all_ms = [], []
            for _ in range(repeats):
                t0 = time.process_time()
                fit = fit_conduction(t, y, g, **kw)
                t1 = time.process_time()
                fit.time_to_threshold(s.threshold)
                t2 = time.process_time()
                fit_ms.append(1e3 * (t1 - t0))
                all_ms.append(1e3 * (t2 - t0))
            lines.append(
                f"| {g} | {mode} | {t.size} | {np.median(fit_ms):.1f} | {np.median(all_ms):.1f} |"
            )
    return lines


def crb(n_cases: int) -> list[str]:
    """Issue 2's family "sphere centre Bi 0.8-4, air measured" (scripts/bench_core.py, same
    seeds): the Cramer-Rao bound on the crossing time's sd at the true parameters, relative to
    the true ETA, and the forecast's error on the same cases."""
    import math
    import sys
    from pathlib import Path

    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from bench_core import sphere_measured
    from thermeta.predictors import forecast
    from thermeta.predictors.conduction_crb import crb_eta_sd

    rel, errs = [], []
    for seed in range(n_cases):
        s, kw, _, amb = sphere_measured(seed)
        # the generator's noise sd: the same draws, in the same order, as sphere_measured
        r = np.random.default_rng(40_000 + seed)
        r.uniform(0.8, 4.0), r.uniform(3e-5, 1e-4), r.uniform(2, 4)
        if abs(r.uniform(20, 30) - amb) > 1e-12:
            raise RuntimeError("bench_core.sphere_measured draws changed; update crb()")
        noise = r.uniform(0.05, 0.2)
        tr = s.truth
        # readings: noise and 0.1 quantisation (variance q^2 / 12); air: 0.1 noise, same quantum
        air_sd = math.sqrt(0.1**2 + 0.1**2 / 12) / math.sqrt(len(kw["ambient_t"]))
        sd = crb_eta_sd(
            s.t,
            "sphere",
            t_i=tr["Ti"],
            ambient=amb,
            biot=tr["biot"],
            a_per_s=tr["a_per_s"],
            threshold=s.threshold,
            noise_sd=math.sqrt(noise**2 + 0.1**2 / 12),
            t0_s=tr["t0"],
            ambient_sd=air_sd,
        )
        rel.append(sd / s.eta_true_s)
        fc = forecast(s.t, s.y, s.threshold, **kw)
        errs.append(_err(fc.eta_s, s.eta_true_s))
    rel_a = np.asarray(rel)
    # median |error| an unbiased estimator at the bound would reach: |N(0, crb)| per case
    sim = np.abs(np.random.default_rng(1).normal(size=(2000, rel_a.size))) * rel_a
    return [
        "| family | cases | median CRB sd / ETA | p90 CRB sd / ETA | cases with CRB <= 10 % | "
        "median error at the CRB (simulated) | forecast median error |",
        "|---|---|---|---|---|---|---|",
        f"| sphere centre Bi 0.8-4, air measured | {n_cases} | {100 * np.median(rel_a):.0f} % | "
        f"{100 * np.quantile(rel_a, 0.9):.0f} % | {100 * np.mean(rel_a <= 0.10):.0f} % | "
        f"{100 * float(np.median(np.median(sim, axis=1))):.0f} % | "
        f"{100 * np.median(errs):.1f} % |",
    ]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cases", type=int, default=30, help="cases per family (default 30)")
    ap.add_argument("--repeats", type=int, default=7, help="timing repeats (default 7)")
    ap.add_argument(
        "--only", choices=("speed", "accuracy", "selection", "crb"), help="print one table only"
    )
    args = ap.parse_args()
    tables = {
        "speed": ("Time per fit", lambda: speed(args.repeats)),
        "accuracy": ("Forecast error with the right geometry", lambda: accuracy(args.cases)),
        "selection": ("Geometry chosen by AICc", lambda: selection(max(args.cases // 2, 5))),
        "crb": (
            "Information limit of issue 2's sphere family (Cramer-Rao)",
            lambda: crb(2 * args.cases),
        ),
    }
    for key, (title, make) in tables.items():
        if args.only in (None, key):
            print(f"\n### {title}\n")
            print("\n".join(make()))


if __name__ == "__main__":
    main()
