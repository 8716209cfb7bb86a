"""The curves a misspecified item's forecast is chosen among, each fitted to the same readings.

    lumped    one exponential over the whole regime (predictors.lumped)
    two_exp   two time constants toward one ambient (predictors.two_exp)
    local     one exponential through the newest half of the readings, its bend ahead kept in a
              share c of 0, 1/4, 1/2, 3/4 or 1 (c = 0 is the straight trend through the newest
              readings, c = 1 the local curve): a body with more than one time constant bends
              less and less, so the bend seen lately overstates the bend to come by a share
              that only the item's own readings can tell (predictors.combine picks c)

Every candidate answers the same question, :meth:`Candidate.eta`: the seconds from the newest
reading to a level (None: it levels off short of it or moves away), and says what it would draw.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from thermeta.predictors.lumped import LumpedFit, fit_lumped, shrunk_eta
from thermeta.predictors.two_exp import TwoExpFit, crossing, fit_two_exp

LOCAL_SHARE = 0.5  # the local curve's readings: the newest half of the regime's span
LOCAL_MIN = 6  # ... at least this many readings
BENDS = (0.0, 0.25, 0.5, 0.75, 1.0)  # the shares of the local bend kept ahead
TWO_EXP_MIN = 8  # readings a two-time-constant fit needs (five parameters, three to spare)


@dataclass(frozen=True)
class Spec:
    """How the candidates are told the ambient: a given value and its doubt (sd; 0 = exact),
    its plausible range, and the readings' scatter."""

    ambient: float | None = None
    ambient_sd: float = 0.0
    bounds: tuple[float, float] | None = None
    noise_sd: float = 0.0

    def kwargs(self) -> dict:
        kw: dict = {"bounds": self.bounds, "noise_sd": self.noise_sd or None}
        if self.ambient is not None:
            kw.update(ambient=self.ambient, ambient_sd=self.ambient_sd)
        return kw


def past(now: float, level: float, limit: str | None) -> bool:
    """Whether the value now is already beyond the level on the limit's side."""
    return limit == "upper" and now >= level or limit == "lower" and now <= level


class Candidate:
    """A fitted curve that forecasts the time to any level."""

    name = "candidate"
    ok = False
    slope = 0.0  # the fitted curve's slope at the newest reading, degC/s
    bend = 1.0  # the share of the fitted bend kept ahead

    def __init__(self, t: np.ndarray, y: np.ndarray, spec: Spec) -> None:
        raise NotImplementedError

    def eta(
        self, level: float, limit: str | None = None, bend: float | None = None
    ) -> float | None:
        """Seconds from the newest reading to ``level`` (0 if past it, None if never); ``bend``
        overrides the share of the bend kept ahead, where the candidate has one."""
        raise NotImplementedError

    def params(self) -> dict[str, float]:
        """What :func:`thermeta.predictors.curve.predict` draws for this curve."""
        return {}


class Lumped(Candidate):
    """One exponential over the whole regime, the bend ahead as the fit keeps it."""

    name = "lumped"

    def __init__(
        self, t: np.ndarray, y: np.ndarray, spec: Spec, fit: LumpedFit | None = None
    ) -> None:
        self.fit = (
            fit
            if fit is not None
            else fit_lumped(t, y, float(y[-1]), intervals=False, **spec.kwargs())
        )
        self.ok = self.fit.ok
        if self.ok:
            f = self.fit
            span = f.t_last - f.t_first
            self.now = f.value_fit_now
            self.slope = -f.k_per_s * f.amplitude * math.exp(-f.k_per_s * span)
            self.k_ahead = f.bend_kept * f.k_per_s

    def eta(
        self, level: float, limit: str | None = None, bend: float | None = None
    ) -> float | None:
        if not self.ok:
            return None
        if past(self.now, level, limit):
            return 0.0
        if self.fit.trend_now is not None:
            return shrunk_eta(*self.fit.trend_now, 0.0, level, limit)
        return shrunk_eta(self.now, self.slope, self.k_ahead, level, limit)

    def params(self) -> dict[str, float]:
        f = self.fit
        return {
            "t_first": f.t_first,
            "amplitude": f.amplitude,
            "ambient": f.ambient,
            "k_per_s": f.k_per_s,
            "value_fit_now": f.value_fit_now,
            "k_ahead_per_s": self.k_ahead,
            "ahead_from_t": f.t_last,
        }


class TwoExp(Candidate):
    """Two time constants toward one ambient."""

    name = "two_exp"

    def __init__(self, t: np.ndarray, y: np.ndarray, spec: Spec):
        self.fit: TwoExpFit | None = None
        if t.size >= TWO_EXP_MIN:
            self.fit = fit_two_exp(t, y, **spec.kwargs())
        self.ok = self.fit is not None and self.fit.ok

    def eta(
        self, level: float, limit: str | None = None, bend: float | None = None
    ) -> float | None:
        if not self.ok or self.fit is None:
            return None
        return crossing(self.fit, level, limit)

    def params(self) -> dict[str, float]:
        f = self.fit
        if f is None:
            return {}
        return {
            "t_first": f.t_first,
            "ambient": f.ambient,
            "b1": f.b1,
            "b2": f.b2,
            "k1_per_s": f.k1,
            "k2_per_s": f.k2,
            "value_fit_now": f.value_fit_now,
        }


class Local(Candidate):
    """One exponential through the newest half of the readings, the share ``bend`` of its bend
    kept ahead (set by :func:`thermeta.predictors.combine.combine`)."""

    name = "local"

    def __init__(self, t: np.ndarray, y: np.ndarray, spec: Spec):
        self.bend = 0.5  # until the backtest says
        span = float(t[-1] - t[0])
        sel = t >= t[-1] - LOCAL_SHARE * span
        if sel.sum() < LOCAL_MIN:
            sel = np.arange(t.size) >= t.size - LOCAL_MIN
        self.fit = fit_lumped(
            t[sel], y[sel], float(y[-1]), intervals=False, **self.spec(spec).kwargs()
        )
        self.ok = self.fit.ok
        if self.ok:
            f = self.fit
            self.now = f.value_fit_now
            self.slope = -f.k_per_s * f.amplitude * math.exp(-f.k_per_s * (f.t_last - f.t_first))

    @staticmethod
    def spec(spec: Spec) -> Spec:
        """The newest readings' own curve: the ambient left to them (a given one is the
        "toward" candidate's)."""
        return Spec(bounds=spec.bounds, noise_sd=spec.noise_sd)

    def eta(
        self, level: float, limit: str | None = None, bend: float | None = None
    ) -> float | None:
        if not self.ok:
            return None
        if past(self.now, level, limit):
            return 0.0
        c = self.bend if bend is None else bend
        return shrunk_eta(self.now, self.slope, c * self.fit.k_per_s, level, limit)

    def params(self) -> dict[str, float]:
        f = self.fit
        return {
            "t_first": f.t_first,
            "amplitude": f.amplitude,
            "ambient": f.ambient,
            "k_per_s": f.k_per_s,
            "value_fit_now": f.value_fit_now,
            "k_ahead_per_s": self.bend * f.k_per_s,
            "ahead_from_t": f.t_last,
        }


class Toward(Local):
    """With a given ambient: one exponential toward exactly that ambient through the newest
    half of the readings (its rate from their slope), all its bend kept."""

    name = "toward"

    @staticmethod
    def spec(spec: Spec) -> Spec:
        return Spec(ambient=spec.ambient, ambient_sd=0.0, noise_sd=spec.noise_sd)

    def __init__(self, t: np.ndarray, y: np.ndarray, spec: Spec):
        super().__init__(t, y, spec)
        self.ok = self.ok and spec.ambient is not None

    def eta(
        self, level: float, limit: str | None = None, bend: float | None = None
    ) -> float | None:
        return super().eta(level, limit, 1.0)


KINDS: dict[str, type[Candidate]] = {
    "lumped": Lumped,
    "two_exp": TwoExp,
    "local": Local,
    "toward": Toward,
}


def names_for(spec: Spec) -> tuple[str, ...]:
    """The candidates that apply: "toward" needs a given ambient."""
    return tuple(m for m in KINDS if m != "toward" or spec.ambient is not None)


def fit_all(t: np.ndarray, y: np.ndarray, spec: Spec, names=None) -> dict[str, Candidate]:
    """Each named candidate fitted to the readings (failed fits are kept, with ok False)."""
    return {name: KINDS[name](t, y, spec) for name in (names or names_for(spec))}
