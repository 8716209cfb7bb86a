"""The refitter's view of the items in a group: only those this daemon holds a lease on.

The writer notes every item whose readings it stored (:class:`~thermeta.daemon.ingest.writer.
Activity`), but in a group an item's readings reach any daemon: before each round this view asks
the store for the newest reading of each item held here and marks the ones that moved, so the
holder refits an item whichever daemon took its readings.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from thermeta.daemon.clock import monotonic_of
from thermeta.daemon.ingest.writer import Activity

if TYPE_CHECKING:
    from thermeta.daemon.cluster.keeper import Cluster


class HeldActivity:
    """What :class:`~thermeta.daemon.refit.rounds.Refitter` reads of :class:`Activity`, narrowed
    to the items this daemon may refit now (``Cluster.may_refit``)."""

    def __init__(self, base: Activity, cluster: Cluster):
        self.base = base
        self.cluster = cluster
        self._waiting: set[str] = set()  # held, new readings, but not to be refitted yet
        self.round_now: float | None = None  # the clock time of the round under way

    def take_dirty(self) -> set[str]:
        """Called first in each round (``Refitter.run_once``), just after it read the clock."""
        now = self.round_now = self.cluster.service.clock.now()
        self._catch_up()
        dirty = self.base.take_dirty() | self._waiting
        held = set(self.cluster.held_names())
        ours = {n for n in dirty if n in held}
        ready = {n for n in ours if self.cluster.may_refit(n, now)}
        self._waiting = ours - ready
        return ready

    def snapshot(self) -> tuple[dict[str, Any], dict[str, float]]:
        items, last = self.base.snapshot()
        now = self.cluster.service.clock.now()
        return {n: c for n, c in items.items() if self.cluster.may_refit(n, now)}, last

    def silences(self, now: float, mono_now: float) -> dict[str, float]:
        return self.base.silences(now, mono_now)

    def _catch_up(self) -> None:
        """Mark the held items whose newest reading in the store is newer than we know."""
        names = self.cluster.held_names()
        if not names:
            return
        try:
            newest = self.cluster.leases.newest_readings(names)
        except Exception:  # noqa: BLE001 - the round goes on with what this daemon stored
            return
        items, last = self.base.snapshot()
        mono = monotonic_of(self.cluster.service.clock)
        for name, ts in newest.items():
            cfg = items.get(name)
            if cfg is not None and ts > last.get(name, float("-inf")):
                self.base.note(name, cfg, ts, arrived=mono)
