"""One level's state after a refit: the one test behind each state word and its alert.

    limit   crossed      the value is past the threshold (strictly: at the threshold is inside)
            approaching  the EARLY end of the 90 % crossing interval is within ``lead`` (plus
                         the time to the next refit, so a warning is never later than lead),
                         and the crossing itself within the item's ``horizon``
            steady       otherwise (learning while there is no fit)
    target  reached      the value got to it (at or beyond); in an episode, from the record
            waiting      its deadline counts from an episode that has not started
            missed       the deadline passed before it was reached
            short        the forecast levels off short of it: never reached
            late         the point forecast falls after the deadline; or the LATE end of the
                         interval (an open end included) does and the deadline is within lead
                         (plus the time to the next refit); it has eased once the late end
                         comes half a lead before it
            heading      otherwise (learning while there is no fit)

The forecast's ETAs count from its newest reading; everything here counts from ``now``.  The
alert rules hold these judgements (a warning stays raised until its condition has eased for
``hold``); the refit publishes the held state, so the state shown and the alert sent agree.

The chance of making a deadline comes from the forecast's own interval: the crossing time is
taken as log-normal on each side of the point ETA, with the 90 % ends as its 5th and 95th
percentiles (a two-piece normal in log time; an open late end gives at most even odds beyond
the point).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Any

from thermeta.daemon.levels.spec import Level
from thermeta.daemon.states import ItemState, Kind, Side
from thermeta.predictors.result import rfc3339

Z90 = 1.6448536269514722  # the standard normal's 95th percentile: a 90 % interval is +-Z90 sd


def epoch(text: Any) -> float | None:
    """Epoch seconds from a number or an RFC 3339 text (None when neither)."""
    if text is None:
        return None
    if isinstance(text, (int, float)):
        return float(text)
    from thermeta.daemon.timefmt import parse_time

    try:
        return parse_time(str(text))
    except ValueError:
        return None


def remaining_s(fc: dict[str, Any], key: str, now: float) -> float | None:
    """An ETA of the forecast (``eta_s``, ``eta_lo_s``, ``eta_hi_s``) counted from ``now``
    instead of from its newest reading."""
    eta = fc.get(key)
    if eta is None:
        return None
    t_last = epoch(fc.get("last_reading_at"))
    elapsed = 0.0 if t_last is None else max(0.0, now - t_last)
    return max(0.0, float(eta) - elapsed)


def is_past(v: float, side: Side, threshold: float, kind: Kind = "limit") -> bool:
    """Past a limit (strictly beyond it) or at a target (at it or beyond)."""
    if kind == "target":
        return v >= threshold if side == "above" else v <= threshold
    return v > threshold if side == "above" else v < threshold


def is_back(v: float, side: Side, threshold: float, band: float) -> bool:
    """Back on the near side of the threshold by at least ``band``."""
    return v <= threshold - band if side == "above" else v >= threshold + band


def chance_by(left_s: float, eta_s: float | None, lo_s: float | None, hi_s: float | None) -> float:
    """The chance that the crossing comes within ``left_s`` (see the module docstring)."""
    if left_s <= 0:
        return 0.0
    if eta_s is None:
        return 0.0
    eta = max(eta_s, 1.0)
    if left_s >= eta:
        if hi_s is None:
            return 0.5
        spread = math.log(max(hi_s, eta * (1 + 1e-9)) / eta) / Z90
    else:
        lo = max(lo_s if lo_s is not None else 0.0, 1.0)
        spread = math.log(eta / min(lo, eta * (1 - 1e-9))) / Z90
    z = math.log(left_s / eta) / spread
    # Phi(z) = (1 + erf(z / sqrt 2)) / 2
    return 0.5 * (1.0 + math.erf(z / math.sqrt(2.0)))


@dataclass
class LevelView:
    """One level as judged at one refit (temperatures in the item's unit; times from now)."""

    name: str
    kind: Kind
    threshold: float
    side: Side | None
    state: ItemState
    lead_s: float
    stage: int | None = None
    eta_s: float | None = None
    eta_lo_s: float | None = None
    eta_hi_s: float | None = None
    deadline_at_s: float | None = None
    chance: float | None = None
    reached_at_s: float | None = None
    past: bool = False  # past the limit / at the target now
    back: bool = False  # back on the near side by the hysteresis band
    due: bool = False  # a limit's approach: the early end within lead
    eased: bool = False  # a limit's approach gone: the early end beyond 2 x lead (or none)
    judged: ItemState | None = None  # the judgement before the rules held it (when held)

    def to_json(self, now: float) -> dict[str, Any]:
        d = asdict(self)
        for key in ("eta", "eta_lo", "eta_hi"):
            left = d[f"{key}_s"]
            d[f"{key.replace('eta', 'crossing')}_at"] = (
                None if left is None else rfc3339(now + left)
            )
        d["deadline_at"] = rfc3339(self.deadline_at_s)
        d["reached_at"] = rfc3339(self.reached_at_s)
        if d["chance"] is not None:
            d["chance"] = round(d["chance"], 3)
        return d


def judge(
    level: Level,
    fc: dict[str, Any],
    side: Side | None,
    now: float,
    *,
    hysteresis: float,
    check_every_s: float = 0.0,
    horizon_s: float = math.inf,
    episode_start_s: float | None = None,
    reached_at_s: float | None = None,
    tracked: bool = False,
) -> LevelView:
    """The state of ``level`` from its forecast ``fc`` (the forecast JSON for its threshold,
    in the item's unit) at ``now``.

    ``tracked``: the level's reaching is kept in an open episode's record (``reached_at_s``);
    otherwise a target is reached while the value is at it.
    """
    v = fc.get("value_now")
    eta, lo, hi = (remaining_s(fc, k, now) for k in ("eta_s", "eta_lo_s", "eta_hi_s"))
    fit_ok = bool(fc.get("fit_ok", True)) and fc.get("state") != ItemState.LEARNING
    view = LevelView(
        name=level.name,
        kind=level.kind,
        threshold=level.threshold,
        side=side,
        state=ItemState.LEARNING,
        lead_s=level.lead_s,
        stage=level.stage,
        eta_s=eta if fit_ok else None,
        eta_lo_s=lo if fit_ok else None,
        eta_hi_s=hi if fit_ok else None,
        reached_at_s=reached_at_s,
    )
    if level.is_target:
        view.deadline_at_s = level.deadline(episode_start_s, now)
    if side is None or v is None:
        return view
    v = float(v)
    view.past = is_past(v, side, level.threshold, level.kind)
    view.back = is_back(v, side, level.threshold, hysteresis)
    if level.is_target:
        _target(view, level, now, fit_ok, tracked, episode_start_s, check_every_s)
    else:
        _limit(view, fit_ok, check_every_s, horizon_s)
    return view


def _limit(view: LevelView, fit_ok: bool, check_every_s: float, horizon_s: float) -> None:
    early = view.eta_lo_s if view.eta_lo_s is not None else view.eta_s
    # a crossing further away than the horizon is not a forecast worth acting on
    far = view.eta_s is None or view.eta_s > horizon_s
    if fit_ok:
        view.due = not far and early is not None and early <= view.lead_s + check_every_s
        view.eased = far or early is None or early > 2.0 * view.lead_s + check_every_s
    if view.past:
        view.state = ItemState.CROSSED
    elif not fit_ok:
        view.state = ItemState.LEARNING
    else:
        view.state = ItemState.APPROACHING if view.due else ItemState.STEADY


def _target(
    view: LevelView,
    level: Level,
    now: float,
    fit_ok: bool,
    tracked: bool,
    episode_start_s: float | None,
    check_every_s: float = 0.0,
) -> None:
    deadline = view.deadline_at_s
    reached = view.reached_at_s is not None if tracked else view.past
    if reached:
        view.state = ItemState.REACHED
        if deadline is not None:
            made = view.reached_at_s is None or view.reached_at_s <= deadline
            view.chance = 1.0 if made else 0.0
        return
    if level.within_s is not None and episode_start_s is None:
        view.state = ItemState.WAITING
        return
    if deadline is not None and now >= deadline:
        view.state = ItemState.MISSED
        view.chance = 0.0
        return
    if not fit_ok:
        view.state = ItemState.LEARNING
        return
    if deadline is not None:
        view.chance = chance_by(deadline - now, view.eta_s, view.eta_lo_s, view.eta_hi_s)
    # a warning eases only with room to spare, so an estimate wandering about the deadline
    # does not flap between late and on course
    view.eased = view.eta_s is not None and (
        deadline is None
        or (view.eta_hi_s is not None and now + view.eta_hi_s <= deadline - 0.5 * level.lead_s)
    )
    if view.eta_s is None:
        view.state = ItemState.SHORT
    elif deadline is not None and _late(view, deadline - now, check_every_s):
        view.state = ItemState.LATE
    else:
        view.state = ItemState.HEADING


def _late(view: LevelView, left_s: float, check_every_s: float) -> bool:
    """Late by the LATE end of the interval, told while there is still ``lead`` to act: at once
    when the point forecast itself is past the deadline (more likely late than not), and when
    only the late end is past it (an open end included), once the deadline is within lead (plus
    the time to the next refit); before that the forecast still has time to firm up, and a
    warning that far ahead of the deadline would mostly be withdrawn."""
    assert view.eta_s is not None
    if view.eta_s > left_s:
        return True
    hi_past = view.eta_hi_s is None or view.eta_hi_s > left_s
    return hi_past and left_s <= view.lead_s + check_every_s
