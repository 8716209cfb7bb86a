"""Several daemons sharing one site ([cluster], docs/cluster.md), on engines the site runs already.

- The broker spreads the readings: each daemon subscribes with the MQTT 5 shared subscription
  ``$share/<group>/<filter>`` (``ingest/mqtt.py``), so each reading reaches one daemon of the
  group, which stores it in the shared PostgreSQL store and acknowledges it after the commit, as
  a lone daemon does.
- The store spreads the items: each item's refits and alerts belong to one daemon at a time, by
  a lease row (``storage/leases.py``, :class:`~thermeta.daemon.cluster.keeper.Cluster`), renewed
  every eighth of a ``refit_every`` and lasting half of one; a daemon that stops renewing
  (killed, cut off) loses its items to the others, which take them at their next tick.  Each
  daemon claims up to its fair share, ``ceil(items / live daemons)``, and lets the excess expire.
- The outbox is shared: a worker claims one row at a time (``FOR UPDATE SKIP LOCKED``,
  ``storage/alerts.py`` ``claim``), so each alert is sent by one daemon.
"""

from thermeta.daemon.cluster.keeper import Cluster

__all__ = ["Cluster"]
