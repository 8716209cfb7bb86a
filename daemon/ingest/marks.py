"""An item's episode messages: a start or an end told over MQTT on its ``episode_topic``.

Accepted payloads: ``start`` or ``end`` (any case; ``start NAME`` names the batch), or a JSON
object ``{"episode": "start"|"end", "batch": "B-0418", "class": "rice-trays", "ts": epoch
seconds or RFC 3339}`` (all but ``episode`` optional).  The writer applies them to the store's
``episodes`` table in the same transaction as the batch they came in (``storage/episodes.py``).
"""

from __future__ import annotations

import json
from typing import Any

from thermeta.daemon.ingest.defrost import _ts
from thermeta.daemon.ingest.payloads import DEFAULT_LIMITS, Limits
from thermeta.daemon.states import EpisodeSource
from thermeta.storage.episodes import Mark
from thermeta.storage.errors import PayloadError

MAX_NAME = 200


def _text(doc: dict[str, Any], key: str) -> str | None:
    v = doc.get(key)
    if v is None:
        return None
    if not isinstance(v, str) or not v.strip() or len(v) > MAX_NAME:
        raise PayloadError(f'episode "{key}" must be a text of 1-{MAX_NAME} characters')
    return v.strip()


def parse_mark(item: str, payload: bytes, now: float, limits: Limits = DEFAULT_LIMITS) -> Mark:
    """The start or end in ``payload`` (received at ``now``) for ``item``; PayloadError with a
    short reason (the dead-letter reason) otherwise."""
    if len(payload) > limits.max_bytes:
        raise PayloadError(f"oversized payload ({len(payload)} bytes > {limits.max_bytes})")
    try:
        text = payload.decode("utf-8").strip()
    except UnicodeDecodeError:
        raise PayloadError("episode payload is not UTF-8 text") from None
    if text.startswith("{"):
        try:
            doc = json.loads(text)
        except (ValueError, RecursionError):
            raise PayloadError("episode payload is not valid JSON") from None
        if not isinstance(doc, dict):
            raise PayloadError("episode payload must be a JSON object")
        action = str(doc.get("episode", "")).strip().lower()
        name, cls = _text(doc, "batch"), _text(doc, "class")
        ts_raw = doc.get("ts")
    else:
        word, _, rest = text.partition(" ")
        action, name, cls, ts_raw = word.lower(), rest.strip()[:MAX_NAME] or None, None, None
    if action not in ("start", "end"):
        raise PayloadError('episode payload must say "start" or "end"')
    ts, _receipt = _ts(ts_raw, now, limits)
    return Mark(item, ts, action, EpisodeSource.MESSAGE, name, cls)
