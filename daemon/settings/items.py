"""[[item]]: one watched thing (or, with a wildcard topic, one per matching topic).

An item's fit and alert keys default to the [fit] and [alerts] tables' (the loader fills them
in); temperatures are in the item's own unit, times in seconds.
"""

from __future__ import annotations

import re
from typing import Annotated, Any, ClassVar

from pydantic import AfterValidator, BeforeValidator, Field
from thermeta.daemon.ingest.topics import (
    AMBIENT_SUFFIX,
    DEFROST_SUFFIX,
    EPISODE_SUFFIX,
    check_filter,
    is_wildcard,
    placeholders,
)
from thermeta.daemon.settings.checks import Checks, NonNegative, Num, Positive, Text, problem, show
from thermeta.daemon.settings.levels import LevelConfig, check_kind
from thermeta.daemon.settings.sections import AlertRules, FitRules
from thermeta.daemon.states import Kind, SideSetting
from thermeta.daemon.units import Unit, from_celsius, to_celsius

NAME_RE = re.compile(r"^[A-Za-z0-9._:/{}-]+$")
PLAUSIBLE_C = (-100.0, 200.0)  # readings outside are dead letters, unless the item says otherwise


def _low_high(v: Any) -> tuple[float, float]:
    if (
        isinstance(v, (list, tuple))
        and len(v) == 2
        and all(isinstance(x, (int, float)) and not isinstance(x, bool) for x in v)
        and v[0] < v[1]
    ):
        return (float(v[0]), float(v[1]))
    raise problem(f"must be [low, high] with low < high, got {show(v)}")


def _class_name(v: str) -> str:
    """The store's key: a name of 1-200 characters, kept without its outer blanks."""
    if not 0 < len(v.strip()) <= 200:
        raise problem(f"must be a name of 1-200 characters, got {show(v)}")
    return v.strip()


class ItemConfig(FitRules, AlertRules):
    """One ``[[item]]``; for a wildcard topic ``name`` is a template of ``{N}`` topic levels.

    Its levels (:meth:`all_levels`): the one written in the item's own keys (``threshold``,
    ``kind``, ``side``, ``within``, ``by``, ``budget``), its ``[[item.level]]`` tables, and the
    stages of its ``schedule`` (filled in by the loader from the ``[[schedule]]`` it names).
    """

    name: Text
    topic: Text
    threshold: Num | None = None
    kind: Kind = "limit"
    side: SideSetting = "auto"  # auto: the side opposite the live value when first judged
    within_s: Positive | None = Field(default=None, validation_alias="within")
    by: Text | None = None
    budget_s: Positive | None = Field(default=None, validation_alias="budget")
    levels: tuple[LevelConfig, ...] = Field((), validation_alias="level")
    schedule: Text | None = None
    # the temperature whose passing (toward the targets) opens an episode; a schedule sets it
    start: Num | None = None
    episode_topic: Text | None = None  # "start" / "end" messages open and close episodes
    period_s: Positive = Field(86400.0, validation_alias="period")  # rolling excursion figures
    stages: tuple[LevelConfig, ...] = Field((), exclude=True)  # the schedule's, set by the loader
    unit: Unit = "C"
    ambient: Num | None = None
    # the given ambient is right to within +- this (item unit; sd this / sqrt 3); None: the
    # forecast's default doubt (AMBIENT_UNCERTAINTY, 1 sd, degC)
    ambient_within: NonNegative | None = None
    ambient_topic: Text | None = None
    plausible: Annotated[tuple[float, float], BeforeValidator(_low_high)] = Field(
        default_factory=lambda d: (
            from_celsius(PLAUSIBLE_C[0], d["unit"]),
            from_celsius(PLAUSIBLE_C[1], d["unit"]),
        )
    )  # in the item's unit
    senml_name: Text | None = None
    site: Text | None = None
    # whose past episodes make the prior: None = the item's name
    prior_class: Annotated[Text, AfterValidator(_class_name)] | None = None
    # The controller's defrost signal (daemon/ingest/defrost.py) and how long alerts wait after it.
    defrost_topic: Text | None = None
    defrost_recovery_s: NonNegative = Field(1800.0, validation_alias="defrost_recovery")
    defrost_max_s: Positive = Field(3600.0, validation_alias="defrost_max")

    refused: ClassVar[dict[str, str]] = {
        "limit": (
            'renamed: a level\'s side is side = "above" (a ceiling) or "below" (a floor), and '
            'its kind is kind = "limit" (the default) or "target"'
        ),
        "stages": "stages belong in a [[schedule]] table; name it with schedule = ...",
    }

    @property
    def is_pattern(self) -> bool:
        return is_wildcard(self.topic)

    def all_levels(self) -> tuple[LevelConfig, ...]:
        """Every level: the item's own (when it has a threshold), its tables, its stages."""
        own: tuple[LevelConfig, ...] = ()
        if self.threshold is not None:
            own = (
                LevelConfig(
                    name=self.kind,
                    kind=self.kind,
                    threshold=self.threshold,
                    side=self.side,
                    within_s=self.within_s,
                    by=self.by,
                    budget_s=self.budget_s,
                ),
            )
        tables = tuple(
            lv if lv.name else lv.model_copy(update={"name": f"{lv.kind}-{j}"})
            for j, lv in enumerate(self.levels, start=1)
        )
        return own + tables + self.stages

    @property
    def threshold_c(self) -> float:
        """The first level's threshold in degC."""
        first = self.all_levels()[0]
        return to_celsius(first.threshold, self.unit)

    @property
    def ambient_c(self) -> float | None:
        return None if self.ambient is None else to_celsius(self.ambient, self.unit)

    @property
    def ambient_sd_c(self) -> float | None:
        """The given ambient's doubt as a sd in degC (None: the forecast's default)."""
        if self.ambient_within is None:
            return None
        from thermeta.daemon.units import scale_to_celsius
        from thermeta.predictors.forecast import ambient_sd_within

        return ambient_sd_within(scale_to_celsius(self.ambient_within, self.unit))

    @property
    def plausible_c(self) -> tuple[float, float]:
        lo, hi = (to_celsius(v, self.unit) for v in self.plausible)
        return (min(lo, hi), max(lo, hi))

    def check(self, checks: Checks) -> None:
        # name, topic and threshold are None here only when the file's value was a problem
        self._check_own_level(checks)
        if self.ambient is not None and self.ambient_topic is not None:
            checks.add(
                "ambient_topic", "give ambient (known) or ambient_topic (measured), not both"
            )
        if self.ambient_within is not None and self.ambient is None:
            checks.add(
                "ambient_within", "says how far off the given ambient may be: give ambient too"
            )
        if self.topic is not None:
            err = check_filter(self.topic)
            if err:
                checks.add("topic", err)
            else:
                checks.first_use(
                    "topic",
                    "topic",
                    self.topic,
                    hint="one probe is one item: give it several [[item.level]] tables instead",
                )
        for key in ("ambient_topic", "defrost_topic", "episode_topic"):
            other = getattr(self, key)
            if other is None:
                continue
            err = check_filter(other)
            if err:
                checks.add(key, err)
            elif key in ("defrost_topic", "episode_topic") and other in (
                self.topic,
                self.ambient_topic,
                self.defrost_topic if key == "episode_topic" else None,
            ):
                what = "on/off" if key == "defrost_topic" else "start/end messages"
                checks.add(key, f"must differ from the item's other topics (it carries {what})")
            elif self.topic and is_wildcard(other) != is_wildcard(self.topic):
                checks.add(key, "must use wildcards exactly when topic does")
        if self.defrost_topic is None:
            for key in ("defrost_recovery", "defrost_max"):
                if key + "_s" in self.model_fields_set:
                    checks.add(key, "needs defrost_topic (the controller's signal)")
        if self.name is not None:
            self._check_name(checks)
            checks.first_use("name", "name", self.name)
        lo, hi = self.plausible
        if checks.clean and self.threshold is not None and not lo <= self.threshold <= hi:
            checks.add(
                "threshold",
                f"{self.threshold:g} is outside the plausible range [{lo:g}, {hi:g}]",
            )

    def _check_own_level(self, checks: Checks) -> None:
        """The level in the item's own keys, and that the item has at least one level."""
        own_keys = {"kind", "side", "within_s", "by", "budget_s"} & self.model_fields_set
        if self.threshold is None:
            if (
                not self.levels
                and self.schedule is None
                and "threshold" not in self.model_fields_set
            ):
                checks.add(
                    "threshold",
                    "missing (required): give threshold, [[item.level]] tables or a schedule",
                    at=(),
                )
            for name in sorted(own_keys):
                key = {"within_s": "within", "budget_s": "budget"}.get(name, name)
                checks.add(key, "describes the item's own level: give threshold too")
            return
        check_kind(self, checks)
        names = [self.kind] + [
            lv.name or f"{lv.kind}-{j}" for j, lv in enumerate(self.levels, start=1)
        ]
        for name in sorted({n for n in names if names.count(n) > 1}):
            checks.add("level", f"two levels are named {name!r}: give each a name of its own")

    def _check_name(self, checks: Checks) -> None:
        name, topic = self.name, self.topic
        if not NAME_RE.match(name) or name.startswith("/") or name.endswith("/"):
            checks.add("name", f"{show(name)}: use letters, digits and . _ - : / only")
            return
        for suffix, kept in (
            (AMBIENT_SUFFIX, "ambient probes"),
            (DEFROST_SUFFIX, "defrost signals"),
            (EPISODE_SUFFIX, "episode messages"),
        ):
            if name.endswith(suffix):
                checks.add("name", f"must not end in '{suffix}' (kept for {kept})")
        used = placeholders(name)
        if used is None:
            checks.add("name", "braces must hold a topic level number such as {2}")
            return
        if topic is None or check_filter(topic):
            return
        levels = topic.split("/")
        if not is_wildcard(topic):
            if used:
                checks.add("name", "placeholders such as {2} need a wildcard topic")
            return
        wild = {i + 1 for i, lv in enumerate(levels) if lv in ("+", "#")}
        if not used & wild:
            checks.add(
                "name",
                "a wildcard topic needs a name template using a wildcard level, e.g. "
                f"{{{min(wild)}}} for level {min(wild)} of {topic}",
            )
        for n in used:
            if n > len(levels) and levels[-1] != "#":
                checks.add("name", f"{{{n}}}: the topic has only {len(levels)} levels")
        ambient = self.ambient_topic
        if ambient and is_wildcard(ambient):
            alevels = ambient.split("/")
            for n in sorted(used & wild):
                if levels[n - 1] == "+" and (n > len(alevels) or alevels[n - 1] != "+"):
                    checks.add(
                        "ambient_topic",
                        f"level {n} must be a + wildcard like in topic, so {{{n}}} names both",
                    )
                    break
