"""One item's forecast JSON from its levels' forecasts: each level judged, the item's state, its
episode, excursions and budgets (pure: the refit and the alert bench both call it).

The item's state is its most pressing level's (``states.RANK``), except:

    stale      no reading for longer than the item's silence limit
    learning   no reading yet

The top-level fields (``threshold``, ``eta_s`` ...) are those of the item's *focus*: its most
pressing level (the first in config order among equals), so a one-level item's JSON reads as it
always did; ``levels`` holds every level.
"""

from __future__ import annotations

from typing import Any

from thermeta.daemon.levels import tally as tally_
from thermeta.daemon.levels.judge import judge
from thermeta.daemon.levels.spec import Level
from thermeta.daemon.states import ItemState, Side, rank
from thermeta.daemon.units import to_item_units
from thermeta.predictors.result import Forecast, rfc3339


def judge_item(
    name: str,
    cfg: Any,
    levels: tuple[Level, ...],
    fcs: list[Forecast | None],
    sides: dict[str, Side | None],
    now: float,
    last_ts: float | None,
    *,
    check_every_s: float = 0.0,
    silent_s: float | None = None,
    episode: Any = None,
    tally: tally_.Tally | None = None,
    period_tally: tally_.Tally | None = None,
) -> tuple[ItemState, dict[str, Any]]:
    """(state, forecast JSON) of item ``name``.

    ``fcs``: each level's forecast (degC; None where none was made); ``sides``: each level's
    side as decided; ``episode``: the open (or the last) episode, whose ``tally`` (readings since
    its start) keeps when each target was reached; ``period_tally``: the rolling period's, for
    the budgets when no episode is open; ``silent_s``: how long the item has been silent (by
    the readings' arrival; None: ``now`` minus the newest reading's time)."""
    docs: list[dict[str, Any]] = []
    start = None if episode is None else episode.opened_at
    is_open = episode is not None and episode.closed_at is None
    for lv, fc in zip(levels, fcs):
        d = {} if fc is None else to_item_units(fc.to_dict(), cfg.unit)
        view = judge(
            lv,
            d,
            sides.get(lv.name),
            now,
            hysteresis=cfg.hysteresis,
            check_every_s=check_every_s,
            horizon_s=cfg.horizon_s,
            episode_start_s=start,
            reached_at_s=None if tally is None else tally.reached.get(lv.name),
            tracked=episode is not None,
        )
        doc = view.to_json(now)
        doc["episode"] = None if episode is None else episode.id
        if lv.budget_s is not None:
            over = tally if is_open else period_tally
            ex = None if over is None else over.excursions.get(lv.name)
            used = 0.0 if ex is None else ex.beyond_s
            if view.past and over is not None and over.last_t is not None:
                used += max(0.0, now - over.last_t)  # beyond since the newest reading, too
            doc["budget"] = tally_.budget(
                lv.name,
                lv.budget_s,
                used,
                now,
                past=view.past,
                eta_s=view.eta_s,
                eta_lo_s=view.eta_lo_s,
                eta_hi_s=view.eta_hi_s,
                lead_s=lv.lead_s,
                over="episode" if is_open else "period",
                since_s=None if over is None else over.since_s,
                check_every_s=check_every_s,
                slack_s=0.0 if over is None else over.last_dt,
            ).to_json()
        docs.append(doc)
    focus = min(range(len(docs)), key=lambda i: (rank(docs[i]["state"]), i)) if docs else None
    top_fc = None if focus is None else fcs[focus]
    body: dict[str, Any] = {} if top_fc is None else to_item_units(top_fc.to_dict(), cfg.unit)
    if last_ts is None or (
        top_fc is not None and top_fc.n_points == 0 and top_fc.value_now is None
    ):
        state = ItemState.LEARNING
    elif (now - last_ts if silent_s is None else silent_s) > cfg.silence_s:
        state = ItemState.STALE
    elif focus is None:
        state = ItemState.LEARNING
    else:
        state = ItemState(docs[focus]["state"])
    body.update(
        item=name,
        state=state,
        updated_at=rfc3339(now),
        unit=cfg.unit,
        levels=docs,
        focus=None if focus is None else docs[focus]["name"],
        kind=None if focus is None else docs[focus]["kind"],
        side=None if focus is None else docs[focus]["side"],
    )
    if focus is not None:
        body["threshold"] = levels[focus].threshold
    if episode is not None:
        ep = episode.to_json()
        if tally is not None:
            ep["tally"] = tally.to_json(cfg.unit)
        body["episode"] = ep
    if period_tally is not None:
        body["period"] = period_tally.to_json(cfg.unit)
    if cfg.site:
        body["site"] = cfg.site
    return state, body
