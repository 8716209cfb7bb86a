"""``thermeta ack``: silences the reminders of the open incident (and only that one), is recorded
with who and when, and says clearly when there is nothing to acknowledge."""

from __future__ import annotations

from types import SimpleNamespace

from test_alerts_rules import T0_EPOCH, THR, fc_at
from test_outbox import write_config
from thermeta.daemon.alerts.service import AlertService
from thermeta.daemon.clock import ManualClock
from thermeta.daemon.config import load_config
from thermeta.daemon.refit.rounds import ForecastUpdate
from thermeta.storage.alerts import AlertStore
from thermeta.storage.store import Store


def ack(capsys, cfg_path: str, *args: str) -> SimpleNamespace:
    """The command line's main() in-process, as the installed `thermeta` runs it."""
    from thermeta.daemon.cli import main

    code = main(["ack", *args, "--config", cfg_path])
    out = capsys.readouterr()
    return SimpleNamespace(returncode=code, stdout=out.out, stderr=out.err)


def test_ack_stops_reminders_for_the_incident_and_is_recorded(tmp_path, capsys):
    """Crossed with reminders every 10 min; after `thermeta ack trailer-4 --by ana` no more
    reminders; after recovery a new crossing alerts and reminds again."""
    path = write_config(tmp_path, "")
    cfg = load_config(path)
    item = cfg.items[0]
    store = Store(cfg.storage.url)
    store.create_all()
    clock = ManualClock(T0_EPOCH)
    svc = AlertService(cfg, store, clock, attach_png=False)
    svc.start()

    def at(t_s, value, state):
        clock.set(T0_EPOCH + t_s)
        svc.on_forecast(ForecastUpdate(item, state, fc_at(0, value=value, state=state), None))

    r = ack(capsys, path, "trailer-4")
    assert r.returncode == 2 and "no alerts recorded for item 'trailer-4'" in r.stderr
    at(0, THR - 2, "steady")
    r = ack(capsys, path, "trailer-4")
    assert r.returncode == 1 and "no open incident" in r.stderr
    at(60, THR + 1, "crossed")
    at(700, THR + 1, "crossed")  # a reminder (remind_every = 600 s)
    r = ack(capsys, path, "trailer-4", "--by", "ana", "--note", "door shut, compressor reset")
    assert r.returncode == 0, r.stderr
    assert "incident 1 (limit crossed) acknowledged by ana" in r.stdout
    for t in (1400, 2100, 2800):
        at(t, THR + 1, "crossed")
    events = [(e["body"]["event"], e["body"]["reminder"]) for e in AlertStore(store).events()]
    assert events == [("crossed", False), ("crossed", True)]
    rec = AlertStore(store).ack_of("trailer-4", 1)
    assert rec["by"] == "ana" and rec["note"] == "door shut, compressor reset"
    r = ack(capsys, path, "trailer-4")
    assert r.returncode == 0 and "already acknowledged by ana" in r.stdout
    at(3000, THR - 1, "steady")  # back inside by more than the 0.5 degC band
    at(4000, THR + 1, "crossed")
    at(4700, THR + 1, "crossed")
    events = [
        (e["body"]["event"], e["body"]["incident"], e["body"]["reminder"])
        for e in AlertStore(store).events()
    ]
    assert events[2:] == [("recovered", 1, False), ("crossed", 2, False), ("crossed", 2, True)]
    svc.stop()
    store.close()
