"""What the alert rules are told and what they remember between refits.

:class:`RuleParams` is an item's alert settings; :class:`ItemAlertState` (with a
:class:`LevelMemory` per level) is the memory the rules keep for one item, stored as JSON
between refits and restarts; :class:`Raised` is one alert the rules decided to send.  The rules
themselves are in ``daemon/alerts/rules.py``.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from typing import Any

from thermeta.daemon.states import ATTENTION, BudgetState, Event, ItemState, Side

__all__ = ["ItemAlertState", "LevelMemory", "Raised", "RuleParams"]


@dataclass(frozen=True)
class RuleParams:
    """An item's alert settings, temperatures in the item's unit, times in seconds."""

    threshold: float | None = None  # a forecast without levels: its one limit's threshold
    lead_s: float = 1800.0
    hysteresis: float = 0.5
    hold_s: float = 300.0
    remind_every_s: float = 1800.0
    # How long until the next refit looks again: an approach is raised when the early end of the
    # interval falls within lead + this, so the warning is never later than lead.
    check_every_s: float = 0.0
    # The defrost hold (module docstring): the recovery delay after a defrost ends, and the
    # longest a defrost may hold alerts however long its signal stays on.
    defrost_recovery_s: float = 1800.0
    defrost_max_s: float = 3600.0
    # The alarm delay: a new warning (and a regime change) is raised only once its condition
    # has held this long; 0 raises it at the first refit that sees it.
    delay_s: float = 0.0
    side: Side | None = None  # a forecast without levels: its configured side (None: auto)
    horizon_s: float = 86400.0  # crossings further away are not forecasts worth acting on

    def __post_init__(self) -> None:
        for name in ("lead_s", "hold_s", "remind_every_s", "defrost_max_s"):
            if not getattr(self, name) > 0:
                raise ValueError(f"{name} must be > 0, got {getattr(self, name)!r}")
        for name in ("hysteresis", "defrost_recovery_s", "delay_s"):
            if not getattr(self, name) >= 0:
                raise ValueError(f"{name} must be >= 0, got {getattr(self, name)!r}")

    @classmethod
    def of(cls, item_cfg: Any, check_every_s: float = 0.0) -> RuleParams:
        side: Side | None = getattr(item_cfg, "side", None)
        return cls(
            threshold=getattr(item_cfg, "threshold", None),
            lead_s=item_cfg.lead_s,
            hysteresis=item_cfg.hysteresis,
            hold_s=item_cfg.hold_s,
            remind_every_s=item_cfg.remind_every_s,
            check_every_s=check_every_s,
            defrost_recovery_s=getattr(item_cfg, "defrost_recovery_s", 1800.0),
            defrost_max_s=getattr(item_cfg, "defrost_max_s", 3600.0),
            delay_s=getattr(item_cfg, "delay_s", 0.0),
            side=side if side in ("above", "below") else None,
            horizon_s=getattr(item_cfg, "horizon_s", 86400.0),
        )


@dataclass
class LevelMemory:
    """What the rules remember about one level."""

    state: ItemState | None = None  # the held state (None: never judged)
    side: Side | None = None  # decided once when the forecast does not say (rules alone)
    episode: int | None = None  # the episode the state belongs to (a new one starts afresh)
    since: float | None = None  # when the held state was entered
    crossed_at: float | None = None
    last_sent: float | None = None  # the last crossed alert or reminder
    off_since: float | None = None  # since when the held warning's condition has been false
    pending_since: float | None = None  # since when a new warning's condition has held (delay)
    budget: BudgetState = BudgetState.OK

    @classmethod
    def from_json(cls, d: dict[str, Any]) -> LevelMemory:
        known = set(cls.__dataclass_fields__)
        m = cls(**{k: v for k, v in d.items() if k in known})
        m.state = None if m.state is None else ItemState(m.state)
        m.budget = BudgetState(m.budget)
        return m


@dataclass
class ItemAlertState:
    """What the rules remember about one item (stored as JSON between refits and restarts)."""

    incident: int = 0  # counts incidents; the open one is what `thermeta ack` acknowledges
    incident_open: bool = False
    stale: bool = False
    regime_start: float | None = None  # the newest change of the surroundings alerted on
    seq: int = 0  # counts alerts, so each has its own key
    levels: dict[str, LevelMemory] = field(default_factory=dict)

    def to_json(self) -> dict[str, Any]:
        return asdict(self)

    @classmethod
    def from_json(cls, d: dict[str, Any] | None) -> ItemAlertState:
        if not d:
            return cls()
        known = set(cls.__dataclass_fields__) - {"levels"}
        st = cls(**{k: v for k, v in d.items() if k in known})
        st.levels = {k: LevelMemory.from_json(v) for k, v in (d.get("levels") or {}).items()}
        if "levels" not in d and d.get("level") not in (None, "clear"):
            # the single-level memory of an older version: kept for the item's first level
            st.incident, st.incident_open = int(d.get("episode") or 0), True
            st.levels["*"] = LevelMemory(
                state=ItemState(d["level"]),
                side={"upper": "above", "lower": "below"}.get(d.get("side") or ""),  # type: ignore[arg-type]
                since=d.get("since"),
                crossed_at=d.get("crossed_at"),
                last_sent=d.get("last_sent"),
            )
        return st

    @property
    def open_states(self) -> dict[str, ItemState]:
        """The held states that need attention, by level."""
        return {
            k: m.state
            for k, m in self.levels.items()
            if m.state is not None and m.state in ATTENTION
        }


@dataclass
class Raised:
    """One alert to send: its event, the level it is about, whether it repeats, and context."""

    event: Event
    level: str | None = None
    reminder: bool = False
    context: dict[str, Any] = field(default_factory=dict)
