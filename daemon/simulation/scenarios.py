"""Invented sites whose readings come from the forecast core's own physics, with the truth known.

Pure numerics (no I/O, no clock): :func:`build` returns a :class:`Scenario` holding, per probe,
the readings as a sensor would send them (noise, 0.1 degC steps, a few spikes, dropouts) and the
noise-free curve, and per load probe the truth (the true crossing time, k, the ambient, the
regime start).  The simulator (``daemon/simulation/simulator.py``) publishes them over MQTT;
tests and the demo compare forecasts against the truth.

Physics, in degC and seconds:

* lumped stages in a chain: the air (or a vessel) follows a driving temperature that changes in
  pieces (a unit fails, a door opens, a compressor cycles); the load follows the air:
      dTa/dt = -ka (Ta - U_i)     on piece i
      dT/dt  = -kl (T - Ta)
  solved exactly on each piece (see :func:`two_stage`);
* a probe at the centre of a thick carton: transient conduction, the exact series step response
  theta_centre(Fo, Bi) (predictors/conduction_series.py) superposed over the air history
  (Duhamel's theorem):  T(t) = Ti + sum_j dTa_j (1 - theta_centre(a (t - tau_j), Bi)).
  No latent heat: a simplification for a frozen load that stays below about -10 degC.

The sites, their names and all numbers are our own inventions for the demo.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from thermeta.daemon.simulation import synth
from thermeta.daemon.simulation.synth import Corruption
from thermeta.predictors.conduction_series import theta_centre

T_START = synth.T_START
H = 3600.0
MIN = 60.0

# Two-stage cooling of cooked food: 57 -> 21 degC within 2 h, and -> 5 degC within 6 h in total.
# US FDA Food Code 2022, 3-501.14 (from memory).
COOLING_STAGES = ((57.0, 21.0, 2 * H), (57.0, 5.0, 6 * H))

Piece = tuple[float, float, float]  # (start_s, driving temperature U, ka_per_s)


# ---------------------------------------------------------------------------------------------
# physics
# ---------------------------------------------------------------------------------------------


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
    direction: str,
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


# ---------------------------------------------------------------------------------------------
# the scenario objects
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class ProbeSpec:
    """One sensor: where it publishes, how, and the noise-free curve it follows (relative s)."""

    name: str
    topic: str
    curve: Callable[[np.ndarray], np.ndarray]
    role: str = "load"  # "load" (an item with a threshold) | "ambient" (an air or coolant probe)
    form: str = "json"  # "json" | "json-rfc3339" | "senml"
    dt_s: float = 60.0
    batch: int = 1  # SenML: readings per pack (a logger that sends every few readings)
    threshold: float | None = None
    direction: str | None = None  # where the load is heading: "rising" | "falling"
    model: str = "lumped"
    ambient_probe: str | None = None  # the site's air/coolant probe (measured ambient)
    ambient_known: float | None = None  # or a known constant ambient (a setpoint)
    lead_s: float | None = None
    window_s: float | None = None  # history a fit may use, when the default 2 h is too short
    corruption: Corruption = field(default_factory=Corruption)
    truth: dict[str, float] = field(default_factory=dict)


@dataclass
class ProbeSeries:
    """A probe's readings (time order) and its truth."""

    spec: ProbeSpec
    t: np.ndarray
    y: np.ndarray
    y_clean: np.ndarray
    spike_mask: np.ndarray
    crossing_t_true: float | None = None
    truth: dict[str, float | None] = field(default_factory=dict)

    @property
    def name(self) -> str:
        return self.spec.name


@dataclass
class Scenario:
    """Several probes at one or more invented sites, with events and the truth, on one timeline."""

    name: str
    title: str
    t_start: float
    duration_s: float
    probes: list[ProbeSeries]
    events: list[tuple[float, str]] = field(default_factory=list)  # (epoch s, what happened)

    def probe(self, name: str) -> ProbeSeries:
        for p in self.probes:
            if p.name == name:
                return p
        raise KeyError(name)

    @property
    def loads(self) -> list[ProbeSeries]:
        return [p for p in self.probes if p.spec.role == "load"]

    def n_readings(self) -> int:
        return int(sum(p.t.size for p in self.probes))


# One dropout per probe, under 10 minutes in 12 h: shorter than the daemon's default silence limit
# (15 min), so a healthy site does not go stale.
DEFAULT_NOISE = Corruption(
    noise=0.06,
    quantum=0.1,
    spike_frac=0.004,
    spike_size=12.0,
    n_gaps=1,
    gap_frac=0.012,
    irregular=0.05,
)
AIR_NOISE = Corruption(
    noise=0.1,
    quantum=0.1,
    spike_frac=0.002,
    spike_size=10.0,
    n_gaps=1,
    gap_frac=0.008,
    irregular=0.05,
)


def _sample(
    spec: ProbeSpec,
    rng: np.random.Generator,
    duration_s: float,
    t_start: float,
    event_s: float,
    horizon_s: float,
) -> ProbeSeries:
    x = synth.sample_times(rng, duration_s, spec.dt_s, spec.corruption)
    clean = spec.curve(x)
    x, y, clean, spikes = synth.corrupt(rng, x, clean, spec.corruption)
    series = ProbeSeries(spec=spec, t=x + t_start, y=y, y_clean=clean, spike_mask=spikes)
    series.truth = {k: v for k, v in spec.truth.items()}
    if spec.role == "load" and spec.threshold is not None and spec.direction:
        cross = first_crossing(spec.curve, spec.threshold, spec.direction, 0.0, horizon_s)
        series.crossing_t_true = None if cross is None else t_start + cross
        series.truth["crossing_t"] = series.crossing_t_true
        series.truth["regime_start"] = t_start + event_s
    return series


@dataclass(frozen=True)
class _Site:
    title: str
    duration_s: float
    event_s: float  # when the surroundings changed (the regime start a detector should find)
    specs: list[ProbeSpec]
    events: list[tuple[float, str]]


def _reefer() -> _Site:
    """A reefer container on a yard stack; its power fails; the return air warms toward a hot
    afternoon outside, the pallets follow the air (measured ambient)."""
    fail, outside = 10 * MIN, 29.0
    pieces = [(0.0, 2.0, 1 / H), (fail, outside, 1 / (1.2 * H))]
    base = "eastpier/reefer-12"

    def air(x):
        return two_stage(x, pieces, 2.0)[0]

    def load(kl):
        return lambda x: two_stage(x, pieces, 2.0, 2.0, kl)[1]

    common = dict(
        threshold=8.0,
        direction="rising",
        ambient_probe=f"{base}/air",
        form="senml",
        dt_s=60.0,
        lead_s=3 * H,
        corruption=DEFAULT_NOISE,
    )
    specs = [
        ProbeSpec(
            f"{base}/air",
            f"{base}/air",
            air,
            role="ambient",
            form="senml",
            dt_s=60.0,
            corruption=AIR_NOISE,
        ),
        ProbeSpec(
            f"{base}/load-top",
            f"{base}/load-top",
            load(1 / (4.5 * H)),
            truth={"k_per_s": 1 / (4.5 * H), "ambient": outside},
            **common,
        ),
        ProbeSpec(
            f"{base}/load-door",
            f"{base}/load-door",
            load(1 / (7 * H)),
            truth={"k_per_s": 1 / (7 * H), "ambient": outside},
            **common,
        ),
    ]
    return _Site(
        "reefer on the east pier loses power",
        8 * H,
        fail,
        specs,
        [(fail, "eastpier/reefer-12: power lost, unit stopped")],
    )


def _walkin() -> _Site:
    """A kitchen walk-in cooler whose door is left ajar for 20 minutes, then closed."""
    opened, closed = 30 * MIN, 50 * MIN
    pre = [
        (0.0, 3.0, 1 / (15 * MIN)),
        (opened, 16.0, 1 / (8 * MIN)),
        (closed, -6.0, 1 / (15 * MIN)),
    ]
    a_closed = float(two_stage(np.array([closed]), pre, 3.0)[0][0])
    back = closed + (time_to_reach(a_closed, -6.0, 1 / (15 * MIN), 3.0) or 0.0)
    pieces = pre + [(back, 3.0, 1 / (15 * MIN))]
    base = "millrace-kitchen/walkin"

    def air(x):
        return two_stage(x, pieces, 3.0)[0]

    def load(l0, kl):
        return lambda x: two_stage(x, pieces, 3.0, l0, kl)[1]

    common = dict(
        threshold=5.0,
        direction="rising",
        ambient_probe=f"{base}/air",
        form="json-rfc3339",
        dt_s=30.0,
        lead_s=45 * MIN,
        corruption=DEFAULT_NOISE,
    )
    specs = [
        ProbeSpec(
            f"{base}/air",
            f"{base}/air",
            air,
            role="ambient",
            form="json-rfc3339",
            dt_s=30.0,
            corruption=AIR_NOISE,
        ),
        ProbeSpec(
            f"{base}/dairy-shelf",
            f"{base}/dairy-shelf",
            load(3.0, 1 / (2.5 * H)),
            truth={"k_per_s": 1 / (2.5 * H), "ambient_while_open": 16.0},
            **common,
        ),
        ProbeSpec(
            f"{base}/meat-rack",
            f"{base}/meat-rack",
            load(2.8, 1 / (4 * H)),
            truth={"k_per_s": 1 / (4 * H), "ambient_while_open": 16.0},
            **common,
        ),
    ]
    return _Site(
        "walk-in door left ajar for 20 minutes",
        4 * H,
        opened,
        specs,
        [(opened, f"{base}: door left ajar"), (closed, f"{base}: door closed")],
    )


def _wort() -> _Site:
    """20 hl of wort recirculated through a plate chiller toward pitching temperature.

    k = eff * flow / volume (well-mixed vessel): 0.8 * 150 l/min / 2000 l = 0.06 /min.
    The brewer stops chilling at 18 degC; the fermenter then holds it there.
    """
    start, coolant, k = 5 * MIN, 9.0, 0.8 * 150.0 / 2000.0 / MIN
    stop = start + (time_to_reach(97.0, coolant, k, 18.0) or 0.0)
    pieces = [(0.0, 97.0, 1 / H), (start, coolant, k), (stop, 18.0, 1 / H)]
    base = "copperbeck/brewhouse/batch-0417"

    def wort(offset):
        return lambda x: two_stage(x, pieces, 97.0)[0] + offset

    # The coolant probe reads 9 degC steadily also before the pump starts, so it cannot tell the
    # forecast when chilling began: the items use the coolant setpoint as a known ambient.
    common = dict(
        threshold=20.0,
        direction="falling",
        ambient_known=coolant,
        dt_s=10.0,
        lead_s=15 * MIN,
        corruption=DEFAULT_NOISE,
    )
    specs = [
        ProbeSpec(
            f"{base}/coolant-in",
            f"{base}/coolant-in",
            lambda x: np.full(np.shape(x), coolant),
            role="ambient",
            dt_s=10.0,
            corruption=AIR_NOISE,
        ),
        ProbeSpec(
            f"{base}/wort",
            f"{base}/wort",
            wort(0.0),
            truth={"k_per_s": k, "ambient": coolant},
            **common,
        ),
        ProbeSpec(
            f"{base}/wort-top",
            f"{base}/wort-top",
            wort(0.3),
            truth={"k_per_s": k, "ambient": coolant + 0.3},
            **common,
        ),
    ]
    return _Site(
        "20 hl of wort through the plate chiller",
        2 * H,
        start,
        specs,
        [(start, f"{base}: chilling started"), (stop, f"{base}: chilling stopped at 18 degC")],
    )


def _blast_chiller() -> _Site:
    """Trays of cooked rice in a blast chiller, against the two-stage cooling schedule; the deep
    covered tray C cools too slowly for the first stage."""
    hold = 4 * H
    pieces = [(0.0, -6.0, 1 / (6 * MIN)), (hold, 2.0, 1 / (10 * MIN))]
    base = "riverside-canteen/blast-1"

    def air(x):
        return two_stage(x, pieces, 20.0)[0]

    def tray(kl):
        return lambda x: two_stage(x, pieces, 20.0, 74.0, kl)[1]

    common = dict(
        threshold=21.0,
        direction="falling",
        ambient_probe=f"{base}/air",
        dt_s=30.0,
        lead_s=30 * MIN,
        corruption=DEFAULT_NOISE,
    )
    specs = [
        ProbeSpec(
            f"{base}/air", f"{base}/air", air, role="ambient", dt_s=30.0, corruption=AIR_NOISE
        )
    ]
    for tag, tau in (("tray-a", 55 * MIN), ("tray-b", 65 * MIN), ("tray-c", 170 * MIN)):
        specs.append(
            ProbeSpec(
                f"{base}/{tag}",
                f"{base}/{tag}",
                tray(1 / tau),
                truth={"k_per_s": 1 / tau, "ambient": -6.0},
                **common,
            )
        )
    return _Site(
        "cooked rice in the blast chiller",
        7 * H,
        0.0,
        specs,
        [(0.0, f"{base}: trays loaded at 74 degC"), (hold, f"{base}: switched to holding")],
    )


def _trailer() -> _Site:
    """A frozen load in a trailer whose unit is failing: the air creeps up toward +4 degC, the
    centre of a large carton lags (conduction, slab).  alpha ~ 1.1e-6 m2/s for a frozen food
    (from memory, order of magnitude)."""
    fail = 30 * MIN
    pieces = [(0.0, -22.0, 1 / H), (fail, 4.0, 1 / (1.5 * H))]
    base = "route9/trailer-4"

    def air(x):
        return two_stage(np.asarray(x, float), pieces, -22.0)[0]

    def carton(half_m, biot):
        a = 1.1e-6 / half_m**2
        return (lambda x: centre_probe(x, air, -22.0, biot, a, "slab")), a

    large, a_large = carton(0.15, 1.5)
    small, a_small = carton(0.06, 0.6)
    # Quick-frozen food: -18 degC, brief rises of at most 3 degC in transport, so -15 degC is the
    # limit: Council Directive 89/108/EEC (from memory).
    common = dict(
        threshold=-15.0,
        direction="rising",
        ambient_probe=f"{base}/air",
        form="senml",
        dt_s=60.0,
        batch=5,
        model="slab",
        lead_s=2 * H,
        window_s=12 * H,
        corruption=DEFAULT_NOISE,
    )
    specs = [
        ProbeSpec(
            f"{base}/air",
            f"{base}/air",
            air,
            role="ambient",
            form="senml",
            dt_s=60.0,
            batch=5,
            corruption=AIR_NOISE,
        ),
        ProbeSpec(
            f"{base}/carton-large",
            f"{base}/carton-large",
            large,
            truth={"biot": 1.5, "a_per_s": a_large, "ambient": 4.0},
            **common,
        ),
        ProbeSpec(
            f"{base}/carton-small",
            f"{base}/carton-small",
            small,
            truth={"biot": 0.6, "a_per_s": a_small, "ambient": 4.0},
            **common,
        ),
    ]
    return _Site(
        "frozen load, trailer unit failing",
        12 * H,
        fail,
        specs,
        [(fail, f"{base}: unit capacity failing")],
    )


def _cold_room() -> _Site:
    """A healthy cheese cold room: the compressor cycles between 1.5 and 4 degC air; the crates
    barely notice.  Nothing here should raise an alert."""
    duration = 12 * H
    pieces = thermostat_pieces(
        duration + 30 * H,
        4.0,
        1.5,
        4.0,
        cold=(-7.0, 1 / (20 * MIN)),
        warm=(14.0, 1 / (1.5 * H)),
        start_on=True,
    )
    base = "hillside-dairy/cold-room-b"

    def air(x):
        return two_stage(x, pieces, 4.0)[0]

    def crate(l0, kl):
        return lambda x: two_stage(x, pieces, 4.0, l0, kl)[1]

    common = dict(
        threshold=5.0,
        direction="rising",
        ambient_probe=f"{base}/air",
        dt_s=60.0,
        lead_s=45 * MIN,
        corruption=DEFAULT_NOISE,
    )
    specs = [
        ProbeSpec(
            f"{base}/air", f"{base}/air", air, role="ambient", dt_s=60.0, corruption=AIR_NOISE
        ),
        ProbeSpec(
            f"{base}/crate-1",
            f"{base}/crate-1",
            crate(2.9, 1 / (4 * H)),
            truth={"k_per_s": 1 / (4 * H)},
            **common,
        ),
        ProbeSpec(
            f"{base}/crate-2",
            f"{base}/crate-2",
            crate(3.0, 1 / (6 * H)),
            truth={"k_per_s": 1 / (6 * H)},
            **common,
        ),
    ]
    return _Site("healthy cold room, compressor cycling", duration, 0.0, specs, [])


SITES: dict[str, Callable[[], _Site]] = {
    "reefer-power-loss": _reefer,
    "walkin-door-ajar": _walkin,
    "wort-chill": _wort,
    "blast-chill-rice": _blast_chiller,
    "frozen-trailer": _trailer,
    "cold-room-healthy": _cold_room,
}
NAMES = tuple(SITES) + ("all",)


def build(
    name: str, *, seed: int = 0, t_start: float = T_START, duration_s: float | None = None
) -> Scenario:
    """The scenario ``name`` (one of :data:`NAMES`; "all" runs every site on one timeline)."""
    if name not in NAMES:
        raise ValueError(f"unknown scenario {name!r}; choose one of {', '.join(NAMES)}")
    if duration_s is not None and not duration_s > 0:
        raise ValueError(f"duration_s must be positive, got {duration_s!r}")
    keys = list(SITES) if name == "all" else [name]
    rng = np.random.default_rng(seed)
    probes: list[ProbeSeries] = []
    events: list[tuple[float, str]] = []
    titles = []
    sites = {key: SITES[key]() for key in keys}
    # on one timeline every site keeps sending until the longest story has played out
    longest = duration_s or max(site.duration_s for site in sites.values())
    for site in sites.values():
        dur = longest
        titles.append(site.title)
        events += [(t_start + s, text) for s, text in site.events]
        for spec in site.specs:
            probes.append(_sample(spec, rng, dur, t_start, site.event_s, dur + 24 * H))
    if name == "blast-chill-rice" or name == "all":
        for p in probes:
            if "blast" in p.name and p.spec.role == "load":
                p.truth.update(cooling_schedule(p.spec.curve, t_start))
    title = titles[0] if len(titles) == 1 else "all six sites"
    return Scenario(name, title, t_start, longest, probes, sorted(events))


def cooling_schedule(curve: Callable[[np.ndarray], np.ndarray], t_start: float) -> dict:
    """When the true curve passes 57, 21 and 5 degC, the deadlines and whether each stage is met
    (FDA Food Code 2022, 3-501.14, from memory: 57 -> 21 within 2 h, -> 5 within 6 h)."""
    t57 = first_crossing(curve, 57.0, "falling", 0.0, 24 * H, 5.0)
    t21 = first_crossing(curve, 21.0, "falling", 0.0, 24 * H, 5.0)
    t5 = first_crossing(curve, 5.0, "falling", 0.0, 24 * H, 5.0)
    out: dict[str, float | None] = {"t57": None, "t21": None, "t5": None}
    if t57 is None:
        return out
    out["t57"] = t_start + t57
    out["t21"] = None if t21 is None else t_start + t21
    out["t5"] = None if t5 is None else t_start + t5
    out["stage1_deadline"] = t_start + t57 + COOLING_STAGES[0][2]
    out["stage2_deadline"] = t_start + t57 + COOLING_STAGES[1][2]
    out["stage1_met"] = float(t21 is not None and t21 - t57 <= COOLING_STAGES[0][2])
    out["stage2_met"] = float(t5 is not None and t5 - t57 <= COOLING_STAGES[1][2])
    return out
