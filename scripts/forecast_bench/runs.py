"""Running the predictor and the baselines over the cases of each family."""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np
from thermeta.daemon.simulation import synth
from thermeta.predictors import baselines
from thermeta.predictors import forecast as forecast_fn

from forecast_bench import misspecified
from forecast_bench.cases import (
    Case,
    centre_crossing,
    corruption,
    make_case,
    misspecified_case,
    told_within,
)
from forecast_bench.params import (
    AMBIENT_PROBE_NOISE,
    FAMILIES,
    PARAMS,
    PROGRESS,
    QUANTUM,
    VARIANTS,
    draw,
)


def run_predictor(t: np.ndarray, y: np.ndarray, thr: float, kwargs: dict) -> dict:
    """ETA and 90 % interval from the predictor; an exception is recorded, not raised."""
    try:
        fc = forecast_fn(t, y, thr, **kwargs)
    except Exception as exc:  # noqa: BLE001 - the bench measures; a crash is a figure too
        return {
            "eta": None,
            "lo": None,
            "hi": None,
            "ok": False,
            "error": repr(exc)[:120],
            "model": None,
            "crash": True,
        }
    eta = fc.eta_s if fc.ok else None
    return {
        "eta": eta,
        "lo": fc.eta_lo_s if fc.ok else None,
        "hi": fc.eta_hi_s if fc.ok else None,
        "ok": bool(fc.ok),
        "error": None if fc.ok else fc.reason,
        "model": fc.model,
    }


def _baseline(fn: Callable[..., float | None], *args) -> float | None:
    """A baseline's ETA; its failure is "no ETA" (None), like a failed fit."""
    try:
        out = fn(*args)
    except (ValueError, TypeError, ArithmeticError, np.linalg.LinAlgError, RuntimeError):
        return None  # e.g. curve_fit refuses fewer readings than parameters (TypeError)
    return None if out is None or not math.isfinite(float(out)) else float(out)


def run_baselines(case: Case) -> dict:
    """Linear extrapolation of the last 30 min, the plain 3-parameter fit, the two-reading solve
    (ambient given) and the Cramer-Rao sd of the ETA (lumped truth)."""
    s = case.s
    order = np.argsort(s.t, kind="stable")
    t, y = s.t[order], s.y[order]
    out = {
        "linear": _baseline(baselines.linear_eta, t, y, s.threshold),
        "lsq3": _baseline(baselines.curve_fit_eta, t, y, s.threshold),
    }
    if case.given_ambient is not None:
        out["two_reading"] = _baseline(
            baselines.two_reading_eta, t, y, case.given_ambient, s.threshold
        )
    if case.crb is not None and case.crb.get("kind") == "air":
        c = case.crb
        out["crb_sd"] = baselines.crb_eta_sd_air(
            np.unique(s.t),
            np.unique(s.ambient_t),
            c["theta"],
            s.threshold,
            c["noise"],
            c["noise"],
            c["t0"],
        )
    elif case.crb is not None and case.crb.get("kind") == "centre":
        from thermeta.predictors.conduction_crb import crb_eta_sd as centre_crb

        c = case.crb
        # the air probe measures the set point: its readings' mean, to its noise and rounding
        n_air = max(1, np.unique(s.ambient_t).size)
        amb_sd = math.sqrt(AMBIENT_PROBE_NOISE**2 + QUANTUM**2 / 12) / math.sqrt(n_air)
        try:
            out["crb_sd"] = centre_crb(
                np.unique(s.t),
                c["geometry"],
                t_i=c["t_i"],
                ambient=c["ambient"],
                biot=c["biot"],
                a_per_s=c["a_per_s"],
                threshold=s.threshold,
                noise_sd=c["noise"],
                t0_s=c["t0"],
                ambient_sd=amb_sd,
            )
        except ValueError:
            out["crb_sd"] = math.inf
    elif case.crb is not None:
        c = case.crb
        tu = np.unique(s.t)
        # the bound is parametrised at the newest reading: T(x) = Ta + (T_now - Ta) e^(-k x)
        t_now = float(
            synth.lumped_curve(np.array([tu[-1] - c["t0"]]), c["T0"], c["ambient"], c["k_per_s"])[0]
        )
        if c["known"]:
            out["crb_sd"] = baselines.crb_eta_sd_given(
                tu, t_now, c["k_per_s"], c["ambient"], s.threshold, c["noise"], c["ambient_sd"]
            )
        else:
            out["crb_sd"] = baselines.crb_eta_sd(
                tu, t_now, c["k_per_s"], c["ambient"], s.threshold, c["noise"]
            )
    return out


def evaluate(family: str, p: dict, case: Case) -> dict:
    s = case.s
    rec = {"eta_true": s.eta_true_s, **run_predictor(s.t, s.y, s.threshold, case.kwargs)}
    rec.update(run_baselines(case))
    return rec


def run_curve_case(family: str, index: int, seed: int) -> list[dict]:
    """All variants and points of progress of one drawn case of a curve family."""
    rng = np.random.default_rng([seed, FAMILIES.index(family), index])
    p = draw(PARAMS[family], rng)
    case_seed = int(rng.integers(2**31))
    # a centre probe's true crossing, found once for all its variants and points of progress
    cross = centre_crossing(p) if family.startswith("centre_") else None
    recs = []
    for frac in PROGRESS:
        for variant in VARIANTS:
            try:
                case = make_case(family, p, frac, variant, case_seed, cross)
            except ValueError as exc:  # the generator refuses (e.g. never crosses): say so
                recs.append(
                    {"family": family, "variant": variant, "progress": frac, "skipped": str(exc)}
                )
                continue
            if case.crb is not None:
                case.crb.update(
                    t0=synth.T_START, noise=math.sqrt(p["noise"] ** 2 + QUANTUM**2 / 12)
                )
            rec = evaluate(family, p, case)
            rec.update(family=family, variant=variant, progress=frac, index=index)
            if family.startswith("centre_") and variant == "clean":
                rec.update(auto_pick(case))
            recs.append(rec)
    return recs


def auto_pick(case: Case) -> dict:
    """The shape ``model="auto"`` picks and the ETA made with it."""
    try:
        fc = forecast_fn(case.s.t, case.s.y, case.s.threshold, **dict(case.kwargs, model="auto"))
    except Exception:  # noqa: BLE001 - a crash is a figure: no pick
        return {"auto_model": None, "auto_eta": None}
    return {"auto_model": fc.model if fc.ok else None, "auto_eta": fc.eta_s if fc.ok else None}


def run_misspecified_case(family: str, index: int, seed: int) -> list[dict]:
    """One drawn case of a misspecified family, ambient given and fitted, at each point of
    progress; the same baselines (no Cramer-Rao bound: the model is not the truth)."""
    case = misspecified.make_case(family, index, seed)
    recs = []
    for mode in misspecified.MODES:
        for frac in PROGRESS:
            c = misspecified_case(case, mode, frac)
            rec = {
                "eta_true": c.s.eta_true_s,
                **run_predictor(c.s.t, c.s.y, c.s.threshold, c.kwargs),
            }
            rec.update(run_baselines(c))
            rec.update(family=f"{family}/{mode}", variant="clean", progress=frac, index=index)
            recs.append(rec)
    return recs


def run_regime_case(index: int, seed: int) -> list[dict]:
    """Door opened then closed; forecasts at several minutes after the door closed."""
    family = "regime_door"
    rng = np.random.default_rng([seed, FAMILIES.index(family), index])
    p = draw(PARAMS[family], rng)
    case_seed = int(rng.integers(2**31))
    k = 1.0 / p["tau_s"]
    undisturbed = synth.lumped_crossing_s(p["T0"], p["ambient"], k, p["threshold"])
    opened = p["open_at"] * undisturbed
    closed = opened + p["open_s"]
    steps = [(0.0, p["ambient"]), (opened, p["door_air"]), (closed, p["ambient"])]
    given = p["ambient"] + p["ambient_error"]
    recs = []
    for after in p["after_s"]:
        s = synth.regime_change(
            case_seed,
            T0=p["T0"],
            k_per_s=k,
            steps=steps,
            threshold=p["threshold"],
            duration_s=closed + after,
            dt_s=p["dt_s"],
            corruption=corruption(p, "clean"),
        )
        kw = {"ambient": given, "ambient_within": told_within(family), "limit": p["limit"]}
        case = Case(s, kw, given_ambient=given)
        rec = evaluate(family, p, case)
        rec.update(family=family, variant="clean", progress=after, index=index)
        recs.append(rec)
    return recs


def sawtooth_k(p: dict) -> float:
    """k giving the drawn period:
    off t = ln((W - low)/(W - high))/k, on t = ln((high - C)/(low - C))/k."""
    low, high = p["mid"] - p["half_swing"], p["mid"] + p["half_swing"]
    logs = math.log((p["warm"] - low) / (p["warm"] - high)) + math.log(
        (high - p["coil"]) / (low - p["coil"])
    )
    return logs / p["period_s"]


def run_cycling_case(index: int, seed: int) -> list[dict]:
    """A healthy cold room: sliding 2 h windows over 12 h; any ETA is a false forecast."""
    family = "cycling"
    rng = np.random.default_rng([seed, FAMILIES.index(family), index])
    p = draw(PARAMS[family], rng)
    case_seed = int(rng.integers(2**31))
    s = synth.compressor_sawtooth(
        case_seed,
        low=p["mid"] - p["half_swing"],
        high=p["mid"] + p["half_swing"],
        warm_ambient=p["warm"],
        cold_coil=p["coil"],
        k_per_s=sawtooth_k(p),
        threshold=p["threshold"],
        duration_s=p["trace_s"],
        dt_s=p["dt_s"],
        corruption=corruption(p, "clean"),
    )
    order = np.argsort(s.t, kind="stable")
    t, y = s.t[order], s.y[order]
    recs = []
    for end in np.arange(synth.T_START + p["window_s"], t[-1] + 1.0, p["step_s"]):
        sel = (t > end - p["window_s"]) & (t <= end)
        r = run_predictor(t[sel], y[sel], p["threshold"], {"limit": p["limit"]})
        recs.append(
            {
                "family": family,
                "variant": "clean",
                "progress": 0.0,
                "index": index,
                "eta_true": None,
                **r,
            }
        )
    return recs


def run_asymptote_case(index: int, seed: int) -> list[dict]:
    family = "asymptote"
    rng = np.random.default_rng([seed, FAMILIES.index(family), index])
    p = draw(PARAMS[family], rng)
    case_seed = int(rng.integers(2**31))
    kind = "warm" if index % 2 == 0 else "chill"
    q = {
        "T0": p[f"{kind}_T0"],
        "ambient": p[f"{kind}_ambient"],
        "tau_s": p[f"{kind}_tau_s"],
        "threshold": p[f"{kind}_threshold"],
        "dt_s": p[f"{kind}_dt_s"],
        "noise": p["noise"],
        "limit": "upper" if kind == "warm" else "lower",
    }
    recs = []
    for frac in PROGRESS:
        s = synth.lumped(
            case_seed,
            T0=q["T0"],
            ambient=q["ambient"],
            k_per_s=1.0 / q["tau_s"],
            threshold=q["threshold"],
            duration_s=frac * p["span_tau"] * q["tau_s"],
            dt_s=q["dt_s"],
            corruption=corruption(q, "clean"),
        )
        rec = run_predictor(s.t, s.y, s.threshold, {"limit": q["limit"]})
        rec.update(family=family, variant=kind, progress=frac, index=index, eta_true=None)
        recs.append(rec)
    return recs


def run_unit(unit: tuple[str, int, int]) -> list[dict]:
    family, index, seed = unit
    if family == "regime_door":
        return run_regime_case(index, seed)
    if family == "cycling":
        return run_cycling_case(index, seed)
    if family == "asymptote":
        return run_asymptote_case(index, seed)
    if family in misspecified.FAMILIES:
        return run_misspecified_case(family, index, seed)
    return run_curve_case(family, index, seed)
