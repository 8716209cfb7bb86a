"""The outbox: alerts queue while a webhook is down, arrive exactly once when it returns (also
across a restart of the alert service on the same store), and a slow hook never holds up the
refit thread that raised the alert."""

from __future__ import annotations

import json
import sys
import time
import uuid

from conftest import free_port
from test_alerts_rules import T0_EPOCH, THR, fc_at
from test_hooks import Receiver
from thermeta.daemon.alerts.outbox import backoff_s
from thermeta.daemon.alerts.service import AlertService
from thermeta.daemon.clock import ManualClock
from thermeta.daemon.config import load_config
from thermeta.daemon.refit.rounds import ForecastUpdate
from thermeta.daemon.states import ItemState
from thermeta.storage.alerts import AlertStore
from thermeta.storage.store import Store


def write_config(tmp_path, hooks: str, url: str | None = None, item: str = "trailer-4") -> str:
    path = tmp_path / "thermeta.toml"
    path.write_text(f"""
[storage]
url = "{url or f"sqlite:///{tmp_path / 'store.db'}"}"

[[item]]
name = "{item}"
topic = "fleet/trailer-4/load"
threshold = -15.0
ambient = 12.0
lead = 3600
remind_every = 600

{hooks}
""")
    return str(path)


def wait_for(cond, timeout: float = 10.0) -> bool:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if cond():
            return True
        time.sleep(0.02)
    return cond()


def feed(svc: AlertService, clock: ManualClock, cfg, steps) -> None:
    for t_s, fc in steps:
        clock.set(T0_EPOCH + t_s)
        body = dict(fc, item=cfg.name)
        svc.on_forecast(ForecastUpdate(cfg, ItemState(body["state"]), body, None))


def test_backoff_doubles_and_caps():
    """5 s, 10 s, 20 s ... capped at 300 s."""
    assert [backoff_s(n, 5, 300) for n in (0, 1, 2, 3, 7, 20)] == [0, 5, 10, 20, 300, 300]


def test_down_webhook_queues_then_each_alert_arrives_once_across_a_restart(tmp_path):
    """With nothing listening, three alerts stay pending (tried, not lost); the service restarts;
    the receiver comes up on that port; each alert arrives exactly once, in order, and a further
    restart sends nothing again."""
    queue_then_deliver_once(tmp_path)


def test_outbox_on_postgresql(tmp_path, pg_url):
    """The same on PostgreSQL (its own item and hook names, so earlier runs do not mix in)."""
    tag = uuid.uuid4().hex[:8]
    queue_then_deliver_once(tmp_path, url=pg_url, item=f"trailer-{tag}", hook=f"hook-{tag}")


def queue_then_deliver_once(
    tmp_path, url: str | None = None, item: str = "trailer-4", hook: str = "webhook-1"
) -> None:
    port = free_port()
    path = write_config(
        tmp_path,
        f'[[hook]]\nkind = "webhook"\nname = "{hook}"\n'
        f'url = "http://127.0.0.1:{port}/a"\ntimeout = 2\n',
        url,
        item,
    )
    cfg = load_config(path)
    item_cfg = cfg.items[0]
    store = Store(cfg.storage.url)
    store.create_all()
    clock = ManualClock(T0_EPOCH)
    opts = {"base_s": 0.05, "max_s": 0.2, "poll_s": 0.05, "attach_png": False}
    svc = AlertService(cfg, store, clock, **opts)
    svc.start()
    feed(
        svc,
        clock,
        item_cfg,
        [(3000, fc_at(3000))]
        + [
            (3600, fc_at(3600, value=THR + 1, state="crossed")),
            (4300, fc_at(4300, value=THR + 1, state="crossed")),
        ],
    )
    astore = AlertStore(store)
    assert [e["level"] for e in astore.events(item)] == ["approaching", "crossed", "crossed"]
    mine = lambda: [r for r in astore.outbox_rows() if r["hook"] == hook]
    assert wait_for(lambda: mine()[0]["attempts"] >= 2)
    assert [r["status"] for r in mine()] == ["pending"] * 3
    from thermeta.daemon.views.dashboard import collect

    waiting = collect(store, clock.now()).alerts_waiting  # the dashboard's header shows them
    assert waiting == 3 if url is None else waiting >= 3
    svc.stop()
    store.close()

    receiver = Receiver(port)
    try:
        store = Store(cfg.storage.url)
        svc = AlertService(cfg, store, clock, **opts)
        svc.start()
        assert wait_for(lambda: len(receiver.posts) >= 3)
        time.sleep(0.3)
        svc.stop()
        ids = [json.loads(b)["id"] for _, _, b in receiver.posts]
        assert ids == [e["key"] for e in AlertStore(store).events(item)]
        astore = AlertStore(store)
        assert [r["status"] for r in mine()] == ["delivered"] * 3
        svc = AlertService(cfg, store, clock, **opts)
        svc.start()
        time.sleep(0.3)
        svc.stop()
        assert len(receiver.posts) == 3
        store.close()
    finally:
        receiver.close()


def test_a_slow_hook_never_delays_the_refit_thread(tmp_path):
    """An exec hook that takes 3 s: on_forecast (what the refit thread calls) returns at once,
    and the alert is still delivered by the hook's own worker."""
    out = tmp_path / "done"
    # Written aside and renamed, so the test never reads a file the program is still writing.
    prog = (
        f"import os, sys, time; time.sleep(3); data = sys.stdin.read(); "
        f"open({str(out) + '.part'!r}, 'w').write(data); "
        f"os.replace({str(out) + '.part'!r}, {str(out)!r})"
    )
    cmd = json.dumps([sys.executable, "-c", prog])
    path = write_config(tmp_path, f'[[hook]]\nkind = "exec"\ncommand = {cmd}\ntimeout = 20\n')
    cfg = load_config(path)
    store = Store(cfg.storage.url)
    store.create_all()
    clock = ManualClock(T0_EPOCH)
    svc = AlertService(cfg, store, clock, poll_s=0.05, attach_png=False)
    svc.start()
    try:
        t0 = time.monotonic()
        feed(
            svc,
            clock,
            cfg.items[0],
            [
                (-60, fc_at(0, value=THR - 2, state="steady")),
                (0, fc_at(0, value=THR + 1, state="crossed")),
            ],
        )
        took = time.monotonic() - t0
        assert took < 0.5
        assert wait_for(out.exists, 15)
        assert json.loads(out.read_text())["event"] == "crossed"
    finally:
        svc.stop()
        store.close()
