"""The config file: read, every table validated, one :class:`Config` out.

    cfg = load_config("site.toml")      # raises ConfigError listing every problem

Each table's keys, defaults and checks are declared once, in its model: the one-off tables and
``[[item]]`` in ``daemon/settings/``, each ``[[hook]]`` kind beside its hook in
``daemon/alerts/hooks/``.  Problems come as ``FILE:LINE: key: problem``, all of them at once
(:mod:`thermeta.daemon.settings.checks` says how).
"""

from __future__ import annotations

import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from thermeta.daemon.alerts.hooks import KINDS, HookConfig
from thermeta.daemon.ingest.topics import AMBIENT_SUFFIX, DEFROST_SUFFIX
from thermeta.daemon.settings.checks import Checks, Table, choice_problem, show
from thermeta.daemon.settings.items import ItemConfig
from thermeta.daemon.settings.levels import BUILT_IN, LevelConfig, ScheduleConfig
from thermeta.daemon.settings.sections import (
    AlertDefaults,
    AlertRules,
    BrokerConfig,
    ClusterConfig,
    FitConfig,
    FitRules,
    HttpConfig,
    IngestConfig,
    LogConfig,
    PublishConfig,
    StorageConfig,
)
from thermeta.daemon.states import Side
from thermeta.storage.errors import ConfigError

__all__ = [
    "AMBIENT_SUFFIX",
    "DEFROST_SUFFIX",
    "AlertDefaults",
    "BrokerConfig",
    "Config",
    "FitConfig",
    "HookConfig",
    "IngestConfig",
    "ItemConfig",
    "LevelConfig",
    "PublishConfig",
    "ScheduleConfig",
    "StorageConfig",
    "load_config",
    "parse_config",
]

SECTIONS: dict[str, type[Table]] = {
    "broker": BrokerConfig,
    "storage": StorageConfig,
    "fit": FitConfig,
    "publish": PublishConfig,
    "ingest": IngestConfig,
    "alerts": AlertDefaults,
    "log": LogConfig,
    "http": HttpConfig,
    "cluster": ClusterConfig,
}
TOP_KEYS = (*SECTIONS, "item", "hook", "schedule", "timezone")


@dataclass(frozen=True)
class Config:
    """A whole, valid config file."""

    path: str
    broker: BrokerConfig
    storage: StorageConfig
    fit: FitConfig
    publish: PublishConfig
    ingest: IngestConfig
    alerts: AlertDefaults
    items: tuple[ItemConfig, ...]
    hooks: tuple[HookConfig, ...]
    log_level: str = "info"
    schedules: tuple[ScheduleConfig, ...] = ()
    # the IANA zone of the clock times people read (and of a "by" deadline); None: the machine's
    timezone: str | None = None
    http: HttpConfig = field(default_factory=HttpConfig)
    cluster: ClusterConfig = field(default_factory=ClusterConfig)


def load_config(path: str | Path) -> Config:
    """Read and validate ``path``; raise ConfigError listing every problem."""
    name = str(path)
    try:
        raw = Path(path).read_bytes()
    except FileNotFoundError:
        raise ConfigError([f"{name}:1: file: no such file"]) from None
    except OSError as exc:
        raise ConfigError([f"{name}:1: file: cannot read: {exc.strerror or exc}"]) from exc
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise ConfigError([f"{name}:{line}: file: not UTF-8 text"]) from exc
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        msg = str(exc)
        m = re.search(r"\(at line (\d+), column (\d+)\)", msg)
        where = m.group(1) if m else "1"
        detail = re.sub(r"\s*\(at line \d+, column \d+\)", "", msg) or "invalid TOML"
        raise ConfigError([f"{name}:{where}: toml: {detail}"]) from exc
    return parse_config(data, name, text)


def parse_config(data: dict[str, Any], name: str, text: str) -> Config:
    """The config in ``data`` (parsed from ``text`` of file ``name``)."""
    checks = Checks(name, text)
    for key in data:
        if key not in TOP_KEYS:
            checks.unknown(key, TOP_KEYS)
    tables: dict[str, Any] = {
        key: _table(checks, data, key, model) for key, model in SECTIONS.items()
    }
    schedules = _schedules(checks, data.get("schedule", []))
    items = _items(
        checks,
        data.get("item", []),
        tables["fit"],
        tables["alerts"],
        {s.name: s for s in schedules},
    )
    hooks = _hooks(checks, data.get("hook", []))
    zone = _timezone(checks, data.get("timezone"))
    _cluster_store(checks, tables["cluster"], tables["storage"])
    if checks.problems:
        raise ConfigError(checks.problems)
    return Config(
        path=name,
        broker=tables["broker"],
        storage=tables["storage"],
        fit=tables["fit"],
        publish=tables["publish"],
        ingest=tables["ingest"],
        alerts=tables["alerts"],
        items=tuple(items),
        hooks=tuple(hooks),
        log_level=tables["log"].level,
        schedules=tuple(schedules),
        timezone=zone,
        http=tables["http"],
        cluster=tables["cluster"],
    )


def _cluster_store(checks: Checks, cluster: ClusterConfig, storage: StorageConfig) -> None:
    """Several daemons share their items through leases in a PostgreSQL store (docs/cluster.md)."""
    url = storage.url or ""
    if cluster.group and not url.startswith("postgresql"):
        checks.table("cluster").add(
            "group",
            f"needs a PostgreSQL store: [storage] url is {url.split(':', 1)[0]} "
            "(e.g. postgresql+psycopg://user@host/db)",
        )


def _timezone(checks: Checks, raw: Any) -> str | None:
    """The top-level ``timezone``: an IANA zone name, or None for the machine's own zone."""
    from thermeta.daemon.timefmt import zone_named

    if raw is None:
        return None
    if not isinstance(raw, str) or not raw.strip():
        checks.table().add("timezone", 'must be a time zone name such as "Europe/Amsterdam"')
        return None
    try:
        zone_named(raw.strip())
    except ValueError as exc:
        checks.table().add("timezone", str(exc))
        return None
    return raw.strip()


def _table(checks: Checks, data: dict[str, Any], key: str, model: type[Table]) -> Table:
    raw = data.get(key, {})
    if not isinstance(raw, dict):
        checks.table().add(key, f"must be a table [{key}], got {show(raw)}")
        raw = {}
    return model.model_validate(raw, context=checks.table(key))


def _list(checks: Checks, raw: Any, key: str) -> list[Any]:
    if isinstance(raw, list):
        return raw
    checks.table().add(key, f"must be [[{key}]] tables")
    return []


def _items(
    checks: Checks,
    raw: Any,
    fit: FitConfig,
    alerts: AlertDefaults,
    schedules: dict[str, ScheduleConfig],
) -> list[ItemConfig]:
    tables = _list(checks, raw, "item")
    if isinstance(raw, list) and not raw:
        checks.table().add("item", "no [[item]] tables: add at least one item to watch", at=())
    # an item's fit and alert keys default to [fit]'s and [alerts]'
    inherited = {
        key: getattr(section, name)
        for model, section in ((FitRules, fit), (AlertRules, alerts))
        for key, name in model.toml_keys().items()
    }
    out = []
    n_levels = 0  # [[item.level]] tables are counted across the file, as the line index does
    classes_used: set[str] = set()
    for i, t in enumerate(tables):
        if not isinstance(t, dict):
            checks.table().add("item", "must be a table", at=("item", i))
            continue
        own_todo = "what_to_do" in t
        keys = [str(t[k]).strip() for k in ("prior_class", "site") if isinstance(t.get(k), str)]
        cls = next((k for k in keys if k in alerts.what_to_do_for), None)
        t = {**inherited, **t}
        if cls is not None:
            classes_used.add(cls)
            if not own_todo:  # the item's own line wins; its class's comes before [alerts]'
                t["what_to_do"] = alerts.what_to_do_for[cls]
        if "level" in t:
            levels, n_levels = _levels(checks, i, t["level"], n_levels)
            t["level"] = levels
        before = len(checks.problems)
        item = ItemConfig.model_validate(t, context=checks.table("item", i))
        if item.schedule is not None:
            item = _with_schedule(checks.table("item", i), item, schedules)
        if len(checks.problems) == before:  # a stand-in of a bad item has no levels to judge
            _check_levels(checks.table("item", i), item)
        out.append(item)
    _check_overlaps(checks, out)
    for cls in alerts.what_to_do_for:
        if cls not in classes_used and tables:
            checks.table("alerts").add(
                "what_to_do_for",
                f"{cls!r} is no item's prior_class or site",
                at=("what_to_do_for", cls),
            )
    return out


def _levels(checks: Checks, i: int, raw: Any, n_before: int) -> tuple[tuple[LevelConfig, ...], int]:
    """An item's [[item.level]] tables, each judged at its own lines."""
    if not isinstance(raw, list) or not all(isinstance(x, dict) for x in raw):
        checks.table("item", i).add("level", "must be [[item.level]] tables")
        return (), n_before
    out = []
    for j, lv in enumerate(raw):
        out.append(LevelConfig.model_validate(lv, context=checks.table("item.level", n_before + j)))
    return tuple(out), n_before + len(raw)


def _with_schedule(
    checks: Checks, item: ItemConfig, schedules: dict[str, ScheduleConfig]
) -> ItemConfig:
    """The item with its schedule's start and stages, in the item's unit."""
    from thermeta.daemon.units import from_celsius, to_celsius

    name = item.schedule or ""
    sched = schedules.get(name) or BUILT_IN.get(name)
    if sched is None:
        known = ", ".join([*schedules, *BUILT_IN])
        checks.add("schedule", f"unknown schedule {show(name)} (known: {known})")
        return item
    if item.start is not None:
        checks.add("start", f"the schedule {show(name)} sets the start: remove start")
        return item

    def conv(x: float) -> float:
        return round(from_celsius(to_celsius(x, sched.unit), item.unit), 6)

    side: Side = "below" if sched.direction == "falling" else "above"
    stages = tuple(
        LevelConfig(
            name=f"stage-{n}",
            kind="target",
            threshold=conv(temp),
            side=side,
            lead_s=sched.lead_s,
            within_s=within,
            budget_s=None,
            stage=n,
        )
        for n, (temp, within) in enumerate(sched.stages, start=1)
    )
    return item.model_copy(update={"stages": stages, "start": conv(sched.start)})


def _check_levels(checks: Checks, item: ItemConfig) -> None:
    """Rules across an item's levels once its schedule is in: names, sides against the start,
    and the plausible range."""
    if item.threshold is None and not item.levels and not item.stages:
        return
    levels = item.all_levels()
    names = [lv.label for lv in levels]
    if item.stages:
        for name in sorted({n for n in names if names.count(n) > 1}):
            checks.add("level", f"two levels are named {name!r}: give each a name of its own")
    lo, hi = item.plausible
    for lv in item.levels + item.stages:
        if checks.clean and not lo <= lv.threshold <= hi:
            where = "schedule" if lv.stage else "level"
            checks.add(
                where,
                f"{lv.label}: {lv.threshold:g} is outside the plausible range [{lo:g}, {hi:g}]",
            )
    if item.start is None:
        return
    targets = [lv for lv in levels if lv.kind == "target"]
    if not targets:
        checks.add("start", "opens an episode on the way to a target: the item has no target")
        return
    below = [lv for lv in targets if lv.threshold < item.start]
    above = [lv for lv in targets if lv.threshold > item.start]
    if (below and above) or len(below) + len(above) < len(targets):
        checks.add(
            "start",
            f"{item.start:g} must lie on one side of every target (the probe passes it on its way "
            "to them)",
        )
        return
    side = "below" if below else "above"
    for lv in targets:
        if lv.side not in ("auto", side):
            checks.add(
                "start",
                f"{lv.label} is reached {lv.side} {lv.threshold:g}, but the probe starts "
                f"{'above' if side == 'below' else 'below'} it at start {item.start:g}: "
                "a target is reached by heading away from the start",
            )


def _check_overlaps(checks: Checks, items: list[ItemConfig]) -> None:
    """Two wildcard items whose topics can match one topic: the first would take every such
    reading and the other silently get none.  (An exact item inside a wildcard's topics is
    supported: it takes its own topic; see :func:`overrides`.)"""
    from thermeta.daemon.ingest.topics import check_filter, filters_overlap

    seen: list[tuple[int, ItemConfig]] = []
    for i, it in enumerate(items):
        if it.topic is None or check_filter(it.topic) or not it.is_pattern:
            continue
        for j, other in seen:
            if filters_overlap(it.topic, other.topic):
                line = checks.index.line(("item", j, "topic"))
                checks.table("item", i).add(
                    "topic",
                    f"{it.topic} overlaps {other.topic} of the item on line {line}: a reading "
                    "matching both would go to that item only; narrow one of the filters",
                )
                break
        seen.append((i, it))


def overrides(cfg: Config) -> list[str]:
    """Exact items whose topic a wildcard item's filter also matches: the exact item takes that
    topic (told by check-config and at start-up, so it is never a surprise)."""
    from thermeta.daemon.ingest.topics import match

    out = []
    for exact in cfg.items:
        if exact.is_pattern:
            continue
        for pat in cfg.items:
            if pat.is_pattern and match(pat.topic, exact.topic):
                out.append(
                    f"{exact.topic}: item {exact.name!r} takes this topic; the wildcard "
                    f"{pat.topic} ({pat.name!r}) makes no item of it"
                )
    return out


def _schedules(checks: Checks, raw: Any) -> list[ScheduleConfig]:
    out: list[ScheduleConfig] = []
    names: set[str] = set()
    for i, t in enumerate(_list(checks, raw, "schedule")):
        if not isinstance(t, dict):
            checks.table().add("schedule", "must be a table", at=("schedule", i))
            continue
        sched = ScheduleConfig.model_validate(t, context=checks.table("schedule", i))
        if sched.name in BUILT_IN:
            checks.add("name", f"{show(sched.name)} is built in: choose another name")
        elif sched.name in names:
            checks.add("name", f"a [[schedule]] named {show(sched.name)} already exists")
        names.add(sched.name)
        out.append(sched)
    return out


def _hooks(checks: Checks, raw: Any) -> list[HookConfig]:
    out = []
    for i, t in enumerate(_list(checks, raw, "hook")):
        if not isinstance(t, dict):
            checks.table().add("hook", "must be a table", at=("hook", i))
            continue
        checks.table("hook", i)
        if "kind" not in t:
            checks.add("kind", "missing (required)", at=())
            continue
        why = choice_problem(t["kind"], tuple(KINDS))
        if why:
            checks.add("kind", why)
            continue
        out.append(KINDS[t["kind"]].config.model_validate(t, context=checks))
    return out
