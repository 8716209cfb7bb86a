"""The alert mail as a person reads it, received by a real SMTP server (aiosmtpd on loopback):
the subject says the item, the site, the event and the time left; the body the sentence, the
site's "what to do" line and the figures, every temperature with its unit, every duration in
hours and minutes, every clock time in the site's zone."""

from __future__ import annotations

import email
import email.policy
import re

import pytest
from thermeta.daemon.alerts.hooks.base import make_hook
from thermeta.daemon.alerts.hooks.email import EmailConfig
from thermeta.daemon.alerts.message import build_alert
from thermeta.daemon.alerts.rules import ItemAlertState, Raised, RuleParams
from thermeta.daemon.states import Event
from thermeta.daemon.timefmt import use_zone
from thermeta.predictors.result import rfc3339

NOW = 1_796_389_200.0  # 2026-12-04 13:00 UTC, 14:00 in Amsterdam
TODO = "check the unit's power; move the load if it is not back within 20 min"


class Inbox:
    def __init__(self):
        self.messages: list[email.message.EmailMessage] = []

    async def handle_DATA(self, server, session, envelope):
        raw = envelope.original_content
        self.messages.append(email.message_from_bytes(raw, policy=email.policy.default))
        return "250 OK"


@pytest.fixture
def smtp():
    from aiosmtpd.controller import Controller
    from conftest import free_port

    inbox, port = Inbox(), free_port()
    ctl = Controller(inbox, hostname="127.0.0.1", port=port)
    ctl.start()
    use_zone("Europe/Amsterdam")
    try:
        yield inbox, port
    finally:
        use_zone(None)
        ctl.stop()


def _alert(event: Event = Event.APPROACHING) -> dict:
    """A reefer's alert built as the service builds it, from a refit's forecast."""
    level = {
        "name": "limit",
        "kind": "limit",
        "side": "above",
        "threshold": 8.0,
        "state": "approaching",
        "eta_s": 2520.0,
        "eta_lo_s": 1830.36,
        "eta_hi_s": 3900.0,
        "lead_s": 2700.0,
    }
    fc = {
        "item": "reefer-07",
        "state": "approaching",
        "value_now": 6.4,
        "threshold": 8.0,
        "unit": "C",
        "levels": [level],
        "focus": "limit",
        "ambient": 27.0,
        "ambient_given": 27.0,
        "ambient_mode": "known",
        "time_constant_s": 35880.0,
        "last_reading_at": rfc3339(NOW),
    }
    st = ItemAlertState()
    p = RuleParams(threshold=8.0, lead_s=2700)
    return build_alert(
        "reefer-07", fc, Raised(event), st, p, NOW, site="north-yard", what_to_do=TODO
    )


def _config(port: int) -> EmailConfig:
    return EmailConfig.model_validate(
        {
            "host": "127.0.0.1",
            "port": port,
            "tls": "none",
            "from": "t@x.example",
            "to": "o@x.example",
        }
    )


def test_the_mail_reads_right(smtp):
    """Subject: 'reefer-07 (north-yard): may cross 8.0 °C in about 42 min'; the body starts with
    the sentence, then the what-to-do line; no bare number stands for a temperature (a unit
    follows each) and no duration in seconds ('ETA (s): 1830.36' is gone)."""
    inbox, port = smtp
    cfg = _config(port)
    alert = _alert()
    make_hook(0, cfg).deliver(alert)
    assert len(inbox.messages) == 1
    msg = inbox.messages[0]
    assert msg["Subject"] == "reefer-07 (north-yard): may cross 8.0 °C in about 42 min"
    body = msg.get_body(("plain",)).get_content()
    lines = body.splitlines()
    assert lines[0] == alert["sentence"]
    assert "at 14:42 CET, in 42 min (90 %: 14:31 to 15:05 CET, in 31 min to 1 h 05 min)" in body
    assert f"What to do: {TODO}" in body
    assert "value: 6.4 °C now" in body and "level: limit 8.0 °C (crossed once above it)" in body
    assert "site: north-yard" in body
    assert "fit: given ambient 27.0 °C, time constant 9 h 58 min" in body
    assert "alert time: 2026-12-04 14:00 CET" in body or "alert time: 14:00 CET" in body
    # every temperature-like number carries its unit; no seconds; no raw RFC 3339
    for m in re.finditer(r"(-?\d+\.\d+)(?!\d)", body):
        assert body[m.end() : m.end() + 3] in (" °C",), (m.group(0), body)
    assert " (s)" not in body and "Z\n" not in body
    assert "not a food-safety plan or a regulatory record" in body


def test_a_reminder_subject_says_so_and_good_news_has_no_todo(smtp):
    inbox, port = smtp
    cfg = _config(port)
    crossed = dict(_alert(Event.CROSSED), reminder=True)
    crossed["headline"] = None
    make_hook(0, cfg).deliver(crossed)
    msg = inbox.messages[0]
    assert msg["Subject"].startswith("Reminder: reefer-07 (north-yard): ")
    recovered = _alert(Event.RECOVERED)
    assert recovered["what_to_do"] is None
