"""Figures over the records of a family: errors, coverage, and the Cramer-Rao-limited figures."""

from __future__ import annotations

import math

import numpy as np

from forecast_bench.params import MIN, MISSING_ERR, H


def rel_errors(recs: list[dict], key: str = "eta") -> np.ndarray:
    """|eta - eta_true| / eta_true over the records whose truth crosses later (missing = 1000 %);
    NaN entries (baseline not available) are dropped."""
    out = []
    for r in recs:
        true = r.get("eta_true")
        if true is None or true <= 0:
            continue
        est = r.get(key, math.nan)
        if est is not None and isinstance(est, float) and math.isnan(est):
            continue
        out.append(MISSING_ERR if est is None else min(abs(est - true) / true, MISSING_ERR))
    return np.asarray(out, float)


def med_p90(errs: np.ndarray) -> tuple[float, float]:
    if errs.size == 0:
        return math.nan, math.nan
    return float(np.median(errs)), float(np.percentile(errs, 90))


def _holds(r: dict) -> bool:
    lo = 0.0 if r.get("lo") is None else r["lo"]
    hi = math.inf if r.get("hi") is None else r["hi"]
    return bool(r.get("ok")) and lo <= r["eta_true"] <= hi


def _crosses(recs: list[dict]) -> list[dict]:
    return [r for r in recs if (r.get("eta_true") or 0) > 0]


def coverage(recs: list[dict]) -> float:
    """The share of crossing cases whose true ETA lies inside the 90 % interval."""
    hits = [_holds(r) for r in _crosses(recs)]
    return float(np.mean(hits)) if hits else math.nan


def closed_coverage(recs: list[dict]) -> float:
    """Coverage over the intervals with a finite late end (those can miss on both sides)."""
    hits = [_holds(r) for r in _crosses(recs) if r.get("ok") and r.get("hi") is not None]
    return float(np.mean(hits)) if hits else math.nan


def misses(recs: list[dict]) -> tuple[int, int]:
    """Crossings the 90 % interval missed: (before its early end, after its late end)."""
    early = late = 0
    for r in _crosses(recs):
        if not r.get("ok"):
            continue
        if r.get("lo") is not None and r["eta_true"] < r["lo"]:
            early += 1
        elif r.get("hi") is not None and r["eta_true"] > r["hi"]:
            late += 1
    return early, late


def crb_z(recs: list[dict]) -> list[float]:
    """z = (eta - eta_true) / sd_CRB of the cases with an ETA, a truth that crosses and a finite
    bound."""
    return [
        (r["eta"] - r["eta_true"]) / r["crb_sd"]
        for r in recs
        if r.get("eta") is not None
        and r.get("eta_true")
        and math.isfinite(r.get("crb_sd", math.nan))
        and r["crb_sd"] > 0
    ]


def crb_ratio(recs: list[dict]) -> float:
    """median(|z|) / 0.6745, z = (eta - eta_true) / sd_CRB: 1 for an efficient, unbiased one."""
    z = crb_z(recs)
    return float(np.median(np.abs(z)) / 0.6745) if z else math.nan


def crb_rel(recs: list[dict]) -> list[float]:
    """sd_CRB / eta_true of the cases whose truth crosses (inf for an infinite bound), sorted: the
    pool's order (the workers finish in any order) must not change the draws."""
    return sorted(
        r["crb_sd"] / r["eta_true"]
        for r in recs
        if (r.get("eta_true") or 0) > 0 and not math.isnan(r.get("crb_sd", math.nan))
    )


def crb_limited(recs: list[dict], draws: int = 400) -> tuple[float, float] | None:
    """Median and p90 of the relative error an efficient unbiased estimator would have:
    |N(0, sd_CRB)| / eta_true pooled over the cases (seeded draws).  An infinite bound (the
    readings cannot determine the parameters, e.g. two readings of a three-parameter curve)
    counts as a missing ETA, as the predictor's "too few readings" does."""
    rel = crb_rel(recs)
    if not rel:
        return None
    z = np.abs(np.random.default_rng(0).standard_normal((len(rel), draws)))
    e = np.minimum(z * np.asarray(rel)[:, None], MISSING_ERR).ravel()
    return float(np.median(e)), float(np.percentile(e, 90))


def summarise(records: list[dict]) -> dict:
    """Figures per (family, variant, progress)."""
    groups: dict[tuple, list[dict]] = {}
    for r in records:
        groups.setdefault((r["family"], r["variant"], r["progress"]), []).append(r)
    out = {}
    for key, recs in groups.items():
        done = [r for r in recs if "skipped" not in r]
        e = rel_errors(done)
        row = {
            "n": len(done),
            "skipped": len(recs) - len(done),
            "crashed": sum(1 for r in done if r.get("crash")),
            "no_eta": sum(1 for r in done if r.get("eta") is None),
            "failed": sum(1 for r in done if not r.get("ok")),
            "cover": coverage(done),
            "cover_closed": closed_coverage(done),
            "misses": misses(done),
            "crb": crb_ratio(done),
            "crb_limited": crb_limited(done),
            "open_hi": sum(1 for r in done if r.get("ok") and r.get("hi") is None),
            "errors": e,
        }
        row["median"], row["p90"] = med_p90(e)
        for b in ("linear", "lsq3", "two_reading"):
            if any(b in r for r in done):
                row[b] = med_p90(rel_errors(done, b))
                row[b + "_errors"] = rel_errors(done, b)
        picks = [r["auto_model"] for r in done if "auto_model" in r]
        if picks:
            geometry = key[0].removeprefix("centre_")
            row["pick"] = float(np.mean([m == geometry for m in picks]))
            row["auto"] = med_p90(rel_errors([r for r in done if "auto_model" in r], "auto_eta"))
        if key[0] == "cycling":
            etas = [r["eta"] for r in done if r.get("eta") is not None]
            row["windows"] = len(done)
            row["eta_any"] = len(etas)
            row["eta_12h"] = sum(1 for x in etas if x <= 12 * H)
            row["eta_45min"] = sum(1 for x in etas if x <= 45 * MIN)
        out[key] = row
    return out


def pooled(summary: dict, family: str, key: str = "errors") -> np.ndarray:
    """A family's errors (or a baseline's) over every point of progress, clean variant."""
    parts = [r[key] for k, r in summary.items() if k[0] == family and k[1] == "clean" and key in r]
    return np.concatenate(parts) if parts else np.zeros(0)
