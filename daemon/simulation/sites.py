"""The six invented sites: their probes, the physics each follows and the events of its story.

Each builder returns a :class:`Site`; :data:`SITES` names them (the names ``thermeta simulate``
and ``thermeta demo`` take, listed without numpy in ``simulation/__init__.py``).  The sites,
their names and all numbers are our own inventions for the demo.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np
from thermeta.daemon.simulation import SITE_NAMES
from thermeta.daemon.simulation.physics import (
    Direction,
    Piece,
    centre_probe,
    thermostat_pieces,
    time_to_reach,
    two_stage,
)
from thermeta.daemon.simulation.synth import Corruption

PayloadForm = Literal["json", "json-rfc3339", "senml"]
H = 3600.0
MIN = 60.0


@dataclass(frozen=True)
class ProbeSpec:
    """One sensor: where it publishes, how, and the noise-free curve it follows (relative s)."""

    name: str
    topic: str
    curve: Callable[[np.ndarray], np.ndarray]
    role: Literal["load", "ambient"] = "load"  # ambient: an air or coolant probe
    form: PayloadForm = "json"
    dt_s: float = 60.0
    batch: int = 1  # SenML: readings per pack (a logger that sends every few readings)
    threshold: float | None = None
    direction: Direction | None = None  # where the load is heading
    model: str = "lumped"
    ambient_probe: str | None = None  # the site's air/coolant probe (measured ambient)
    ambient_known: float | None = None  # or a known constant ambient (a setpoint)
    lead_s: float | None = None
    window_s: float | None = None  # history a fit may use, when the default 2 h is too short
    kind: Literal["limit", "target"] = "limit"  # the threshold is a limit, or a target to reach
    schedule: str | None = None  # a named schedule of stages (its first stage is the threshold)
    within_s: float | None = None  # a target's deadline, from its episode's start
    start: float | None = None  # the temperature whose passing opens an episode
    budget_s: float | None = None  # a limit's allowance of time beyond it
    corruption: Corruption = field(default_factory=Corruption)
    truth: dict[str, float] = field(default_factory=dict)
    # the curve if the surroundings kept the course they have at s (relative s): what a forecast
    # made then can know (a door closed later is not in it); None: no later event changes it
    held: Callable[[float], Callable[[np.ndarray], np.ndarray]] | None = None


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


@dataclass(frozen=True)
class Site:
    title: str
    duration_s: float
    event_s: float  # when the surroundings changed (the regime start a detector should find)
    specs: list[ProbeSpec]
    events: list[tuple[float, str]]


def _upto(pieces: list[Piece], s: float) -> list[Piece]:
    """The pieces begun by relative time ``s``: the surroundings as they stand then, kept."""
    return [p for p in pieces if p[0] <= s] or pieces[:1]


def _reefer() -> Site:
    """A reefer container on a yard stack; its power fails; the return air warms toward a hot
    afternoon outside, the pallets follow the air (measured ambient)."""
    fail, outside = 10 * MIN, 29.0
    pieces = [(0.0, 2.0, 1 / H), (fail, outside, 1 / (1.2 * H))]
    base = "eastpier/reefer-12"

    def air(x):
        return two_stage(x, pieces, 2.0)[0]

    def load(kl, upto=pieces):
        return lambda x: two_stage(x, upto, 2.0, 2.0, kl)[1]

    def held(kl):
        return lambda s: load(kl, _upto(pieces, s))

    common: dict[str, Any] = dict(
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
            held=held(1 / (4.5 * H)),
            # the cargo may spend 45 minutes in all above 8 degC (an invented allowance)
            budget_s=45 * MIN,
            **common,
        ),
        ProbeSpec(
            f"{base}/load-door",
            f"{base}/load-door",
            load(1 / (7 * H)),
            truth={"k_per_s": 1 / (7 * H), "ambient": outside},
            held=held(1 / (7 * H)),
            **common,
        ),
    ]
    return Site(
        "reefer on the east pier loses power",
        8 * H,
        fail,
        specs,
        [(fail, "eastpier/reefer-12: power lost, unit stopped")],
    )


def _walkin() -> Site:
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

    def load(l0, kl, upto=pieces):
        return lambda x: two_stage(x, upto, 3.0, l0, kl)[1]

    def held(l0, kl):
        return lambda s: load(l0, kl, _upto(pieces, s))

    common: dict[str, Any] = dict(
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
            held=held(3.0, 1 / (2.5 * H)),
            **common,
        ),
        ProbeSpec(
            f"{base}/meat-rack",
            f"{base}/meat-rack",
            load(2.8, 1 / (4 * H)),
            truth={"k_per_s": 1 / (4 * H), "ambient_while_open": 16.0},
            held=held(2.8, 1 / (4 * H)),
            **common,
        ),
    ]
    return Site(
        "walk-in door left ajar for 20 minutes",
        4 * H,
        opened,
        specs,
        [(opened, f"{base}: door left ajar"), (closed, f"{base}: door closed")],
    )


def _wort() -> Site:
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
    # pitching temperature is the goal of the chill: a target, reached calmly, within 50 minutes
    # of the wort passing 90 degC on its way down (the episode's start)
    common: dict[str, Any] = dict(
        threshold=20.0,
        direction="falling",
        kind="target",
        within_s=50 * MIN,
        start=90.0,
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
    return Site(
        "20 hl of wort through the plate chiller",
        2 * H,
        start,
        specs,
        [(start, f"{base}: chilling started"), (stop, f"{base}: chilling stopped at 18 degC")],
    )


def _blast_chiller() -> Site:
    """Trays of cooked rice in a blast chiller, against the two-stage cooling schedule; the deep
    covered tray C cools too slowly for the first stage."""
    hold = 4 * H
    pieces = [(0.0, -6.0, 1 / (6 * MIN)), (hold, 2.0, 1 / (10 * MIN))]
    base = "riverside-canteen/blast-1"

    def air(x):
        return two_stage(x, pieces, 20.0)[0]

    def tray(kl):
        return lambda x: two_stage(x, pieces, 20.0, 74.0, kl)[1]

    # the trays are watched against the food-code cooling schedule (its first stage: 21 degC)
    common: dict[str, Any] = dict(
        threshold=21.0,
        direction="falling",
        kind="target",
        schedule="food-code-cooling",
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
    return Site(
        "cooked rice in the blast chiller",
        7 * H,
        0.0,
        specs,
        [(0.0, f"{base}: trays loaded at 74 degC"), (hold, f"{base}: switched to holding")],
    )


def _trailer() -> Site:
    """A frozen load in a trailer whose unit is failing: the air creeps up toward +4 degC, the
    centre of a large carton lags (conduction, slab).  alpha ~ 1.1e-6 m2/s for a frozen food
    (from memory, order of magnitude)."""
    fail = 30 * MIN
    pieces = [(0.0, -22.0, 1 / H), (fail, 4.0, 1 / (1.5 * H))]
    base = "route9/trailer-4"

    def air(x, upto=pieces):
        return two_stage(np.asarray(x, float), upto, -22.0)[0]

    def carton(half_m, biot, upto=pieces):
        a = 1.1e-6 / half_m**2
        return (lambda x: centre_probe(x, lambda z: air(z, upto), -22.0, biot, a, "slab")), a

    def held(half_m, biot):
        return lambda s: carton(half_m, biot, _upto(pieces, s))[0]

    large, a_large = carton(0.15, 1.5)
    small, a_small = carton(0.06, 0.6)
    # Quick-frozen food: -18 degC, brief rises of at most 3 degC in transport, so -15 degC is the
    # limit: Council Directive 89/108/EEC (from memory).
    common: dict[str, Any] = dict(
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
            held=held(0.15, 1.5),
            **common,
        ),
        ProbeSpec(
            f"{base}/carton-small",
            f"{base}/carton-small",
            small,
            truth={"biot": 0.6, "a_per_s": a_small, "ambient": 4.0},
            held=held(0.06, 0.6),
            **common,
        ),
    ]
    return Site(
        "frozen load, trailer unit failing",
        12 * H,
        fail,
        specs,
        [(fail, f"{base}: unit capacity failing")],
    )


def _cold_room() -> Site:
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

    common: dict[str, Any] = dict(
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
    return Site("healthy cold room, compressor cycling", duration, 0.0, specs, [])


SITES: dict[str, Callable[[], Site]] = dict(
    zip(SITE_NAMES, (_reefer, _walkin, _wort, _blast_chiller, _trailer, _cold_room), strict=True)
)
