"""MQTT topic filters and the topic -> item mapping (exact topics, ``+`` and ``#`` wildcards, and
name templates such as ``reefer-{2}`` that take topic level 2, counting from 1)."""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import TYPE_CHECKING, Literal

if TYPE_CHECKING:
    from thermeta.daemon.settings.items import ItemConfig

PLACEHOLDER = re.compile(r"\{(\d+)\}")
# The stored series beside an item's own: its ambient probe's and its defrost signal's
# (daemon/ingest/defrost.py).  Item names may not end in them.
AMBIENT_SUFFIX = ".ambient"
DEFROST_SUFFIX = ".defrost"
EPISODE_SUFFIX = ".episode"  # an episode topic's route (its messages are not stored as readings)
RouteKind = Literal["load", "ambient", "defrost", "episode"]
# A name built from a topic holds what a configured name may (ASCII letters, digits, . _ - :, and
# the template's own /) and fits the store's 200 characters with the longest suffix after it.
NAME_MAX = 200 - max(len(AMBIENT_SUFFIX), len(DEFROST_SUFFIX), len(EPISODE_SUFFIX))
RENDERED_NAME_RE = re.compile(r"[A-Za-z0-9._:/-]+")


def check_rendered_name(name: str) -> str | None:
    """Why ``name``, built from a topic, cannot name an item (None when it can)."""
    if len(name) > NAME_MAX:
        return f"item name from the topic is too long ({len(name)} > {NAME_MAX} characters)"
    if not RENDERED_NAME_RE.fullmatch(name):
        return "item name from the topic may hold only letters, digits and . _ - :"
    # An item's own series and its companions' are separate name spaces: no topic may name an
    # item "tank-1.defrost" and so write into tank-1's defrost signal.
    for suffix in (AMBIENT_SUFFIX, DEFROST_SUFFIX, EPISODE_SUFFIX):
        if name.endswith(suffix):
            return f"item name from the topic may not end in {suffix!r} (kept for companions)"
    return None


def is_wildcard(topic_filter: str) -> bool:
    return any(lv in ("+", "#") for lv in topic_filter.split("/"))


def check_filter(topic_filter: str) -> str | None:
    """Why ``topic_filter`` is not a valid MQTT filter (None when it is)."""
    if not topic_filter:
        return "must not be empty"
    if "\x00" in topic_filter:
        return "must not contain NUL"
    if len(topic_filter.encode()) > 65535:
        return "is too long"
    levels = topic_filter.split("/")
    for i, lv in enumerate(levels):
        if "#" in lv and (lv != "#" or i != len(levels) - 1):
            return f"'#' must be a whole level and the last one: {topic_filter}"
        if "+" in lv and lv != "+":
            return f"'+' must be a whole level: {topic_filter}"
    if topic_filter.startswith("$"):
        return "topics starting with '$' are the broker's own"
    return None


def filters_overlap(a: str, b: str) -> bool:
    """Whether some topic matches both MQTT filters ``a`` and ``b``."""
    fa, fb = a.split("/"), b.split("/")
    for i in range(max(len(fa), len(fb))):
        la = fa[i] if i < len(fa) else None
        lb = fb[i] if i < len(fb) else None
        if la == "#" or lb == "#":
            return True  # '#' also matches its parent level, so a shorter topic fits too
        if la is None or lb is None:
            return False
        if la != lb and "+" not in (la, lb):
            return False
    return True


def placeholders(template: str) -> set[int] | None:
    """The level numbers used by ``{N}`` in ``template``; None if a brace is malformed."""
    stripped = PLACEHOLDER.sub("", template)
    if "{" in stripped or "}" in stripped:
        return None
    used = {int(n) for n in PLACEHOLDER.findall(template)}
    return None if 0 in used else used


def match(topic_filter: str, topic: str) -> bool:
    """Does ``topic`` match the MQTT ``topic_filter``?"""
    f = topic_filter.split("/")
    t = topic.split("/")
    for i, lv in enumerate(f):
        if lv == "#":
            return len(t) >= i  # '#' also matches the parent level
        if i >= len(t) or (lv != "+" and lv != t[i]):
            return False
    return len(t) == len(f)


def render(template: str, topic: str) -> str | None:
    """Fill ``{N}`` from level N (1-based) of ``topic``; None if a level is missing or empty."""
    levels = topic.split("/")
    out = []
    pos = 0
    for m in PLACEHOLDER.finditer(template):
        n = int(m.group(1))
        if n > len(levels) or not levels[n - 1]:
            return None
        out.append(template[pos : m.start()])
        out.append(levels[n - 1])
        pos = m.end()
    out.append(template[pos:])
    return "".join(out)


def render_filter(ambient_filter: str, load_topic: str) -> str:
    """The concrete ambient topic of one item: ``+`` levels taken from the load topic."""
    a = ambient_filter.split("/")
    t = load_topic.split("/")
    return "/".join(t[i] if lv == "+" and i < len(t) else lv for i, lv in enumerate(a))


@dataclass(frozen=True)
class Route:
    """Where a message goes: the concrete item (its config with the resolved name) and whether the
    topic carries the item's own readings ("load") or its ambient probe ("ambient")."""

    item: ItemConfig
    kind: RouteKind  # "defrost": the controller's defrost signal

    @property
    def store_name(self) -> str:
        suffix = {
            "ambient": AMBIENT_SUFFIX,
            "defrost": DEFROST_SUFFIX,
            "episode": EPISODE_SUFFIX,
        }.get(self.kind, "")
        return self.item.name + suffix

    @property
    def source_topic(self) -> str | None:
        """The configured topic (filter) this route comes from."""
        return {
            "load": self.item.topic,
            "ambient": self.item.ambient_topic,
            "defrost": self.item.defrost_topic,
            "episode": self.item.episode_topic,
        }[self.kind]


class Router:
    """Resolves topics to routes; exact topics win, then patterns in config order.  One topic can
    feed several items: an air probe shared as the ambient of several loads (and maybe an item of
    its own).  Results are cached (a site has as many topics as probes)."""

    def __init__(self, items: tuple[ItemConfig, ...] | list[ItemConfig]):
        self.exact: dict[str, list[Route]] = {}
        self.patterns: list[tuple[str, ItemConfig, RouteKind]] = []
        self.by_name: dict[str, ItemConfig] = {}
        for it in items:
            if it.is_pattern:
                self.patterns.append((it.topic, it, "load"))
                if it.ambient_topic:
                    self.patterns.append((it.ambient_topic, it, "ambient"))
                if it.defrost_topic:
                    self.patterns.append((it.defrost_topic, it, "defrost"))
                if it.episode_topic:
                    self.patterns.append((it.episode_topic, it, "episode"))
            else:
                self.exact.setdefault(it.topic, []).insert(0, Route(it, "load"))
                self.by_name[it.name] = it
                if it.ambient_topic:
                    self.exact.setdefault(it.ambient_topic, []).append(Route(it, "ambient"))
                if it.defrost_topic:
                    self.exact.setdefault(it.defrost_topic, []).append(Route(it, "defrost"))
                if it.episode_topic:
                    self.exact.setdefault(it.episode_topic, []).append(Route(it, "episode"))
        self._cache: dict[str, list[Route]] = {}
        self._refused: dict[str, str] = {}  # topic -> why it names no item

    def filters(self) -> list[str]:
        """Topic filters to subscribe to."""
        out = list(self.exact)
        out += [f for f, _, _ in self.patterns if f not in out]
        return out

    def resolve(self, topic: str) -> Route | None:
        """The first route of ``topic`` (its load item if it has one)."""
        routes = self.resolve_all(topic)
        return routes[0] if routes else None

    def resolve_all(self, topic: str) -> list[Route]:
        """Every route of ``topic``: exact entries, else the first matching load pattern and every
        matching ambient (and defrost) pattern."""
        if topic in self.exact:
            return self.exact[topic]
        if topic in self._cache:
            return self._cache[topic]
        routes: list[Route] = []
        have_load = False
        for flt, it, kind in self.patterns:
            if (kind == "load" and have_load) or not match(flt, topic):
                continue
            name = render(it.name, topic)
            if name is None:
                continue
            why = check_rendered_name(name)
            if why is not None:
                if len(self._refused) < 10_000:
                    self._refused[topic] = why
                continue
            concrete = self.by_name.get(name)
            if concrete is None:
                load_topic = topic if kind == "load" else render_filter(it.topic, topic)
                concrete = it.model_copy(
                    update={
                        "name": name,
                        "topic": load_topic,
                        "ambient_topic": (
                            render_filter(it.ambient_topic, topic) if it.ambient_topic else None
                        ),
                        "defrost_topic": (
                            render_filter(it.defrost_topic, topic) if it.defrost_topic else None
                        ),
                        "episode_topic": (
                            render_filter(it.episode_topic, topic) if it.episode_topic else None
                        ),
                    }
                )
                if kind == "load":
                    self.by_name[name] = concrete
            routes.append(Route(concrete, kind))
            have_load = have_load or kind == "load"
        routes.sort(key=lambda r: r.kind != "load")
        if len(self._cache) < 1_000_000:
            self._cache[topic] = routes
        return routes

    def refuse(self, topic: str, why: str) -> None:
        """Note that ``topic`` names no item (the store refused its name)."""
        self._cache.pop(topic, None)
        if len(self._refused) < 10_000:
            self._refused[topic] = why

    def refusal(self, topic: str) -> str | None:
        """Why a topic matching a pattern named no item (its name failed the checks), if known."""
        return self._refused.get(topic)

    def item_for(self, name: str, topic: str | None = None) -> ItemConfig | None:
        """The concrete config of a stored item (re-resolved from its topic after a restart)."""
        if name in self.by_name:
            return self.by_name[name]
        if topic:
            for route in self.resolve_all(topic):
                if route.kind == "load" and route.item.name == name:
                    return route.item
        return None
