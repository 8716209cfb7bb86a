"""The physics the invented sites are made of, exact where it can be (degC and seconds).

* lumped stages in a chain: the air (or a vessel) follows a driving temperature that changes in
  pieces (a unit fails, a door opens, a compressor cycles); the load follows the air:
      dTa/dt = -ka (Ta - U_i)     on piece i
      dT/dt  = -kl (T - Ta)
  solved exactly on each piece (see :func:`two_stage`);
* a probe at the centre of a thick carton: transient conduction, the exact series step response
  theta_centre(Fo, Bi) (predictors/conduction_series.py) superposed over the air history
  (Duhamel's theorem):  T(t) = Ti + sum_j dTa_j (1 - theta_centre(a (t - tau_j), Bi)).
  No latent heat: a simplification for a frozen load that stays below about -10 degC.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Literal

import numpy as np
from thermeta.daemon.simulation import synth
from thermeta.predictors.conduction_series import theta_centre

Piece = tuple[float, float, float]  # (start_s, driving temperature U, ka_per_s)
Direction = Literal["rising", "falling"]


def _piece_states(
    pieces: list[Piece], air0: float, load0: float, kl: float
) -> list[tuple[float, float]]:
    """(air, load) at the start of each piece, carried across the boundaries exactly."""
    states = [(air0, load0)]
    for i in range(len(pieces) - 1):
        s, u, ka = pieces[i]
        tau = pieces[i + 1][0] - s
        a, ld = _two_stage_step(np.array([tau]), u, ka, kl, *states[-1])
        states.append((float(a[0]), float(ld[0])))
    return states


def _two_stage_step(
    tau: np.ndarray, u: float, ka: float, kl: float, a0: float, l0: float
) -> tuple[np.ndarray, np.ndarray]:
    """One piece from (a0, l0) at tau = 0:

    Ta(tau) = U + (a0 - U) e^(-ka tau)
    T(tau)  = U + C e^(-ka tau) + (l0 - U - C) e^(-kl tau),   C = kl (a0 - U) / (kl - ka)
    (ka -> kl:  T = U + (l0 - U) e^(-k tau) + k (a0 - U) tau e^(-k tau))
    """
    if kl <= 0:
        return u + (a0 - u) * np.exp(-ka * tau), np.full_like(tau, l0)
    return synth.air_load_curves(
        tau, load_T0=l0, air_T0=a0, outside=u, k_air_per_s=ka, k_load_per_s=kl
    )


def two_stage(
    x_s: np.ndarray, pieces: list[Piece], air0: float, load0: float = 0.0, kl_per_s: float = 0.0
) -> tuple[np.ndarray, np.ndarray]:
    """Exact air and load temperatures at times ``x_s`` (s from the start) for a piecewise drive.

    pieces: [(start_s, U, ka_per_s), ...] sorted, the first at 0.  kl_per_s = 0: no load stage.
    """
    if not pieces or pieces[0][0] != 0.0:
        raise ValueError("pieces must start at 0 s")
    if any(p[2] <= 0 for p in pieces) or kl_per_s < 0:
        raise ValueError("rates must be positive")
    x = np.asarray(x_s, float)
    states = _piece_states(pieces, air0, load0, kl_per_s)
    starts = np.array([p[0] for p in pieces])
    idx = np.clip(np.searchsorted(starts, x, side="right") - 1, 0, None)
    air = np.empty_like(x)
    load = np.empty_like(x)
    for i in np.unique(idx):
        sel = idx == i
        s, u, ka = pieces[i]
        air[sel], load[sel] = _two_stage_step(x[sel] - s, u, ka, kl_per_s, *states[i])
    return air, load


def time_to_reach(a0: float, u: float, ka: float, target: float) -> float | None:
    """Seconds for Ta = U + (a0 - U) e^(-ka t) to reach ``target``: ln((a0 - U)/(target - U))/ka."""
    r = (target - u) / (a0 - u) if a0 != u else math.nan
    if not 0 < r <= 1:
        return None
    return -math.log(r) / ka


def thermostat_pieces(
    duration_s: float,
    air0: float,
    low: float,
    high: float,
    cold: tuple[float, float],
    warm: tuple[float, float],
    start_on: bool = False,
    t0_s: float = 0.0,
) -> list[Piece]:
    """A compressor cycling on a thermostat: on, the air heads for the coil (cold = (U, k)) until
    ``low``; off, it drifts toward the room (warm = (U, k)) until ``high``.  Switch times exact."""
    if not cold[0] < low < high < warm[0]:
        raise ValueError("need coil < low < high < warm")
    pieces: list[Piece] = []
    t, a, on = t0_s, air0, start_on
    while t < duration_s:
        u, k = cold if on else warm
        pieces.append((t, u, k))
        dt = time_to_reach(a, u, k, low if on else high)
        if dt is None:  # already past the switch point: switch at once
            dt = 0.0
        t, a, on = t + max(dt, 1.0), (low if on else high), not on
    return pieces


def centre_probe(
    x_s: np.ndarray,
    air: Callable[[np.ndarray], np.ndarray],
    Ti: float,
    biot: float,
    a_per_s: float,
    geometry: str = "slab",
    step_s: float = 30.0,
) -> np.ndarray:
    """Centre temperature of a body at Ti in air Ta(t) (Duhamel superposition of the step response).

    T(t_i) = Ti + sum_{j<=i} dTa_j R_{i-j},  R_m = 1 - theta_centre(a m h, Bi),
    the air taken as steps of h = ``step_s`` (its value at each step's midpoint): a discrete
    convolution on a uniform grid, then linear interpolation to ``x_s``.  a_per_s = alpha / L^2.
    """
    x = np.asarray(x_s, float)
    if x.size == 0:
        return x.copy()
    n = int(np.ceil(max(float(x.max()), 0.0) / step_s)) + 2
    grid = np.arange(n) * step_s
    levels = air(grid + 0.5 * step_s)
    jumps = np.diff(np.concatenate([[Ti], levels]))
    response = 1.0 - theta_centre(a_per_s * grid, biot, geometry)
    centre = Ti + np.convolve(jumps, response)[:n]
    return np.interp(x, grid, centre)


def first_crossing(
    curve: Callable[[np.ndarray], np.ndarray],
    threshold: float,
    direction: Direction,
    start_s: float,
    end_s: float,
    step_s: float = 10.0,
) -> float | None:
    """First time in [start_s, end_s] the curve passes ``threshold`` going ``direction``
    ("rising"/"falling"), by a fine grid and linear interpolation; None when it does not."""
    grid = np.arange(start_s, end_s + step_s, step_s)
    v = curve(grid) - threshold
    past = v >= 0 if direction == "rising" else v <= 0
    hits = np.flatnonzero(past)
    if hits.size == 0:
        return None
    i = int(hits[0])
    if i == 0:
        return float(grid[0])
    f0, f1 = v[i - 1], v[i]
    return float(grid[i - 1] + (grid[i] - grid[i - 1]) * f0 / (f0 - f1))
