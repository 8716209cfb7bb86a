"""[[item.level]] and [[schedule]]: the questions asked of one probe.

A *level* is a threshold with a kind: a ``limit`` to stay within, or a ``target`` to reach.
An item has one level written in its own table (``threshold``, ``kind``, ``side``, ``within``,
``by``, ``budget``), any number of ``[[item.level]]`` tables, and the stages of a ``schedule``:
one probe, one stored series, several questions.

A *schedule* is a list of stages, each a target with the time allowed from the episode's start:
its ``start`` temperature opens the episode when the probe passes it going the stages' way.
:data:`BUILT_IN` ships the food-code cooling schedule by name.

Temperatures are in the item's unit (a schedule's in its own ``unit``), times in seconds.
"""

from __future__ import annotations

import re
from typing import Annotated, Any, ClassVar

from pydantic import BeforeValidator, Field
from thermeta.daemon.settings.checks import Checks, Num, Positive, Table, Text, problem, show
from thermeta.daemon.states import Kind, SideSetting
from thermeta.daemon.units import Unit

H = 3600.0
CLOCK_RE = re.compile(r"^([01]?\d|2[0-3]):([0-5]\d)$")


def deadline_problem(by: str) -> str | None:
    """Why ``by`` is not a deadline (None when it is): a local time of day ``HH:MM`` or an
    RFC 3339 time with its zone."""
    if CLOCK_RE.match(by.strip()):
        return None
    from thermeta.daemon.timefmt import parse_time

    try:
        parse_time(by)
    except ValueError as exc:
        return f'must be a time of day such as "16:30" or an RFC 3339 time ({exc})'
    return None


class LevelConfig(Table):
    """One level of an item: a threshold with its kind, side and what is asked of it."""

    name: Text | None = None  # default: "<kind>-<n>", n its place among the item's tables
    kind: Kind = "limit"
    threshold: Num
    side: SideSetting = "auto"  # auto: the side opposite the live value when first judged
    lead_s: Positive | None = Field(default=None, validation_alias="lead")  # None: the item's lead
    within_s: Positive | None = Field(
        default=None, validation_alias="within"
    )  # a target's deadline
    by: Text | None = None  # ... or a clock time: "16:30" (local) or RFC 3339
    budget_s: Positive | None = Field(
        default=None, validation_alias="budget"
    )  # a limit's allowance
    stage: int | None = Field(default=None, exclude=True)  # set for a schedule's stages, not a key

    refused: ClassVar[dict[str, str]] = {
        "stage": "stages come from a [[schedule]]; name it with the item's schedule key"
    }

    def check(self, checks: Checks) -> None:
        check_kind(self, checks)

    @property
    def label(self) -> str:
        return self.name or self.kind


def check_kind(level: Any, checks: Checks) -> None:
    """The keys a level's kind does not have (shared by a level table and the item's own)."""
    if level.kind == "limit":
        for key in ("within", "by"):
            if getattr(level, "within_s" if key == "within" else key) is not None:
                checks.add(
                    key,
                    'a limit has no deadline: deadlines belong to targets (kind = "target")',
                )
    else:
        if level.budget_s is not None:
            checks.add(
                "budget",
                'a target has no budget: a budget is time allowed beyond a limit (kind = "limit")',
            )
    if level.within_s is not None and level.by is not None:
        checks.add("by", "give within (from the episode's start) or by (a clock time), not both")
    if level.by is not None:
        why = deadline_problem(level.by)
        if why:
            checks.add("by", why)


def _stages(v: Any) -> tuple[tuple[float, float], ...]:
    """``[{threshold = 21, within = 7200}, ...]`` (or ``[[21, 7200], ...]``) as pairs."""
    if not isinstance(v, (list, tuple)) or not v:
        raise problem(
            f"must be a list of stages such as [{{threshold = 21, within = 7200}}], got {show(v)}"
        )
    out = []
    for i, s in enumerate(v, start=1):
        if isinstance(s, dict):
            unknown = set(s) - {"threshold", "within"}
            if unknown:
                raise problem(f"stage {i}: unknown key {sorted(unknown)[0]!r} (threshold, within)")
            pair = (s.get("threshold"), s.get("within"))
        elif isinstance(s, (list, tuple)) and len(s) == 2:
            pair = (s[0], s[1])
        else:
            raise problem(f"stage {i}: must be {{threshold = ..., within = ...}}, got {show(s)}")
        for key, x in zip(("threshold", "within"), pair):
            if isinstance(x, bool) or not isinstance(x, (int, float)):
                raise problem(f"stage {i}: {key} must be a number, got {show(x)}")
        if not pair[1] > 0:  # type: ignore[operator]
            raise problem(f"stage {i}: within must be > 0 (seconds from the start), got {pair[1]}")
        out.append((float(pair[0]), float(pair[1])))  # type: ignore[arg-type]
    return tuple(out)


Stages = Annotated[tuple[tuple[float, float], ...], BeforeValidator(_stages)]


class ScheduleConfig(Table):
    """One ``[[schedule]]``: a start temperature and stages (target, time allowed from the
    start), all going one way."""

    name: Text
    start: Num
    stages: Stages
    unit: Unit = "C"
    lead_s: Positive | None = Field(default=None, validation_alias="lead")  # None: the item's lead

    def check(self, checks: Checks) -> None:
        if self.start is None or not self.stages:
            return
        problem_ = schedule_problem(self.start, self.stages)
        if problem_:
            checks.add("stages", problem_)

    @property
    def direction(self) -> str:
        return "falling" if self.stages[0][0] < self.start else "rising"


def schedule_problem(start: float, stages: tuple[tuple[float, float], ...]) -> str | None:
    """Why the stages do not go one way from ``start`` with growing times (None when they do)."""
    temps = [start] + [s[0] for s in stages]
    falling = temps[1] < temps[0]
    word = " -> ".join(f"{x:g}" for x in temps)
    for i in range(1, len(temps)):
        step = temps[i] - temps[i - 1]
        if step == 0 or (step < 0) != falling:
            way = "fall" if falling else "rise"
            return (
                f"stage {i} ({temps[i]:g}) goes the wrong way: the stages must all {way} from "
                f"start ({word})"
            )
    for i in range(1, len(stages)):
        if stages[i][1] <= stages[i - 1][1]:
            return (
                f"stage {i + 1}: within {stages[i][1]:g} s must be later than stage {i}'s "
                f"{stages[i - 1][1]:g} s (both count from the start)"
            )
    return None


# Cooling cooked food: from 57 degC to 21 degC within 2 h, and to 5 degC within 6 h in total.
# US FDA Food Code 2022, 3-501.14 (from memory).
BUILT_IN: dict[str, ScheduleConfig] = {
    "food-code-cooling": ScheduleConfig(
        name="food-code-cooling",
        start=57.0,
        stages=((21.0, 2 * H), (5.0, 6 * H)),
        unit="C",
        lead_s=None,
    ),
}
