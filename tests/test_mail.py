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


CLASS_CONFIG = """
[alerts]
what_to_do = "call the duty manager"
[alerts.what_to_do_for]
reefer = "check the unit's power; move the load if it is not back within 20 min"
"millrace-kitchen/walkin" = { approaching = "close the walk-in's door", crossed = "move the dairy" }
[[item]]
name = "reefer-07"
topic = "yard/reefer-07"
threshold = 8
prior_class = "reefer"
[[item]]
name = "reefer-08"
topic = "yard/reefer-08"
threshold = 8
prior_class = "reefer"
what_to_do = "reefer-08 has no spare unit: move its load at once"
[[item]]
name = "dairy-shelf"
topic = "kitchen/dairy-shelf"
threshold = 5
site = "millrace-kitchen/walkin"
[[item]]
name = "fryer-oil"
topic = "kitchen/fryer-oil"
threshold = 5
"""


def test_what_to_do_by_class_reaches_the_mail(smtp, tmp_path, capsys):
    """[alerts.what_to_do_for] gives a class of items (keyed by their prior_class or site) its
    own line: the mail of a reefer of class "reefer" carries the class's line, an item's own
    what_to_do wins over its class's, a class's table by event picks the event's line, and an
    item of no class gets [alerts]' line.  A class key naming no item is a config problem on
    its own line."""
    from thermeta.daemon.cli import main
    from thermeta.daemon.config import load_config

    inbox, port = smtp
    path = tmp_path / "site.toml"
    path.write_text(CLASS_CONFIG, encoding="utf-8")
    cfg = {it.name: it for it in load_config(path).items}
    hook = make_hook(0, _config(port))
    want = {
        "reefer-07": "check the unit's power; move the load if it is not back within 20 min",
        "reefer-08": "reefer-08 has no spare unit: move its load at once",
        "dairy-shelf": "close the walk-in's door",
        "fryer-oil": "call the duty manager",
    }
    for name, line in want.items():
        alert = dict(_alert())
        fresh = build_alert(
            name,
            {"value_now": 6.4, "levels": [], "last_reading_at": rfc3339(NOW)},
            Raised(Event.APPROACHING),
            ItemAlertState(),
            RuleParams(threshold=8.0, lead_s=2700),
            NOW,
            what_to_do=cfg[name].what_to_do,
        )
        alert.update(item=name, what_to_do=fresh["what_to_do"])
        hook.deliver(alert)
        body = inbox.messages[-1].get_body(("plain",)).get_content()
        assert f"What to do: {line}" in body, (name, body)
    crossed = build_alert(
        "dairy-shelf",
        {"value_now": 5.4, "levels": []},
        Raised(Event.CROSSED),
        ItemAlertState(),
        RuleParams(threshold=5.0, lead_s=2700),
        NOW,
        what_to_do=cfg["dairy-shelf"].what_to_do,
    )
    assert crossed["what_to_do"] == "move the dairy"
    # a class no item names (here every reefer's class misspelt) is told on the class's line
    path.write_text(CLASS_CONFIG.replace('"reefer"', '"reefr"'), encoding="utf-8")
    capsys.readouterr()
    assert main(["check-config", str(path)]) == 2
    err = capsys.readouterr().err
    assert f"{path}:5: alerts.what_to_do_for: 'reefer' is no item's prior_class or site" in err
