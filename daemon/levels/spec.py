"""An item's levels, resolved from its config: everything a judgement needs, in one record."""

from __future__ import annotations

import functools
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from typing import Any

from thermeta.daemon.states import Kind, Side, SideSetting
from thermeta.daemon.units import to_celsius


@dataclass(frozen=True)
class Level:
    """One level of an item.  Temperatures in the item's unit (``threshold``) and in degC
    (``threshold_c``, what the fit sees); times in seconds."""

    name: str
    kind: Kind
    threshold: float
    threshold_c: float
    side: SideSetting
    lead_s: float
    within_s: float | None = None  # deadline: this long after the episode's start
    by: str | None = None  # deadline: a clock time ("16:30" local, or RFC 3339)
    budget_s: float | None = None  # time allowed beyond a limit (per episode, or period)
    stage: int | None = None  # the stage number, for a schedule's stages

    @property
    def is_target(self) -> bool:
        return self.kind == "target"

    @property
    def has_deadline(self) -> bool:
        return self.within_s is not None or self.by is not None

    def deadline(self, episode_start_s: float | None, now_s: float) -> float | None:
        """The deadline (epoch s) in this episode, or None: ``within`` counts from the episode's
        start (none open: no deadline yet); ``by`` "HH:MM" is the first such time (in the site's
        zone) at or after the episode's start (none open: today's), an RFC 3339 ``by`` is that
        moment."""
        if self.within_s is not None:
            return None if episode_start_s is None else episode_start_s + self.within_s
        if self.by is None:
            return None
        text = self.by.strip()
        if ":" in text and len(text) <= 5:
            hh, mm = (int(x) for x in text.split(":"))
            anchor = now_s if episode_start_s is None else episode_start_s
            from thermeta.daemon.timefmt import zone

            local = datetime.fromtimestamp(anchor, tz=UTC).astimezone(zone())
            due = local.replace(hour=hh, minute=mm, second=0, microsecond=0)
            if episode_start_s is not None and due.timestamp() < episode_start_s:
                due += timedelta(days=1)
            return due.timestamp()
        from thermeta.daemon.timefmt import parse_time

        return parse_time(text)


@functools.lru_cache(maxsize=65536)
def levels_of(cfg: Any) -> tuple[Level, ...]:
    """The item's levels (:meth:`ItemConfig.all_levels`) with their defaults filled in."""
    return tuple(
        Level(
            name=lv.label,
            kind=lv.kind,
            threshold=float(lv.threshold),
            threshold_c=to_celsius(lv.threshold, cfg.unit),
            side=lv.side,
            lead_s=float(lv.lead_s if lv.lead_s is not None else cfg.lead_s),
            within_s=lv.within_s,
            by=lv.by,
            budget_s=lv.budget_s,
            stage=lv.stage,
        )
        for lv in cfg.all_levels()
    )


def auto_side(level: Level, value: float | None) -> Side | None:
    """The side of an ``auto`` level, judged from the live value when the level is first seen:
    an item starts inside its limit, and away from its target, so the side that counts is the
    one the value is NOT on (None when the value is on the threshold, or unknown)."""
    if level.side != "auto":
        return level.side
    if value is None or value == level.threshold:
        return None
    return "above" if value < level.threshold else "below"
