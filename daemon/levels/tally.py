"""Time and degree-minutes beyond a limit, a budget's use, and the mean kinetic temperature.

Readings are joined by straight lines (the same picture a chart recorder draws): between two
readings the time beyond a threshold is the part of the line beyond it, and the degree-seconds
the area between the line and the threshold.  A gap longer than ``max_gap_s`` is not joined:
nobody knows what happened in it; it is counted as ``gap_s``.

Mean kinetic temperature (USP <1079.2>, from memory):

    MKT = (dH/R) / -ln( sum_i w_i e^(-dH/(R T_i)) / sum_i w_i ),  T_i in kelvin,
    dH = 83.144 kJ/mol and R = 8.3144 J/(mol K), so dH/R = 10,000 K

with equal weights for equally spaced readings; the tally weights each stretch by its length
(the trapezoid rule on e^(-dH/(R T)) along the joined line).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

from thermeta.daemon.states import BudgetState, Side

DH_R_K = 10_000.0  # dH/R of USP <1079.2>: 83,144 J/mol / 8.3144 J/(mol K) (from memory)
KELVIN = 273.15
MAX_GAP_S = 3600.0


def mkt_c(values_c: Sequence[float], weights: Sequence[float] | None = None) -> float:
    """The mean kinetic temperature (degC) of readings in degC, equally weighted unless
    ``weights`` (e.g. the time each reading stands for) are given."""
    if len(values_c) == 0:
        raise ValueError("mkt_c needs at least one reading")
    w = [1.0] * len(values_c) if weights is None else [float(x) for x in weights]
    if len(w) != len(values_c) or any(x < 0 for x in w) or sum(w) <= 0:
        raise ValueError("weights must be as many as the readings, >= 0, not all 0")
    # MKT = (dH/R) / -ln( sum w e^(-dH/(R T)) / sum w )
    mean = sum(wi * math.exp(-DH_R_K / (v + KELVIN)) for wi, v in zip(w, values_c)) / sum(w)
    return DH_R_K / -math.log(mean) - KELVIN


def _beyond(e0: float, e1: float, dt: float) -> tuple[float, float]:
    """(time, area) where the straight line from excess e0 to e1 over dt is above 0."""
    if e0 <= 0 and e1 <= 0:
        return 0.0, 0.0
    if e0 >= 0 and e1 >= 0:
        return dt, dt * (e0 + e1) / 2.0
    top = max(e0, e1)
    part = dt * top / (top - min(e0, e1))
    return part, part * top / 2.0


@dataclass
class Excursion:
    """Beyond one limit: how long, and how far (degree-seconds, degC)."""

    threshold_c: float
    side: Side
    beyond_s: float = 0.0
    degree_s: float = 0.0

    def excess(self, v: float) -> float:
        return v - self.threshold_c if self.side == "above" else self.threshold_c - v


@dataclass
class Tally:
    """One item's readings over a span (from ``since_s``), folded in as they come."""

    since_s: float | None = None
    max_gap_s: float = MAX_GAP_S
    excursions: dict[str, Excursion] = field(default_factory=dict)
    # targets watched for the first time they are reached: name -> (threshold degC, side)
    targets: dict[str, tuple[float, Side]] = field(default_factory=dict)
    reached: dict[str, float] = field(default_factory=dict)  # name -> when (interpolated)
    # a pass seen at one reading, confirmed by the next (one spike does not reach a target)
    pending: dict[str, float] = field(default_factory=dict)
    last_t: float | None = None
    last_v: float | None = None
    covered_s: float = 0.0
    gap_s: float = 0.0
    mkt_sum: float = 0.0  # sum over stretches of dt x mean of e^(-dH/(R T))
    n: int = 0
    last_dt: float = 0.0  # the newest stretch between readings

    def add(self, t: Sequence[float], v: Sequence[float]) -> None:
        """Readings (degC) in time order; those not newer than the last one are skipped."""
        for ti, vi in zip(t, v):
            ti, vi = float(ti), float(vi)
            if self.since_s is not None and ti < self.since_s:
                continue
            if self.last_t is not None and ti <= self.last_t:
                continue
            if self.last_t is not None and self.last_v is not None:
                self._stretch(self.last_t, self.last_v, ti, vi)
            self._reach(ti, vi)
            self.last_t, self.last_v = ti, vi
            self.n += 1

    def _reach(self, t1: float, v1: float) -> None:
        """Targets first reached: when the line from the reading before got to them
        (interpolated; at t1 for the span's first reading), once the next reading is there too,
        so one stray reading (a spike) does not reach a target."""
        for name, (thr, side) in self.targets.items():
            if name in self.reached:
                continue
            if v1 > thr if side == "below" else v1 < thr:
                self.pending.pop(name, None)  # back on the near side: it was a stray reading
                continue
            if name in self.pending:
                self.reached[name] = self.pending.pop(name)
                continue
            t0, v0 = self.last_t, self.last_v
            if t0 is None or v0 is None or v0 == v1:
                self.pending[name] = t1
            else:
                # linear: t = t0 + (thr - v0) / (v1 - v0) * (t1 - t0), clipped to the stretch
                f = min(1.0, max(0.0, (thr - v0) / (v1 - v0)))
                self.pending[name] = t0 + f * (t1 - t0)

    def _stretch(self, t0: float, v0: float, t1: float, v1: float) -> None:
        dt = t1 - t0
        self.last_dt = dt
        if dt > self.max_gap_s:
            self.gap_s += dt
            return
        self.covered_s += dt
        f0, f1 = math.exp(-DH_R_K / (v0 + KELVIN)), math.exp(-DH_R_K / (v1 + KELVIN))
        self.mkt_sum += dt * (f0 + f1) / 2.0
        for ex in self.excursions.values():
            s, a = _beyond(ex.excess(v0), ex.excess(v1), dt)
            ex.beyond_s += s
            ex.degree_s += a

    @property
    def mkt_c(self) -> float | None:
        if self.covered_s <= 0 or self.mkt_sum <= 0:
            return None
        return DH_R_K / -math.log(self.mkt_sum / self.covered_s) - KELVIN

    def to_json(self, unit: str = "C") -> dict[str, Any]:
        from thermeta.daemon.units import from_celsius, scale_from_celsius
        from thermeta.predictors.result import rfc3339

        mkt = self.mkt_c
        return {
            "reached": {k: rfc3339(v) for k, v in self.reached.items()},
            "since": rfc3339(self.since_s),
            "until": rfc3339(self.last_t),
            "covered_s": round(self.covered_s, 1),
            "gap_s": round(self.gap_s, 1),
            "mkt": None if mkt is None else round(from_celsius(mkt, unit), 3),
            "beyond": {
                name: {
                    "beyond_s": round(ex.beyond_s, 1),
                    "degree_minutes": round(scale_from_celsius(ex.degree_s / 60.0, unit), 3),
                }
                for name, ex in self.excursions.items()
            },
        }


def new_tally(levels: Any, sides: dict[str, Any], since: float | None) -> Tally:
    """A tally watching each limit (time beyond) and target (when reached) of ``levels``
    (``spec.Level``) whose side is known."""
    tl = Tally(since_s=since)
    for lv in levels:
        side = sides.get(lv.name)
        if side is None:
            continue
        if lv.is_target:
            tl.targets[lv.name] = (lv.threshold_c, side)
        else:
            tl.excursions[lv.name] = Excursion(lv.threshold_c, side)
    return tl


@dataclass
class Budget:
    """A limit's allowance of time beyond it, over an episode or the rolling period."""

    level: str
    allowed_s: float
    used_s: float
    over: str  # "episode" or "period"
    since_s: float | None
    state: BudgetState = BudgetState.OK
    runs_out_at_s: float | None = None  # at the present course
    runs_out_lo_s: float | None = None  # ... its early end (the 90 % interval's)
    runs_out_hi_s: float | None = None  # ... its late end (None: open)

    @property
    def left_s(self) -> float:
        return max(0.0, self.allowed_s - self.used_s)

    def to_json(self) -> dict[str, Any]:
        from thermeta.predictors.result import rfc3339

        return {
            "level": self.level,
            "allowed_s": self.allowed_s,
            "used_s": round(self.used_s, 1),
            "left_s": round(self.left_s, 1),
            "over": self.over,
            "since": rfc3339(self.since_s),
            "state": self.state,
            "runs_out_at": rfc3339(self.runs_out_at_s),
            "runs_out_lo_at": rfc3339(self.runs_out_lo_s),
            "runs_out_hi_at": rfc3339(self.runs_out_hi_s),
        }


def budget(
    level: str,
    allowed_s: float,
    used_s: float,
    now: float,
    *,
    past: bool,
    eta_s: float | None,
    eta_lo_s: float | None,
    eta_hi_s: float | None,
    lead_s: float,
    over: str,
    since_s: float | None,
    check_every_s: float = 0.0,
    slack_s: float = 0.0,
) -> Budget:
    """The budget's state and when it runs out at the present course: beyond the limit now, it
    runs out when what is left has passed; inside, when what is left has passed after the
    forecast crossing (its interval's ends give the early and late ends); with no crossing
    forecast it does not run out.  The time used is measured between readings, so it may be
    short by up to ``slack_s`` (the readings' spacing): the early end allows for that.
    ``running_out`` when the early end is within lead."""
    b = Budget(level, allowed_s, used_s, over, since_s)
    left = b.left_s
    if left <= 0:
        b.state = BudgetState.USED_UP
        return b
    if past:
        b.runs_out_at_s = b.runs_out_hi_s = now + left
        b.runs_out_lo_s = now + max(0.0, left - slack_s)
    elif eta_s is not None:
        b.runs_out_at_s = now + eta_s + left
        early = eta_lo_s if eta_lo_s is not None else eta_s
        b.runs_out_lo_s = now + early + max(0.0, left - slack_s)
        b.runs_out_hi_s = None if eta_hi_s is None else now + eta_hi_s + left
    if b.runs_out_lo_s is not None and b.runs_out_lo_s - now <= lead_s + check_every_s:
        b.state = BudgetState.RUNNING_OUT
    return b
