"""The batched writer: messages in, readings and dead letters committed, then acknowledged.

The MQTT network thread only puts messages on this writer's queue.  Here they are parsed, mapped to
items and written in batches: a batch is committed when it holds ``batch_size`` messages, when
``batch_ms`` has passed since its first message, or when the queue has been quiet for a moment
(the broker stops sending when its in-flight window is full of unacknowledged messages, so
waiting longer would only stall).  Only after the commit are the messages acknowledged; if the
commit fails the batch is retried, unacknowledged, until the store takes it or :meth:`stop` is
called (then it stays unacknowledged and the broker sends it again to the next run).

Retries (tenacity): while the store fails, a call is tried again after 0.5 s, 1 s, 2 s ... at
most 30 s apart; the waits end at once when the writer stops.  Anything else going wrong with a
batch is tried three times, then its messages are set aside as dead letters, so one poisoned batch
cannot stop ingest.
"""

from __future__ import annotations

import logging
import queue
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any, NamedTuple, TypeVar

from tenacity import (
    RetryCallState,
    Retrying,
    retry_if_exception_type,
    retry_if_not_exception_type,
    stop_after_attempt,
    wait_exponential,
    wait_fixed,
)
from thermeta.daemon.clock import Clock, monotonic_of
from thermeta.daemon.config import Config, ItemConfig
from thermeta.daemon.ingest.defrost import parse_defrost
from thermeta.daemon.ingest.marks import parse_mark
from thermeta.daemon.ingest.payloads import Limits, excerpt, parse_payload, quick_reading
from thermeta.daemon.ingest.topics import Route, Router
from thermeta.storage.errors import PayloadError, StoreError, StoreRefused
from thermeta.storage.schema import FLAG_RECEIPT_TS
from thermeta.storage.store import DeadLetter, Store

log = logging.getLogger("thermeta.writer")

IDLE_FLUSH_S = 0.005
DEAD_LOG_EVERY_S = 10.0
GUARD_ATTEMPTS = 3  # tries of a batch that fails for any other reason than the store
T = TypeVar("T")


class _Stopped(Exception):
    """stop() was called while the store was failing: the batch stays unacknowledged."""


class Inbound(NamedTuple):
    """One received message, with what is needed to acknowledge it later (a tuple: made once
    per message on the network thread, so it must be cheap)."""

    topic: str
    payload: bytes
    received_at: float
    mid: int = 0
    qos: int = 0
    generation: int = 0  # which broker connection delivered it
    size: int = 0  # the payload's size when it was cut on arrival (too big to keep), else 0


Ack = Callable[[list[Inbound]], None]


@dataclass
class _Part:
    """What one message (or a whole batch: ``msg`` None) becomes: reading rows, dead letters,
    episode marks, and the items it brought news of (name, config, newest reading time or None)."""

    msg: Inbound | None
    readings: list[tuple] = field(default_factory=list)
    dead: list[DeadLetter] = field(default_factory=list)
    marks: list[Any] = field(default_factory=list)
    seen: list[tuple[str, ItemConfig, float | None]] = field(default_factory=list)


@dataclass
class Activity:
    """What the writer has stored, for the refitter: newest reading per item and which items
    have new readings since the refitter last looked."""

    last_ts: dict[str, float] = field(default_factory=dict)
    items: dict[str, ItemConfig] = field(default_factory=dict)
    # when each item's newest reading arrived, on the clock's monotonic scale (clock.monotonic_of)
    arrived: dict[str, float] = field(default_factory=dict)
    _dirty: set[str] = field(default_factory=set)
    _lock: threading.Lock = field(default_factory=threading.Lock)

    def note(
        self, name: str, cfg: ItemConfig, ts: float | None, arrived: float | None = None
    ) -> None:
        """New readings stored for ``name`` (ts None: only its ambient probe's), which arrived at
        ``arrived`` (monotonic; None when unknown: silence is then judged by ``ts``)."""
        with self._lock:
            if ts is not None:
                self.items.setdefault(name, cfg)
                if arrived is not None:
                    self.arrived[name] = arrived
            if ts is not None and ts > self.last_ts.get(name, float("-inf")):
                self.last_ts[name] = ts
            self._dirty.add(name)

    def note_all(
        self, newest: dict[str, tuple[ItemConfig, float | None]], arrived: float | None
    ) -> None:
        """:meth:`note` for a whole batch's items (name -> (config, newest ts)), under one lock."""
        with self._lock:
            items, last, when = self.items, self.last_ts, self.arrived
            for name, (cfg, ts) in newest.items():
                if ts is not None:
                    items.setdefault(name, cfg)
                    if arrived is not None:
                        when[name] = arrived
                    if ts > last.get(name, float("-inf")):
                        last[name] = ts
            self._dirty.update(newest)

    def register(self, name: str, cfg: ItemConfig, last_ts: float | None) -> None:
        with self._lock:
            self.items.setdefault(name, cfg)
            if last_ts is not None:
                self.last_ts[name] = max(last_ts, self.last_ts.get(name, float("-inf")))

    def take_dirty(self) -> set[str]:
        with self._lock:
            out, self._dirty = self._dirty, set()
            return out

    def snapshot(self) -> tuple[dict[str, ItemConfig], dict[str, float]]:
        with self._lock:
            return dict(self.items), dict(self.last_ts)

    def silences(self, now: float, mono_now: float) -> dict[str, float]:
        """Seconds since each item last spoke: since its newest reading arrived where known (a
        step of the wall clock changes nothing), else since its newest reading's time."""
        with self._lock:
            out = {name: now - ts for name, ts in self.last_ts.items()}
            out.update({name: mono_now - at for name, at in self.arrived.items()})
            return out


class Writer(threading.Thread):
    """Consumes :class:`Inbound` messages; call :meth:`submit` from any thread."""

    # the store's retry waits: first, then doubling up to the longest (seconds)
    store_retry_first_s = 0.5
    store_retry_max_s = 30.0

    def __init__(
        self,
        store: Store,
        router: Router,
        config: Config,
        clock: Clock,
        ack: Ack,
        activity: Activity,
    ):
        super().__init__(name="thermeta-writer", daemon=True)
        self.store = store
        self.router = router
        self.config = config
        self.clock = clock
        self.ack = ack
        self.activity = activity
        self.batch_size = config.storage.batch_size
        self.batch_s = config.storage.batch_ms / 1000.0
        self._q: queue.SimpleQueue[Inbound | None] = queue.SimpleQueue()
        self._stopping = threading.Event()
        self._item_ids: dict[str, int] = {}
        self._limits: dict[str, Limits] = {}
        # topic -> [(route, store name, limits, item id, load item name), ...]
        self._topics: dict[str, list[tuple]] = {}
        self.counts = {
            "messages": 0,
            "readings": 0,
            "dead_letters": 0,
            "batches": 0,
            "store_errors": 0,
        }
        self._dead_since_log = 0
        self._dead_last_log = 0.0
        self._dead_latest = ""
        self._internal_since_log = 0
        self._internal_last_log = float("-inf")

    # -- called from other threads ------------------------------------------------------------
    def submit(self, msg: Inbound) -> None:
        self._q.put(msg)

    def stop(self, timeout: float = 30.0) -> None:
        """Write and acknowledge everything already queued, then end the thread."""
        self._stopping.set()
        self._q.put(None)
        self.join(timeout)

    def backlog(self) -> int:
        return self._q.qsize()

    def _pause(self, seconds: float) -> None:
        """Wait between retries; :meth:`stop` ends the wait at once."""
        self._stopping.wait(seconds)

    # -- the thread ---------------------------------------------------------------------------
    def run(self) -> None:
        while True:
            batch, last = self._collect()
            if batch:
                self._write_guarded(batch)
            if last:
                return

    def _write_guarded(self, batch: list[Inbound]) -> None:
        # The writer thread must not die: unacknowledged messages would fill the broker's
        # in-flight window and stop ingest.  After a few failures the batch is set aside.
        def failed(rs: RetryCallState) -> None:
            exc = rs.outcome.exception() if rs.outcome else None
            log.error(
                "writing a batch of %d failed (attempt %d)",
                len(batch),
                rs.attempt_number,
                exc_info=exc,
            )

        guarded = Retrying(
            retry=retry_if_not_exception_type(_Stopped),
            stop=stop_after_attempt(GUARD_ATTEMPTS),
            wait=wait_fixed(0.5),
            sleep=self._pause,
            after=failed,
            reraise=True,
        )
        try:
            guarded(self._write, batch)
            return
        except _Stopped:
            log.warning(
                "stopping while the store fails: %d message(s) left unacknowledged "
                "(the broker sends them again)",
                len(batch),
            )
            return
        except Exception:  # noqa: BLE001 - set aside below
            pass
        try:
            self.store.write_batch(
                [], [self._dead(m, None, "internal error while storing") for m in batch]
            )
            self.counts["dead_letters"] += len(batch)
            self.ack(batch)
        except Exception:  # noqa: BLE001 - the broker resends them after a reconnect
            log.exception("could not set aside a failed batch of %d", len(batch))

    def _collect(self) -> tuple[list[Inbound], bool]:
        first = self._q.get()
        if first is None:
            return [], True
        batch = [first]
        deadline = time.monotonic() + self.batch_s
        while len(batch) < self.batch_size:
            wait = min(IDLE_FLUSH_S, deadline - time.monotonic())
            if wait <= 0:
                break
            try:
                msg = self._q.get(timeout=wait)
            except queue.Empty:
                break
            if msg is None:
                return batch, True
            batch.append(msg)
        return batch, False

    def _write(self, batch: list[Inbound]) -> None:
        self._prepare_topics(batch)
        whole = _Part(None)  # the whole batch's rows: no object per message on the hot path
        for msg in batch:
            self._convert_guarded(msg, whole)
        parts = [whole]
        try:
            self._until_stored(
                "store write failed (%s); retrying in %.1f s, nothing acknowledged",
                self.store.write_batch,
                whole.readings,
                whole.dead,
                whole.marks,
            )
        except StoreRefused as exc:
            # Something in the batch is refused by the store itself: store it message by message,
            # so only what is refused is set aside and the rest goes in.
            log.warning("the store refused part of a batch (%s); writing it one by one", exc)
            parts = []
            for msg in batch:
                part = _Part(msg)
                self._convert_guarded(msg, part, quiet=True)
                parts.append(self._write_one(msg, part))
        readings = sum(len(p.readings) for p in parts)
        dead = [d for p in parts for d in p.dead]
        self.counts["batches"] += 1
        self.counts["messages"] += len(batch)
        self.counts["readings"] += readings
        self.counts["dead_letters"] += len(dead)
        newest: dict[str, tuple[ItemConfig, float | None]] = {}
        for name, cfg, ts in (s for p in parts for s in p.seen):
            prev = newest.get(name)
            if prev is None or (ts is not None and (prev[1] is None or ts > prev[1])):
                newest[name] = (cfg, ts)
        self.activity.note_all(newest, monotonic_of(self.clock))
        try:
            self.ack(batch)
        except Exception:  # noqa: BLE001 - unacked messages come back and are absorbed
            log.exception("acknowledging %d messages failed", len(batch))
        if dead:
            self._log_dead(len(dead), dead[-1])

    def _write_one(self, msg: Inbound, part: _Part) -> _Part:
        """Store one message's readings, dead letters and marks on their own; if the store refuses
        them, the message becomes a dead letter with the store's reason."""
        try:
            self._until_stored(
                "store write failed (%s); retrying in %.1f s, nothing acknowledged",
                self.store.write_batch,
                part.readings,
                part.dead,
                part.marks,
            )
            return part
        except StoreRefused as exc:
            item = part.seen[0][0] if part.seen else None
            gone = _Part(msg)
            gone.dead.append(self._dead(msg, item, f"the store refused it: {exc}"))
            self._until_stored(
                "store write failed (%s); retrying in %.1f s, nothing acknowledged",
                self.store.write_batch,
                [],
                gone.dead,
            )
            return gone

    def _until_stored(
        self,
        message: str,
        call: Callable[..., T],
        *args: Any,
        **kw: Any,
    ) -> T:
        """``call(*args, **kw)``, tried again while the store fails (see the module docstring);
        raises :class:`_Stopped` when :meth:`stop` ends the waiting.  :class:`StoreRefused` (the
        store refuses the rows themselves) is not retried: it is raised for the caller to set the
        rows aside."""

        def count(_: RetryCallState) -> None:
            self.counts["store_errors"] += 1

        def tell(rs: RetryCallState) -> None:
            wait_s = rs.next_action.sleep if rs.next_action else 0.0
            log.error(message, rs.outcome.exception() if rs.outcome else "?", wait_s)

        policy = Retrying(
            retry=retry_if_exception_type(StoreError) & retry_if_not_exception_type(StoreRefused),
            wait=wait_exponential(multiplier=self.store_retry_first_s, max=self.store_retry_max_s),
            stop=lambda _: self._stopping.is_set(),
            sleep=self._pause,
            after=count,
            before_sleep=tell,
            reraise=True,
        )
        try:
            return policy(call, *args, **kw)
        except StoreRefused:
            raise
        except StoreError as exc:  # only once stopping: every other failure is retried
            raise _Stopped from exc

    def _prepare_topics(self, batch: list[Inbound]) -> None:
        """Resolve the batch's new topics and register their new items in one go."""
        routes: dict[str, list[Route]] = {}
        for msg in batch:
            if msg.topic not in self._topics and msg.topic not in routes:
                try:
                    routes[msg.topic] = self.router.resolve_all(msg.topic)
                except Exception:  # noqa: BLE001 - the message becomes a dead letter
                    log.exception("cannot map topic %r", msg.topic[:200])
                    routes[msg.topic] = []
        specs = [
            (r.store_name, r.kind, r.item.unit, r.source_topic)
            for rs in routes.values()
            for r in rs
            if r.kind != "episode"  # its messages are marks, not readings
        ]
        ids: dict[str, int] = {}
        refused: dict[str, str] = {}
        if specs:
            ids, refused = self._register(specs)
        for topic, rs in routes.items():
            hits: list[tuple] = []
            for route in rs:
                name = route.store_name
                if name in refused:
                    self.router.refuse(topic, f"the store refused item {name[:60]!r}")
                    continue
                if route.kind == "load" and name not in self._item_ids:
                    log.info("new item %s on %s", name, topic)
                self._item_ids[name] = ids.get(name, 0)
                hits.append(
                    (
                        route,
                        name,
                        self._limits_for(route),
                        ids.get(name, 0),
                        name if route.kind == "load" else route.item.name,
                    )
                )
            if len(self._topics) < 1_000_000:
                self._topics[topic] = hits

    def _register(self, specs: list[tuple]) -> tuple[dict[str, int], dict[str, str]]:
        """Ids of new items, registered together; if the store refuses one, each on its own, so
        only the refused ones are left out (name -> the store's reason)."""
        now = self.clock.now()
        message = "cannot register new items (%s); retrying in %.1f s"
        try:
            return self._until_stored(message, self.store.ensure_items, specs, now=now), {}
        except StoreRefused:
            pass
        ids: dict[str, int] = {}
        refused: dict[str, str] = {}
        for spec in specs:
            try:
                ids.update(self._until_stored(message, self.store.ensure_items, [spec], now=now))
            except StoreRefused as exc:
                refused[spec[0]] = str(exc)
                log.warning("the store refused item %r: %s", spec[0][:60], exc)
        return ids, refused

    def _convert_guarded(self, msg: Inbound, part: _Part, quiet: bool = False) -> None:
        """:meth:`_convert` into ``part``; an unexpected error makes the message a dead letter
        (whatever it had added taken back), so one odd message cannot stop ingest.  ``quiet``:
        converting again after the store refused a batch (the error was logged the first time)."""
        sizes = (len(part.readings), len(part.dead), len(part.marks), len(part.seen))
        try:
            self._convert(msg, part)
        except StoreError:
            raise
        except Exception as exc:  # noqa: BLE001 - set aside as a dead letter
            del part.readings[sizes[0] :], part.dead[sizes[1] :]
            del part.marks[sizes[2] :], part.seen[sizes[3] :]
            part.dead.append(self._dead(msg, None, f"internal error: {exc.__class__.__name__}"))
            if not quiet:
                self._log_internal(msg)

    def _convert(self, msg: Inbound, part: _Part) -> None:
        readings, dead, seen, marks = part.readings, part.dead, part.seen, part.marks
        hits = self._topics.get(msg.topic)
        if not hits:
            why = self.router.refusal(msg.topic) or "no item is mapped to this topic"
            dead.append(self._dead(msg, None, why))
            return
        failed: tuple[str, str] | None = None
        for route, name, limits, item_id, load_name in hits:
            if msg.size:
                failed = (name, f"oversized payload ({msg.size} bytes > {limits.max_bytes})")
                break
            kind = route.kind
            if kind != "episode" and kind != "defrost":
                quick = quick_reading(msg.payload, msg.received_at, route.item.unit, limits)
                if quick is not None:  # the common payload, checked without objects
                    readings.append((item_id, quick[0], quick[1], 0, msg.received_at))
                    seen.append((load_name, route.item, quick[0] if kind == "load" else None))
                    continue
            try:
                if kind == "episode":
                    marks.append(parse_mark(load_name, msg.payload, msg.received_at, limits))
                    continue
                if kind == "defrost":
                    parsed = parse_defrost(msg.payload, msg.received_at, limits)
                else:
                    parsed = parse_payload(
                        msg.payload, msg.received_at, route.item.unit, limits, route.item.senml_name
                    )
            except PayloadError as exc:
                failed = failed or (name, str(exc))
                continue
            newest = parsed[0].ts
            for r in parsed:
                readings.append(
                    (
                        item_id,
                        r.ts,
                        r.value_c,
                        FLAG_RECEIPT_TS if r.receipt_ts else 0,
                        msg.received_at,
                    )
                )
                if r.ts > newest:
                    newest = r.ts
            seen.append((load_name, route.item, newest if kind == "load" else None))
        if failed is not None:
            dead.append(self._dead(msg, failed[0], failed[1]))

    def _limits_for(self, route: Route) -> Limits:
        key = route.store_name
        lim = self._limits.get(key)
        if lim is None:
            lo, hi = route.item.plausible_c
            lim = Limits(
                low_c=lo,
                high_c=hi,
                max_future_s=self.config.ingest.max_future_s,
                max_bytes=self.config.ingest.max_payload_bytes,
            )
            self._limits[key] = lim
        return lim

    def _dead(self, msg: Inbound, item: str | None, reason: str) -> DeadLetter:
        return DeadLetter(
            received_at=msg.received_at,
            topic=msg.topic[:1024],
            item=None if item is None else item[:200],
            reason=reason[:300],
            payload=excerpt(msg.payload, self.config.ingest.dead_letter_chars),
        )

    def _log_internal(self, msg: Inbound) -> None:
        """A traceback for an unexpected error, at most one per DEAD_LOG_EVERY_S (with a count of
        the others): a flood of one kind of bad message must not flood the log."""
        self._internal_since_log += 1
        now = time.monotonic()
        if now - self._internal_last_log >= DEAD_LOG_EVERY_S:
            log.exception(
                "unexpected error handling a message on %s (%d such error(s) since the last line)",
                msg.topic[:200],
                self._internal_since_log,
            )
            self._internal_since_log = 0
            self._internal_last_log = now

    def _log_dead(self, n: int, latest: DeadLetter) -> None:
        # Rate-limited: a flood of bad payloads gives one line per interval, not one per message.
        self._dead_since_log += n
        self._dead_latest = f"{latest.topic}: {latest.reason}"
        now = time.monotonic()
        if now - self._dead_last_log >= DEAD_LOG_EVERY_S:
            log.warning(
                "%d payload(s) set aside as dead letters (latest %s)",
                self._dead_since_log,
                self._dead_latest,
            )
            self._dead_since_log = 0
            self._dead_last_log = now
