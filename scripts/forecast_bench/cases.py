"""One case of a family at one point of progress: the readings and what the forecast is told."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.optimize import brentq
from thermeta.daemon.simulation import synth
from thermeta.daemon.simulation.synth import Corruption, Synth
from thermeta.predictors.conduction_series import theta_centre

from forecast_bench import misspecified
from forecast_bench.params import (
    AMBIENT_PROBE_NOISE,
    GAP_CAP,
    GAP_S,
    IRREGULAR,
    PARAMS,
    QUANTUM,
    SPIKES,
    H,
)


def corruption(p: dict, variant: str) -> Corruption:
    extra = SPIKES if variant == "spikes" else {}
    return Corruption(noise=p["noise"], quantum=QUANTUM, irregular=IRREGULAR, **extra)


def with_dropouts(s: Synth, rng: np.random.Generator, t0: float) -> Synth:
    """Remove readings (and ambient readings) inside gaps of 10-30 min, as a logger's dropouts."""
    span = s.t_last - t0
    n_gaps = 1 if span < 3 * H else 2
    keep = np.ones(s.t.size, bool)
    keep_a = None if s.ambient_t is None else np.ones(s.ambient_t.size, bool)
    for _ in range(n_gaps):
        length = min(rng.uniform(*GAP_S), GAP_CAP * span / n_gaps)
        start = t0 + rng.uniform(0.1 * span, 0.9 * span - length)
        keep &= ~((s.t > start) & (s.t < start + length))
        if keep_a is not None:
            keep_a &= ~((s.ambient_t > start) & (s.ambient_t < start + length))
    s.t, s.y = s.t[keep], s.y[keep]
    if keep_a is not None:
        s.ambient_t, s.ambient_y = s.ambient_t[keep_a], s.ambient_y[keep_a]
    return s


@dataclass
class Case:
    """Readings of one case at one point of progress, with what the predictor is told."""

    s: Synth
    kwargs: dict  # for forecast(): ambient=..., ambient_t/ambient_y=..., model=..., limit=...
    crb: dict | None = None  # truth for the Cramer-Rao bound (lumped and measured-air families)
    given_ambient: float | None = None


def told_within(family: str) -> float:
    """How far off the predictor is told a family's given ambient may be: the half-width of the
    error's range (the config's ``ambient_within``)."""
    return max(abs(e) for e in PARAMS[family]["ambient_error"])


def lumped_case(p: dict, frac: float, variant: str, seed: int, known: bool) -> Case:
    k = 1.0 / p["tau_s"]
    cross = synth.lumped_crossing_s(p["T0"], p["ambient"], k, p["threshold"])
    s = synth.lumped(
        seed,
        T0=p["T0"],
        ambient=p["ambient"],
        k_per_s=k,
        threshold=p["threshold"],
        duration_s=frac * cross,
        dt_s=p["dt_s"],
        corruption=corruption(p, variant),
    )
    kw: dict = {"limit": p["limit"]}
    given = None
    if known:
        given = p["ambient"] + p["ambient_error"]
        # told what the operator knows: the given ambient is right to within the error's range
        kw.update(ambient=given, ambient_within=told_within("warm_known"))
    crb = dict(T0=p["T0"], ambient=p["ambient"], k_per_s=k, known=known)
    if known:
        # the given ambient is the truth plus a uniform error: its spread is what is known
        lo, hi = PARAMS["warm_known"]["ambient_error"]
        crb["ambient_sd"] = (hi - lo) / math.sqrt(12.0)
    return Case(s, kw, crb=crb, given_ambient=given)


def air_case(p: dict, frac: float, variant: str, seed: int) -> Case:
    kw = dict(
        load_T0=p["T0"],
        air_T0=p["T0"] + p["air_offset"],
        outside=p["outside"],
        k_air_per_s=1.0 / p["air_tau_s"],
        k_load_per_s=1.0 / p["tau_s"],
        threshold=p["threshold"],
        dt_s=p["dt_s"],
    )
    probe = synth.measured_air(seed, duration_s=p["dt_s"] * 4, **kw)
    cross = probe.crossing_t_true - synth.T_START
    s = synth.measured_air(seed, duration_s=frac * cross, corruption=corruption(p, variant), **kw)
    crb = dict(
        kind="air",
        theta=dict(
            outside=p["outside"],
            air0=p["T0"] + p["air_offset"],
            k_air=1.0 / p["air_tau_s"],
            load0=p["T0"],
            k_load=1.0 / p["tau_s"],
        ),
    )
    return Case(
        s, {"ambient_t": s.ambient_t, "ambient_y": s.ambient_y, "limit": p["limit"]}, crb=crb
    )


def centre_crossing(p: dict) -> float:
    """The centre's true crossing time (the series; a vectorised scan, then brentq)."""
    a = p["alpha"] / p["L_m"] ** 2
    truth = lambda x: (
        p["ambient"]
        + (p["T0"] - p["ambient"])
        * theta_centre(a * np.asarray(x, float), p["biot"], p["geometry"])
    )
    grid = np.linspace(0.0, 30.0 / a, 2001)
    v = truth(grid) - p["threshold"]
    i = int(np.flatnonzero(np.sign(v[1:]) != np.sign(v[:-1]))[0])
    f = lambda x: float(truth(np.array([x]))[0]) - p["threshold"]
    return float(brentq(f, grid[i], grid[i + 1], xtol=1e-3))


def centre_case(p: dict, frac: float, variant: str, seed: int, cross: float) -> Case:
    """A centre probe seen for ``frac`` of the time to its true crossing ``cross`` (the series
    of predictors.conduction_series, as synth_conduction.core_probe draws it)."""
    rng = np.random.default_rng(seed)
    c = corruption(p, variant)
    a = p["alpha"] / p["L_m"] ** 2
    x = synth.sample_times(rng, frac * cross, p["dt_s"], c)
    clean = p["ambient"] + (p["T0"] - p["ambient"]) * theta_centre(a * x, p["biot"], p["geometry"])
    xs, y, clean, spikes = synth.corrupt(rng, x, clean, c)
    x_last = float(x.max())
    s = Synth(
        t=xs + synth.T_START,
        y=y,
        threshold=p["threshold"],
        eta_true_s=cross - x_last,
        crossing_t_true=synth.T_START + cross,
        t_last=synth.T_START + x_last,
        y_clean=clean,
        spike_mask=spikes,
    )
    # the air probe of the chiller: the constant set point, with its own noise, same instants
    rng = np.random.default_rng(seed + 1)
    at = np.unique(s.t)
    ay = np.round((p["ambient"] + rng.normal(0, AMBIENT_PROBE_NOISE, at.size)) / QUANTUM) * QUANTUM
    s.ambient_t, s.ambient_y = at, ay
    kw = {"ambient_t": at, "ambient_y": ay, "model": p["geometry"], "limit": p["limit"]}
    crb = dict(
        kind="centre",
        geometry=p["geometry"],
        t_i=p["T0"],
        ambient=p["ambient"],
        biot=p["biot"],
        a_per_s=a,
    )
    return Case(s, kw, crb=crb)


def make_case(
    family: str, p: dict, frac: float, variant: str, seed: int, cross: float | None = None
) -> Case:
    base = variant if variant != "dropouts" else "clean"
    if family in ("chill_fitted", "warm_fitted"):
        c = lumped_case(p, frac, base, seed, known=False)
    elif family == "warm_known":
        c = lumped_case(p, frac, base, seed, known=True)
    elif family == "air_probe":
        c = air_case(p, frac, base, seed)
    elif family.startswith("centre_"):
        c = centre_case(p, frac, base, seed, cross if cross is not None else centre_crossing(p))
    else:
        raise ValueError(f"no curve family {family!r}")
    if variant == "dropouts":
        c.s = with_dropouts(c.s, np.random.default_rng(seed + 7), synth.T_START)
        if "ambient_t" in c.kwargs:
            c.kwargs.update(ambient_t=c.s.ambient_t, ambient_y=c.s.ambient_y)
    return c


def misspecified_case(case: misspecified.Case, mode: str, frac: float) -> Case:
    """A misspecified family's readings up to ``frac`` of the time to the crossing; the ambient
    given (its error drawn with the case) or left to the fit."""
    t, y, eta_true = misspecified.cut(case, frac)
    s = Synth(
        t=t + synth.T_START,
        y=y,
        threshold=case.threshold,
        eta_true_s=eta_true,
        crossing_t_true=synth.T_START + case.crossing_s,
        t_last=synth.T_START + float(t[-1]),
    )
    kw: dict = {"limit": case.limit}
    if mode == "given":
        kw["ambient"] = case.given_ambient
    return Case(s, kw, given_ambient=kw.get("ambient"))
