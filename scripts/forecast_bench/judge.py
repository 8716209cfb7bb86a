"""The bench's targets (issue 21) and their PASS / FAIL.

- Where the model is right (the curve families): the median and p90 relative ETA error within
  CRB_FACTOR x the figures an efficient unbiased estimator would reach on the same cases (the
  Cramer-Rao-limited figures), spread / CRB within CRB_FACTOR, and the 90 % interval's coverage
  within COVERAGE, judged one-sided where the late end is open (such an interval can only miss
  early: the upper limit applies to the intervals with a finite late end).
- The core shape picked by ``model="auto"``: the ETA made with the picked shape, within
  CRB_FACTOR x the true shape's Cramer-Rao-limited figures.
- A door opened and closed again, never-crossing asymptotes, a healthy cycling room: as before.
- Misspecified families (not one exponential): the median and p90 over every point of progress
  below both baselines' (the straight line and the plain curve_fit) on the same cases.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from forecast_bench import misspecified
from forecast_bench.params import (
    COVERAGE,
    CRB_FACTOR,
    CRB_FLOOR,
    MIN,
    MISSING_ERR,
    PROGRESS,
    TARGETS,
    VARIANT_FAMILIES,
    VARIANTS,
)
from forecast_bench.stats import med_p90, pooled


@dataclass
class Check:
    target: str
    figure: str
    values: list[float]
    limit: str
    ok: bool | None  # None: not measurable in this run
    fmt: str = "pct"

    def result(self) -> str:
        return {True: "PASS", False: "FAIL", None: "n/a"}[self.ok]

    def shown(self) -> str:
        if not self.values:
            return "n/a"
        return " / ".join(fmt(v, self.fmt) for v in self.values)


def fmt(v: float | None, kind: str = "pct") -> str:
    if v is None or not math.isfinite(v):
        return "n/a"
    if kind == "pct":
        return ">=1000 %" if v >= MISSING_ERR else f"{100 * v:.1f} %"
    if kind == "ratio":
        return f"{v:.2f}"
    return f"{v:g}"


def series(summary: dict, fam: str, var: str, key: str, idx: int | None = None) -> list[float]:
    out = []
    for frac in PROGRESS:
        row = summary.get((fam, var, frac))
        if row is None:
            continue
        v = row.get(key, math.nan)
        if v is None:
            v = math.nan
        out.append(v[idx] if idx is not None and isinstance(v, tuple) else v)
    return out


def _all(values: list[float], test) -> bool | None:
    if not values or any(not math.isfinite(v) for v in values):
        return None
    return all(test(v) for v in values)


def _vs_bound(ours: list[float], bound: list[float]) -> list[float]:
    """ours / (CRB-limited figure), with figures under CRB_FLOOR taken as the floor."""
    return [max(o, CRB_FLOOR) / max(b, CRB_FLOOR) for o, b in zip(ours, bound)]


def checks(summary: dict, families: tuple[str, ...]) -> list[Check]:
    out: list[Check] = []

    def add(target, figure, values, limit, test, kind="pct"):
        out.append(Check(target, figure, values, limit, _all(values, test), kind))

    within = f"<= {CRB_FACTOR:g}"
    lo, hi = COVERAGE
    for fam in VARIANT_FAMILIES:
        if fam not in families:
            continue
        for var in VARIANTS:
            for i, stat in enumerate(("median", "p90")):
                ours = series(summary, fam, var, stat)
                bound = series(summary, fam, var, "crb_limited", i)
                add(
                    f"{fam}, {var}",
                    f"{stat} / CRB-limited {stat}",
                    _vs_bound(ours, bound),
                    within,
                    lambda v: v <= CRB_FACTOR,
                    "ratio",
                )
            add(
                f"{fam}, {var}",
                "spread / CRB",
                series(summary, fam, var, "crb"),
                within,
                lambda v: v <= CRB_FACTOR,
                "ratio",
            )
            both = series(summary, fam, var, "cover")
            closed = series(summary, fam, var, "cover_closed")
            # one-sided where the late end is open: the upper limit on the closed intervals only
            ok = None
            if both and all(math.isfinite(b) for b in both):
                ok = all(b >= lo and not c > hi for b, c in zip(both, closed))
            out.append(
                Check(
                    f"{fam}, {var}",
                    "90 % interval coverage (closed intervals' in the upper test)",
                    both,
                    f">= {100 * lo:g} %; closed <= {100 * hi:g} %",
                    ok,
                )
            )
        if fam.startswith("centre_"):
            for i, stat in enumerate(("median", "p90")):
                ours = series(summary, fam, "clean", "auto", i)
                bound = series(summary, fam, "clean", "crb_limited", i)
                add(
                    f"{fam}, shape not given",
                    f"{stat} with the picked shape / CRB-limited",
                    _vs_bound(ours, bound),
                    within,
                    lambda v: v <= CRB_FACTOR,
                    "ratio",
                )
    if "regime_door" in families:
        row = summary.get(("regime_door", "clean", TARGETS["regime_after_s"]))
        add(
            "regime change",
            f"p90 {TARGETS['regime_after_s'] / MIN:g} min after the door closed",
            [row["p90"]] if row else [],
            f"<= {100 * TARGETS['regime_p90']:g} %",
            lambda v: v <= TARGETS["regime_p90"],
        )
    if "asymptote" in families:
        vals = []
        for frac in PROGRESS:
            rows = [summary[k] for k in summary if k[0] == "asymptote" and k[2] == frac]
            n = sum(r["n"] for r in rows)
            vals.append(sum(r["no_eta"] for r in rows) / n if n else math.nan)
        add(
            "never-crossing asymptote",
            "share with no ETA",
            vals,
            f">= {100 * TARGETS['asymptote_no_eta']:g} %",
            lambda v: v >= TARGETS["asymptote_no_eta"],
        )
    if "cycling" in families:
        row = summary.get(("cycling", "clean", 0.0))
        add(
            "healthy cycling cold room",
            "2 h windows with any ETA",
            [float(row["eta_any"])] if row else [],
            "0",
            lambda v: v == 0,
            "num",
        )
    for fam in misspecified.FAMILIES:
        if fam not in families:
            continue
        for mode in misspecified.MODES:
            name = f"{fam}/{mode}"
            ours = med_p90(pooled(summary, name))
            for i, stat in enumerate(("median", "p90")):
                base = [
                    med_p90(pooled(summary, name, f"{b}_errors"))[i] for b in ("linear", "lsq3")
                ]
                add(
                    f"misspecified: {name}",
                    f"{stat} / the better baseline's (line, curve_fit)",
                    [ours[i] / max(min(base), 1e-9)] if np.isfinite(ours[i]) else [],
                    "< 1",
                    lambda v: v < 1.0,
                    "ratio",
                )
    return out


def tally(cs: list[Check]) -> tuple[int, int, int]:
    n_pass = sum(1 for c in cs if c.ok)
    n_fail = sum(1 for c in cs if c.ok is False)
    return n_pass, n_fail, len(cs) - n_pass - n_fail
