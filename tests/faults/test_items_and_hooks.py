"""Faults 3-8 of the injection campaign: one item or hook reaching into another's business.

Each test runs the real thing: `thermeta run` against a real Mosquitto and SQLite, hooks as real
processes and real HTTP servers."""

from __future__ import annotations

import json
import time

import pytest
from sqlalchemy import create_engine, text
from thermeta.daemon.testing import (
    RunningDaemon,
    count_readings,
    dead_letter_reasons,
    publish,
    readings,
    wait_for,
    write_config,
)


def _latest_body(url: str, item: str) -> dict | None:
    eng = create_engine(url)
    try:
        with eng.connect() as conn:
            row = conn.execute(
                text(
                    "SELECT f.body FROM forecasts f JOIN items i ON i.id = f.item_id "
                    "WHERE i.name = :n ORDER BY f.id DESC LIMIT 1"
                ),
                {"n": item},
            ).scalar()
            return json.loads(row) if row else None
    finally:
        eng.dispose()


@pytest.mark.broker
@pytest.mark.parametrize("suffix", [".defrost", ".ambient"])
def test_fault03_a_crafted_topic_cannot_feed_another_items_companion_series(
    broker, tmp_path, suffix
):
    """A reading on `cellar/tank-1.defrost/core` would have been stored as the series that tank-1
    reads as its defrost signal (and `.ambient` as its air): names from topics may not end in a
    companion's suffix, so it is a dead letter and tank-1 sees no defrost and no ambient."""
    url = f"sqlite:///{tmp_path / 'store.db'}"
    items = (
        '[[item]]\nname = "{2}"\ntopic = "cellar/+/core"\nthreshold = 8.0\n'
        'defrost_topic = "cellar/+/defrost"\nambient_topic = "cellar/+/air"\n'
    )
    cfg = write_config(tmp_path, broker, db_url=url, items=items, refit_every=1)
    t0 = time.time() - 600
    with RunningDaemon(cfg) as d:
        publish(
            broker,
            [(f"cellar/tank-1{suffix}/core", json.dumps({"ts": t0 + 590, "value": 1}))]
            + readings("cellar/tank-1/core", t0, 30, step_s=20),
        )
        wait_for(lambda: count_readings(url, "tank-1") == 30, 10, d.log)
        body = wait_for(lambda: _latest_body(url, "tank-1"), 10, d.log)
    assert count_readings(url, f"tank-1{suffix}") == 0
    reasons = dead_letter_reasons(url)
    assert len(reasons) == 1 and suffix in reasons[0], reasons
    assert body.get("defrost") is None
    assert body.get("ambient_mode") != "measured", body.get("ambient_mode")


ALERT = {
    "id": "tank-1:1:crossed:1",
    "item": "tank-1",
    "event": "crossed",
    "level": "limit",
    "reminder": False,
    "value_now": 8.4,
    "threshold": 8.0,
    "unit": "C",
    "sentence": "tank-1 has risen above its limit of 8.0 °C: 8.4 °C now.",
}


def _exec_hook(**kw):
    from thermeta.daemon.alerts.hooks import KINDS
    from thermeta.daemon.alerts.hooks.base import make_hook

    return make_hook(0, KINDS["exec"].config(kind="exec", **kw))


def test_fault04_an_exec_hook_gets_a_minimal_environment(tmp_path, monkeypatch):
    """The daemon's secrets (the broker password, the webhook token) stay in the daemon: the
    program sees PATH, LANG (LC_ALL, TZ, HOME), the alert's THERMETA_* fields and the variables
    its `env` names."""
    import sys

    monkeypatch.setenv("THERMETA_MQTT_PASSWORD", "mqtt-s3cret")
    monkeypatch.setenv("HOOK_TOKEN", "tok-s3cret")
    monkeypatch.setenv("TICKET_QUEUE", "cold-room")
    monkeypatch.setenv("LANG", "C.UTF-8")
    out = tmp_path / "env.json"
    prog = "import json, os, sys; open(sys.argv[1], 'w').write(json.dumps(dict(os.environ)))"
    _exec_hook(command=(sys.executable, "-c", prog, str(out)), env=("TICKET_QUEUE",)).deliver(ALERT)
    env = json.loads(out.read_text())
    assert "mqtt-s3cret" not in env.values() and "tok-s3cret" not in env.values()
    assert env["TICKET_QUEUE"] == "cold-room" and env["LANG"] == "C.UTF-8" and env["PATH"]
    assert env["THERMETA_ITEM"] == "tank-1" and env["THERMETA_EVENT"] == "crossed"
    own = {"PATH", "LANG", "LC_ALL", "TZ", "HOME", "TICKET_QUEUE"}
    own |= {k for k in env if k.startswith("THERMETA_")}
    extra = set(env) - own - {"LC_CTYPE", "PWD", "SHLVL", "_"}  # what the C runtime may add
    assert extra == set(), extra


def _alive(pid: int) -> bool:
    try:
        state = open(f"/proc/{pid}/stat").read().rsplit(")", 1)[1].split()[0]
    except (FileNotFoundError, ProcessLookupError):
        return False
    return state != "Z"  # a zombie has ended; only its exit status waits to be collected


def test_fault05_an_exec_hooks_timeout_ends_its_whole_process_group(tmp_path):
    """A hook script that starts `sleep` and hangs: at the timeout the script and the sleep it
    started are ended (before, each attempt left an orphaned sleep behind)."""
    from thermeta.storage.errors import DeliveryError

    pids = tmp_path / "pids"
    script = f"sleep 60 & echo $! > {pids}; echo $$ >> {pids}; wait"
    hook = _exec_hook(command=("/bin/sh", "-c", script), timeout=0.5)
    t0 = time.monotonic()
    with pytest.raises(DeliveryError, match="timeout"):
        hook.deliver(ALERT)
    assert time.monotonic() - t0 < 5
    started = [int(p) for p in pids.read_text().split()]
    assert len(started) == 2
    wait_for(lambda: not any(_alive(p) for p in started), 5)
