"""The learned priors a round fits with, and the lessons its fits teach them (the rule is in
``rounds.py``'s docstring; the statistics in ``predictors/prior.py``, the rows in
``storage/priors.py``).

    teacher = PriorKeeper(store)
    teacher.preload(classes)                         # a chunk's classes: one query
    prior = teacher.prior_for(name, cls, window_from, episode)
    teacher.learn_from(name, cls, fc, prior, now, episode, refit_plain)
    teacher.write()                                  # in the chunk's batch (``Store.batch``)

A lesson changes the class's prior in memory at once (the round's next items of the class fit
with it, as before) and is stored when the round stores its chunk of forecasts, in the chunk's
one transaction: the class's stored row is read, the same update applied to it (so another
process's lessons of the class in between are kept) and written with the item's mark.  A
transaction rolled back keeps the lessons for the next chunk's; a crash loses at most the
lessons since the last chunk was stored, and the item's mark with them, so the next round after
the restart teaches them again.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from typing import Any

from thermeta.predictors.prior import Prior, learn, learnable
from thermeta.predictors.result import Forecast
from thermeta.storage.episodes import Episode
from thermeta.storage.priors import PriorStore
from thermeta.storage.store import Store

log = logging.getLogger("thermeta.refit")


@dataclass(frozen=True)
class Lesson:
    """One lesson waiting to be stored: the class, the item, the newest reading it taught."""

    cls: str
    item: str
    until: float
    at: float
    update: Callable[[dict[str, Any] | None], dict[str, Any]]


class PriorKeeper:
    """The classes' priors as the round knows them, what each item holds, and unstored lessons."""

    def __init__(self, store: Store):
        self.store = store
        self.prior_store = PriorStore(store)
        self.priors: dict[str, Prior] = {}  # by prior class, loaded on first use
        self.learned_until: dict[str, float] = {}  # by item
        self.held: dict[str, tuple[Prior, float, int | None]] = {}  # by item (rounds.py)
        self.lessons = 0
        self.unstored: list[Lesson] = []

    def preload(self, classes: Iterable[str]) -> None:
        """Read the priors of the classes not known yet in one query (a round's first chunks
        would otherwise read one row per item)."""
        want = [c for c in dict.fromkeys(classes) if c not in self.priors]
        if not want:
            return
        try:
            found = self.prior_store.get_many(want)
        except Exception:  # noqa: BLE001 - read one by one at their first use
            log.exception("reading the priors of %d classes failed", len(want))
            return
        for c in want:
            self.priors[c] = Prior.from_dict(found[c]) if c in found else Prior()

    def prior(self, cls: str) -> Prior:
        """The class's prior (an empty one if it has none yet, or the store cannot say)."""
        if cls not in self.priors:
            try:
                body = self.prior_store.get(cls)
            except Exception:  # noqa: BLE001 - forecasts go on without a prior
                log.exception("reading the prior of %s failed", cls)
                return Prior()
            self.priors[cls] = Prior() if body is None else Prior.from_dict(body)
        return self.priors[cls]

    def prior_for(
        self, name: str, cls: str, window_from: float | None, episode: Episode | None
    ) -> Prior:
        """The prior for the item's fit now: the class's, or the one it had before the item's
        own lesson while the fit could still see the taught readings."""
        held = self.held.get(name)
        if held is not None:
            before, until, ep_id = held
            same = episode is not None and episode.closed_at is None and episode.id == ep_id
            if same or window_from is None or window_from <= until:
                return before
            del self.held[name]
        return self.prior(cls)

    def learn_from(
        self,
        name: str,
        cls: str,
        fc: Forecast,
        prior: Prior | None,
        now: float,
        episode: Episode | None,
        refit_plain: Callable[[], Forecast],
    ) -> None:
        """Teach the class from this fit (once an episode); ``refit_plain()``: the same fit
        without the prior."""
        ep_id = episode.id if episode is not None and episode.closed_at is None else None
        held = self.held.get(name)
        if ep_id is not None and held is not None and held[2] == ep_id:
            return  # this episode has taught its class already
        self.maybe_learn(name, cls, fc, prior, now, refit_plain, ep_id)

    def maybe_learn(
        self,
        name: str,
        cls: str,
        fc: Forecast,
        prior: Prior | None,
        now: float,
        refit_plain: Callable[[], Forecast],
        episode_id: int | None = None,
    ) -> None:
        """Teach the class this stretch's k (and fitted ambient): at once in memory, stored by
        :meth:`write`."""
        if not learnable(fc) or fc.regime_start is None or fc.t_last is None:
            return
        if name not in self.learned_until:
            try:
                self.learned_until[name] = self.prior_store.learned_until(name) or -math.inf
            except Exception:  # noqa: BLE001
                log.exception("reading the prior mark of %s failed", name)
                return
        if fc.regime_start <= self.learned_until[name]:
            return
        plain = fc if prior is None or not prior.n_episodes else refit_plain()
        if not learnable(plain) or plain.t_last is None:
            return
        until = plain.t_last

        def update(body: dict[str, Any] | None) -> dict[str, Any]:
            return learn(None if body is None else Prior.from_dict(body), plain).to_dict()

        before = prior if prior is not None else self.prior(cls)
        self.priors[cls] = Prior.from_dict(update(self.prior(cls).to_dict()))
        self.unstored.append(Lesson(cls, name, until, now, update))
        self.learned_until[name] = until
        # this item's own fits keep the prior as it was, while they can see what it taught
        self.held[name] = (before, until, episode_id)
        self.lessons += 1
        log.info(
            "prior %s learned from %s: %d episode(s), time constant about %.3g h",
            cls,
            name,
            self.priors[cls].n_episodes,
            1.0 / (plain.k_per_s or math.inf) / 3600.0,
        )

    def write(self) -> None:
        """Store the lessons taught since the last call (inside a batch: in its transaction;
        kept for the next call if that is rolled back).  One that cannot be stored is dropped
        and its class read again: the item teaches again at its next episode."""
        if not self.unstored:
            return
        taken, self.unstored = self.unstored, []
        written: list[Lesson] = []
        self.store.on_rollback(lambda: self.unstored.__setitem__(slice(0, 0), written))
        # one order of classes for every daemon of a group: two never wait on each other's rows
        for ls in sorted(taken, key=lambda ls: ls.cls):
            try:
                body = self.prior_store.learn(ls.cls, ls.item, ls.until, ls.at, ls.update)
            except Exception:  # noqa: BLE001 - the next episode teaches again
                log.exception("storing the prior of %s failed", ls.cls)
                self.priors.pop(ls.cls, None)
                self.learned_until.pop(ls.item, None)
                self.held.pop(ls.item, None)
                continue
            written.append(ls)
            self.priors[ls.cls] = Prior.from_dict(body)
