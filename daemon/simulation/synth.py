"""Seeded generators of readings with known truth, for tests, benchmarks and the simulator.

Pure numpy (no I/O, no clock).  Every generator returns a :class:`Synth`: the readings as they
would arrive (optionally unsorted, duplicated, spiky, quantised, with gaps), the ambient series
where there is one, and the truth (parameters and the true crossing time).

Times are epoch seconds starting at ``t_start``; temperatures in one unit (degC in our scenarios).
The true ETA counts from the newest reading, like :class:`~thermeta.predictors.result.Forecast`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy.optimize import brentq

T_START = 1_764_600_000.0  # 2025-12-01 14:40 UTC; any epoch will do


@dataclass
class Synth:
    """Readings plus truth.  ``eta_true_s`` is None when the truth never crosses; 0 when past."""

    t: np.ndarray
    y: np.ndarray
    threshold: float
    eta_true_s: float | None
    crossing_t_true: float | None
    t_last: float
    truth: dict[str, float] = field(default_factory=dict)
    ambient_t: np.ndarray | None = None
    ambient_y: np.ndarray | None = None
    y_clean: np.ndarray | None = None  # the noise-free values at t (same order as t)
    spike_mask: np.ndarray | None = None  # True where a spike was added (same order as t)


@dataclass
class Corruption:
    """How real readings go wrong.  All default to 'clean'.

    noise: Gaussian sd; quantum: round to this step (0.1 for most probes); spike_frac / spike_size:
    fraction of readings hit by +-spike_size (size drawn from 0.5-1.5 x spike_size, random sign);
    n_gaps / gap_frac: that many dropouts removing gap_frac of the span in total; irregular:
    relative jitter of the sampling interval (0.5 = each step drawn from 0.5-1.5 x dt); dup_frac:
    fraction of readings repeated with the same timestamp; shuffle_frac: fraction of readings
    moved out of order (arrival order, not time order).
    """

    noise: float = 0.0
    quantum: float | None = None
    spike_frac: float = 0.0
    spike_size: float = 15.0
    n_gaps: int = 0
    gap_frac: float = 0.0
    irregular: float = 0.0
    dup_frac: float = 0.0
    shuffle_frac: float = 0.0


def sample_times(
    rng: np.random.Generator, duration_s: float, dt_s: float, c: Corruption
) -> np.ndarray:
    """Sampling instants (relative seconds, sorted, from 0) with jitter and gaps."""
    if duration_s <= 0 or dt_s <= 0:
        raise ValueError("duration_s and dt_s must be positive")
    n = int(duration_s / dt_s) + 1
    if c.irregular > 0:
        steps = dt_s * rng.uniform(1 - c.irregular, 1 + c.irregular, n)
        x = np.concatenate([[0.0], np.cumsum(steps)])
        x = x[x <= duration_s]
    else:
        x = np.arange(n) * dt_s
    if c.n_gaps > 0 and c.gap_frac > 0:
        gap_len = c.gap_frac * duration_s / c.n_gaps
        # keep the first and last tenth so a fit always has both ends
        starts = rng.uniform(0.1 * duration_s, 0.9 * duration_s - gap_len, c.n_gaps)
        keep = np.ones(x.size, bool)
        for s in starts:
            keep &= ~((x > s) & (x < s + gap_len))
        x = x[keep]
    return x


def corrupt(
    rng: np.random.Generator, x: np.ndarray, clean: np.ndarray, c: Corruption
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Noise, spikes, quantisation, duplicates, shuffling.  Returns x, y, clean, spike mask."""
    y = clean + (rng.normal(0.0, c.noise, x.size) if c.noise > 0 else 0.0)
    spikes = np.zeros(x.size, bool)
    if c.spike_frac > 0:
        spikes = rng.random(x.size) < c.spike_frac
        size = c.spike_size * rng.uniform(0.5, 1.5, x.size) * rng.choice([-1.0, 1.0], x.size)
        y = np.where(spikes, y + size, y)
    if c.quantum:
        y = np.round(y / c.quantum) * c.quantum
    if c.dup_frac > 0:
        d = np.flatnonzero(rng.random(x.size) < c.dup_frac)
        x, y = np.insert(x, d, x[d]), np.insert(y, d, y[d])
        clean, spikes = np.insert(clean, d, clean[d]), np.insert(spikes, d, spikes[d])
    if c.shuffle_frac > 0 and x.size > 2:
        m = np.flatnonzero(rng.random(x.size) < c.shuffle_frac)
        # move each chosen reading a few places later in arrival order
        order = np.arange(x.size, dtype=float)
        order[m] += rng.uniform(1.5, 6.5, m.size)
        p = np.argsort(order, kind="stable")
        x, y, clean, spikes = x[p], y[p], clean[p], spikes[p]
    return x, y, clean, spikes


def lumped_curve(x_s: np.ndarray, T0: float, ambient: float, k_per_s: float) -> np.ndarray:
    """T(t) = Ta + (T0 - Ta) e^(-k t)."""
    return ambient + (T0 - ambient) * np.exp(-k_per_s * np.asarray(x_s, float))


def lumped_crossing_s(T0: float, ambient: float, k_per_s: float, threshold: float) -> float | None:
    """t* = ln((T0 - Ta) / (thr - Ta)) / k when thr lies between T0 and Ta; 0 at T0; else None."""
    if T0 == threshold:
        return 0.0
    r = (threshold - ambient) / (T0 - ambient) if T0 != ambient else math.nan
    if not (0 < r < 1):
        return None
    return -math.log(r) / k_per_s


def _eta(crossing_rel: float | None, x_last: float) -> float | None:
    if crossing_rel is None:
        return None
    return max(0.0, crossing_rel - x_last)


def seen_duration_s(
    T0: float, ambient: float, k_per_s: float, threshold: float, fraction: float
) -> float:
    """How long until the curve has gone ``fraction`` of the way from T0 to the threshold."""
    target = T0 + fraction * (threshold - T0)
    t = lumped_crossing_s(T0, ambient, k_per_s, target)
    if t is None:
        raise ValueError("the curve never gets that far")
    return t


def lumped(
    seed: int,
    *,
    T0: float,
    ambient: float,
    k_per_s: float,
    threshold: float,
    duration_s: float,
    dt_s: float = 30.0,
    corruption: Corruption | None = None,
    t_start: float = T_START,
) -> Synth:
    """A lumped item warming or cooling toward a constant ambient (Newton's law)."""
    rng = np.random.default_rng(seed)
    c = corruption or Corruption()
    x = sample_times(rng, duration_s, dt_s, c)
    clean = lumped_curve(x, T0, ambient, k_per_s)
    xs, y, clean, spikes = corrupt(rng, x, clean, c)
    cross = lumped_crossing_s(T0, ambient, k_per_s, threshold)
    x_last = float(x.max())
    return Synth(
        t=xs + t_start,
        y=y,
        threshold=threshold,
        eta_true_s=_eta(cross, x_last),
        crossing_t_true=None if cross is None else t_start + cross,
        t_last=t_start + x_last,
        truth={"T0": T0, "ambient": ambient, "k_per_s": k_per_s, "t0": t_start},
        y_clean=clean,
        spike_mask=spikes,
    )


def air_load_curves(
    x_s: np.ndarray,
    *,
    load_T0: float,
    air_T0: float,
    outside: float,
    k_air_per_s: float,
    k_load_per_s: float,
) -> tuple[np.ndarray, np.ndarray]:
    """Air warms toward outside; the load follows the air.

    Ta(t) = Tout + (Ta0 - Tout) e^(-a t);  dT/dt = -b (T - Ta(t))
    => T(t) = Tout + A e^(-a t) + (T0 - Tout - A) e^(-b t),  A = b (Ta0 - Tout) / (b - a).
    """
    x = np.asarray(x_s, float)
    a, b = k_air_per_s, k_load_per_s
    air = outside + (air_T0 - outside) * np.exp(-a * x)
    if abs(b - a) < 1e-12 * max(a, b):
        # limit a -> b: T = Tout + (T0 - Tout) e^(-b t) + b (Ta0 - Tout) t e^(-b t)
        load = (
            outside
            + (load_T0 - outside) * np.exp(-b * x)
            + b * (air_T0 - outside) * x * np.exp(-b * x)
        )
    else:
        A = b * (air_T0 - outside) / (b - a)
        load = outside + A * np.exp(-a * x) + (load_T0 - outside - A) * np.exp(-b * x)
    return air, load


def measured_air(
    seed: int,
    *,
    load_T0: float,
    air_T0: float,
    outside: float,
    k_air_per_s: float,
    k_load_per_s: float,
    threshold: float,
    duration_s: float,
    dt_s: float = 60.0,
    corruption: Corruption | None = None,
    air_noise: float | None = None,
    t_start: float = T_START,
) -> Synth:
    """The reefer after its unit fails: air probe toward outside, load probe toward the air.

    The air series is sampled at the same instants (its own noise ``air_noise``, default the load's,
    quantised like the load; no spikes).
    """
    rng = np.random.default_rng(seed)
    c = corruption or Corruption()
    x = sample_times(rng, duration_s, dt_s, c)
    kw = {
        "load_T0": load_T0,
        "air_T0": air_T0,
        "outside": outside,
        "k_air_per_s": k_air_per_s,
        "k_load_per_s": k_load_per_s,
    }
    air, load = air_load_curves(x, **kw)
    an = c.noise if air_noise is None else air_noise
    air_y = air + (rng.normal(0, an, x.size) if an > 0 else 0.0)
    if c.quantum:
        air_y = np.round(air_y / c.quantum) * c.quantum
    xs, y, clean, spikes = corrupt(rng, x, load, c)
    x_last = float(x.max())

    def gap(s: float) -> float:
        return float(air_load_curves(np.array([s]), **kw)[1][0] - threshold)

    # first root over a long horizon (the load is monotone or has one turn)
    slow = 1.0 / min(k_air_per_s, k_load_per_s)
    grid = np.concatenate([[0.0], np.geomspace(1e-4 * slow, 100 * slow, 2000)])
    g = air_load_curves(grid, **kw)[1] - threshold
    hit = np.flatnonzero(np.sign(g[1:]) != np.sign(g[0]))
    cross: float | None = None
    if g[0] == 0:
        cross = 0.0
    elif hit.size:
        cross = float(brentq(gap, grid[hit[0]], grid[hit[0] + 1], xtol=1e-6))
    return Synth(
        t=xs + t_start,
        y=y,
        threshold=threshold,
        eta_true_s=_eta(cross, x_last),
        crossing_t_true=None if cross is None else t_start + cross,
        t_last=t_start + x_last,
        truth={**kw, "t0": t_start},
        ambient_t=x + t_start,
        ambient_y=air_y,
        y_clean=clean,
        spike_mask=spikes,
    )


def piecewise_ambient_curve(
    x_s: np.ndarray, T0: float, k_per_s: float, steps: list[tuple[float, float]]
) -> np.ndarray:
    """Exact lumped response to a piecewise-constant ambient.

    steps: [(start_s, Ta), ...] sorted, the first starting at 0.  Within each piece
    T(t) = Ta_i + (T(t_i) - Ta_i) e^(-k (t - t_i)).
    """
    x = np.asarray(x_s, float)
    out = np.empty_like(x)
    T_start = T0
    for i, (s, ta) in enumerate(steps):
        end = steps[i + 1][0] if i + 1 < len(steps) else math.inf
        sel = (x >= s) & (x < end)
        out[sel] = ta + (T_start - ta) * np.exp(-k_per_s * (x[sel] - s))
        if math.isfinite(end):
            T_start = ta + (T_start - ta) * math.exp(-k_per_s * (end - s))
    return out


def regime_change(
    seed: int,
    *,
    T0: float,
    k_per_s: float,
    steps: list[tuple[float, float]],
    threshold: float,
    duration_s: float,
    dt_s: float = 30.0,
    corruption: Corruption | None = None,
    t_start: float = T_START,
) -> Synth:
    """An item whose surroundings change in steps: e.g. a door opened then closed,
    steps=[(0, 3), (3600, 18), (4500, 3)], or a compressor that restarts, [(0, 25), (7200, 2)].

    The truth's ``regime_start`` is the start of the last step.
    """
    rng = np.random.default_rng(seed)
    c = corruption or Corruption()
    x = sample_times(rng, duration_s, dt_s, c)
    clean = piecewise_ambient_curve(x, T0, k_per_s, steps)
    xs, y, clean, spikes = corrupt(rng, x, clean, c)
    s_last, ta_last = steps[-1]
    T_at = float(piecewise_ambient_curve(np.array([s_last]), T0, k_per_s, steps)[0])
    rel = lumped_crossing_s(T_at, ta_last, k_per_s, threshold)
    x_last = float(x.max())
    cross = None if rel is None else s_last + rel
    return Synth(
        t=xs + t_start,
        y=y,
        threshold=threshold,
        eta_true_s=_eta(cross, x_last),
        crossing_t_true=None if cross is None else t_start + cross,
        t_last=t_start + x_last,
        truth={
            "T0": T0,
            "k_per_s": k_per_s,
            "ambient": ta_last,
            "regime_start": t_start + s_last,
            "T_regime_start": T_at,
            "t0": t_start,
        },
        y_clean=clean,
        spike_mask=spikes,
    )


def compressor_sawtooth(
    seed: int,
    *,
    low: float = 2.0,
    high: float = 5.0,
    warm_ambient: float = 25.0,
    cold_coil: float = -10.0,
    k_per_s: float = 1 / 3600,
    threshold: float = 8.0,
    duration_s: float = 4 * 3600,
    dt_s: float = 30.0,
    corruption: Corruption | None = None,
    t_start: float = T_START,
) -> Synth:
    """A healthy fridge's air probe: the compressor cools to ``low``, stops, the air warms to
    ``high``, the compressor starts again.  The truth never crosses ``threshold`` (> high).
    """
    rng = np.random.default_rng(seed)
    c = corruption or Corruption()
    x = sample_times(rng, duration_s, dt_s, c)
    # fine grid simulation of the thermostat (exact within each on/off piece)
    h = min(dt_s, 10.0)
    grid = np.arange(0.0, duration_s + h, h)
    temp = np.empty(grid.size)
    T, on = 0.5 * (low + high), False
    for i in range(grid.size):
        temp[i] = T
        ta = cold_coil if on else warm_ambient
        T = ta + (T - ta) * math.exp(-k_per_s * h)
        if on and T <= low:
            on = False
        elif not on and T >= high:
            on = True
    clean = np.interp(x, grid, temp)
    xs, y, clean, spikes = corrupt(rng, x, clean, c)
    return Synth(
        t=xs + t_start,
        y=y,
        threshold=threshold,
        eta_true_s=None,
        crossing_t_true=None,
        t_last=t_start + float(x.max()),
        truth={"low": low, "high": high, "k_per_s": k_per_s, "t0": t_start},
        y_clean=clean,
        spike_mask=spikes,
    )
