"""Invented sites' readings, with the truth known.

Pure numerics (no I/O, no clock): :func:`build` returns a :class:`Scenario` holding, per probe,
the readings as a sensor would send them (noise, 0.1 degC steps, a few spikes, dropouts) and the
noise-free curve, and per load probe the truth (the true crossing time, k, the ambient, the
regime start).  The simulator (``daemon/simulation/simulator.py``) publishes them over MQTT;
tests and the demo compare forecasts against the truth.  The sites are in ``sites.py``, their
physics in ``physics.py``.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from thermeta.daemon.simulation import NAMES, synth
from thermeta.daemon.simulation.physics import first_crossing
from thermeta.daemon.simulation.sites import SITES, ProbeSpec

T_START = synth.T_START
H = 3600.0

# Two-stage cooling of cooked food: 57 -> 21 degC within 2 h, and -> 5 degC within 6 h in total.
# US FDA Food Code 2022, 3-501.14 (from memory).
COOLING_STAGES = ((57.0, 21.0, 2 * H), (57.0, 5.0, 6 * H))

__all__ = ["NAMES", "SITES", "Scenario", "ProbeSeries", "build", "cooling_schedule"]


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
