"""Learned priors, joined to the shared :data:`thermeta.storage.schema.metadata`.

    priors       one row per prior class (an item's own name, or a class such as all reefers at
                 a yard): the JSON of :class:`thermeta.predictors.prior.Prior`
    prior_items  per item: the newest reading time of the last episode it taught its class, so a
                 restart does not teach the same stretch of readings twice

The store knows nothing of the statistics: :meth:`PriorStore.learn` reads the class's row, hands
it to the caller's update function and writes the result, the item's mark with it, in ONE
transaction (two items of one class refitted by different processes cannot lose an update); in
a :meth:`~thermeta.storage.store.Store.batch` that transaction is the batch's.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Sequence
from typing import Any

from sqlalchemy import Column, Double, Integer, String, Table, Text, insert, select, update
from thermeta.storage.schema import metadata
from thermeta.storage.store import Store

priors = Table(
    "priors",
    metadata,
    Column("prior_class", String(200), primary_key=True),
    Column("updated_at", Double, nullable=False),
    Column("n_episodes", Integer, nullable=False),
    Column("body", Text, nullable=False),  # JSON of predictors.prior.Prior.to_dict()
)

prior_items = Table(
    "prior_items",
    metadata,
    Column("item", String(200), primary_key=True),
    Column("prior_class", String(200), nullable=False),
    Column("learned_until", Double, nullable=False),
    Column("n_learned", Integer, nullable=False, default=0),
)


class PriorStore:
    """Prior queries over a :class:`thermeta.storage.store.Store` (same engine, same locks)."""

    def __init__(self, store: Store):
        self.store = store

    def get(self, prior_class: str) -> dict[str, Any] | None:
        with self.store.reading() as conn:
            text = conn.execute(
                select(priors.c.body).where(priors.c.prior_class == prior_class)
            ).scalar()
        return None if text is None else json.loads(text)

    def all(self) -> dict[str, dict[str, Any]]:
        with self.store.reading() as conn:
            return {
                c: json.loads(b)
                for c, b in conn.execute(select(priors.c.prior_class, priors.c.body))
            }

    def get_many(self, classes: Sequence[str]) -> dict[str, dict[str, Any]]:
        """:meth:`get` of many classes (those that have a prior): one query per 500."""
        names = list(dict.fromkeys(classes))
        out: dict[str, dict[str, Any]] = {}
        for i in range(0, len(names), 500):
            q = select(priors.c.prior_class, priors.c.body).where(
                priors.c.prior_class.in_(names[i : i + 500])
            )
            with self.store.reading() as conn:
                out.update({c: json.loads(b) for c, b in conn.execute(q)})
        return out

    def learned_until(self, item: str) -> float | None:
        with self.store.reading() as conn:
            v = conn.execute(
                select(prior_items.c.learned_until).where(prior_items.c.item == item)
            ).scalar()
        return None if v is None else float(v)

    def learn(
        self,
        prior_class: str,
        item: str,
        until_ts: float,
        now: float,
        update_fn: Callable[[dict[str, Any] | None], dict[str, Any]],
    ) -> dict[str, Any]:
        """body' = update_fn(body or None) for the class, and the item's mark set to until_ts,
        in one transaction; returns body'."""
        with self.store.transaction() as conn:
            text = conn.execute(
                select(priors.c.body).where(priors.c.prior_class == prior_class)
            ).scalar()
            body = update_fn(None if text is None else json.loads(text))
            row = {
                "updated_at": now,
                "n_episodes": int(body.get("n_episodes", 0)),
                "body": json.dumps(body),
            }
            if not conn.execute(
                update(priors).where(priors.c.prior_class == prior_class).values(**row)
            ).rowcount:
                conn.execute(insert(priors).values(prior_class=prior_class, **row))
            mark = {"prior_class": prior_class, "learned_until": until_ts}
            if not conn.execute(
                update(prior_items)
                .where(prior_items.c.item == item)
                .values(n_learned=prior_items.c.n_learned + 1, **mark)
            ).rowcount:
                conn.execute(insert(prior_items).values(item=item, n_learned=1, **mark))
        return body
