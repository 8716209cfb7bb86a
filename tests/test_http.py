"""The service's own figures ([http], daemon/metrics.py): `thermeta run` against a real Mosquitto,
scraped over HTTP as a monitoring system scrapes it: OpenMetrics (parsed with prometheus_client's
own OpenMetrics parser) with the readings stored, the refit rounds and the item's forecast, and
/healthz, which turns 503 when the broker goes away."""

from __future__ import annotations

import json
import time
import urllib.error
import urllib.request

import pytest
from prometheus_client.openmetrics.parser import text_string_to_metric_families
from test_daemon_broker import Daemon, Publisher, reading_messages, wait_for, write_config
from thermeta.daemon.testing import free_port

pytestmark = pytest.mark.broker

OPENMETRICS = "application/openmetrics-text; version=1.0.0; charset=utf-8"


def scrape(port: int) -> dict[str, dict[tuple, float]]:
    """{sample name: {labels: value}} of one OpenMetrics scrape."""
    req = urllib.request.Request(
        f"http://127.0.0.1:{port}/metrics", headers={"Accept": OPENMETRICS}
    )
    with urllib.request.urlopen(req, timeout=5) as r:
        assert r.headers["Content-Type"].startswith("application/openmetrics-text")
        text = r.read().decode()
    out: dict[str, dict[tuple, float]] = {}
    for fam in text_string_to_metric_families(text):
        for s in fam.samples:
            out.setdefault(s.name, {})[tuple(sorted(s.labels.items()))] = s.value
    return out


def ready(port: int) -> dict[str, dict[tuple, float]]:
    """A scrape, or nothing while the server is not listening yet (it starts after the broker
    connection the test waits for)."""
    try:
        return scrape(port)
    except urllib.error.URLError:
        return {}


def healthz(port: int) -> tuple[int, dict]:
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/healthz", timeout=5) as r:
            return r.status, json.loads(r.read())
    except urllib.error.HTTPError as exc:
        return exc.code, json.loads(exc.read())


def test_the_running_service_is_scraped_over_http(broker, tmp_path):
    """Readings published to the broker are counted, the refit rounds and their durations are
    there, the warming item has its time to crossing and exactly one state set; /healthz says
    ok while the broker is up and 503 with "broker: not connected" once it is gone."""
    port = free_port()
    items = (
        f'[http]\nlisten = "127.0.0.1:{port}"\n\n'
        '[[item]]\nname = "w"\ntopic = "site/w"\nthreshold = 8.0\nambient = 25.0\n'
    )
    cfg = write_config(tmp_path, broker, items=items, refit_every=1.0)
    daemon = Daemon(cfg, tmp_path / "daemon.log")
    daemon.start()
    pub = Publisher(broker)
    try:
        t0 = time.time() - 600.0
        msgs = [(t, json.dumps({"ts": t0 + 10 * i, "value": 3.0 + 0.02 * i})) for i, (t, _) in
                enumerate(reading_messages("site/w", 0, 60))]  # fmt: skip
        pub.send(msgs)
        got = wait_for(
            lambda: (
                (m := ready(port)).get("thermeta_readings_total", {}).get(()) == 60
                and m.get("thermeta_item_eta_seconds")
                and m
            ),
            30,
            tmp_path / "daemon.log",
        )
        assert got["thermeta_broker_connected"][()] == 1
        assert got["thermeta_dead_letters_total"][()] == 0
        assert got["thermeta_refit_rounds_total"][()] >= 1
        assert got["thermeta_refit_round_seconds_count"][()] >= 1
        assert got["thermeta_refit_round_seconds_sum"][()] > 0
        eta = got["thermeta_item_eta_seconds"][(("item", "w"),)]
        assert 0 < eta < 86400  # warming at about 7 degC an hour toward 25: under an hour to 8
        states = {
            labels: v for labels, v in got["thermeta_item_state"].items() if ("item", "w") in labels
        }
        assert sum(states.values()) == 1 and len(states) >= 5
        made = got["thermeta_refit_forecasts_total"]
        assert made[(("way", "batch"),)] + made[(("way", "item"),)] >= 1
        assert healthz(port) == (200, {"ok": True, "problems": []})
        broker.stop()
        code, body = wait_for(lambda: (h := healthz(port))[0] == 503 and h, 20)
        assert "broker: not connected" in body["problems"] and body["ok"] is False
        assert scrape(port)["thermeta_broker_connected"][()] == 0
    finally:
        pub.close()
        daemon.stop()


def test_a_bad_listen_address_is_named_with_its_line(tmp_path):
    """[http] listen must be host:port; anything else is one line naming the key and the line."""
    from thermeta.daemon.config import load_config
    from thermeta.storage.errors import ConfigError

    p = tmp_path / "c.toml"
    p.write_text('[http]\nlisten = "9108"\n')
    with pytest.raises(ConfigError) as exc:
        load_config(p)
    assert any("c.toml:2: http.listen: must be" in line for line in exc.value.problems)


def test_health_says_when_rounds_overrun_or_stop():
    """/healthz's judgement (daemon/metrics.health) on a service's state: well; a round longer
    than refit_every; no round finished for more than two refit_every after the last one; the
    broker gone.  (A stand-in service: the logic only; the real one is scraped above.)"""
    import threading
    from types import SimpleNamespace

    from thermeta.daemon.metrics import health

    up = threading.Event()
    up.set()
    rf = SimpleNamespace(runs=3, last_run_s=2.0, finished_at=1000.0)
    svc = SimpleNamespace(
        link=SimpleNamespace(connected=up),
        refitter=rf,
        config=SimpleNamespace(fit=SimpleNamespace(refit_every_s=30.0)),
        clock=SimpleNamespace(rate=1.0),
        started_mono=900.0,
    )
    assert health(svc, now=1010.0) == []
    rf.last_run_s = 45.0
    assert health(svc, now=1010.0) == [
        "refit: the newest round took 45.0 s, longer than refit_every (30 s)"
    ]
    rf.last_run_s = 2.0
    assert health(svc, now=1000.0 + 3 * 30.0 + 1.0) == []
    assert health(svc, now=1000.0 + 3 * 30.0 + 3.0) == ["refit: no round finished for 93 s"]
    up.clear()
    assert health(svc, now=1010.0) == ["broker: not connected"]


def test_a_taken_port_is_logged_and_the_service_goes_on(broker, tmp_path):
    """[http] listen on a port another program holds: one error line naming the address, and
    `thermeta run` goes on storing readings without its figures."""
    import socket

    from test_daemon_broker import count_readings

    with socket.socket() as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen(1)
        port = taken.getsockname()[1]
        items = (
            f'[http]\nlisten = "127.0.0.1:{port}"\n\n'
            '[[item]]\nname = "w"\ntopic = "site/w"\nthreshold = 8.0\nambient = 25.0\n'
        )
        cfg = write_config(tmp_path, broker, items=items)
        log = tmp_path / "daemon.log"
        daemon = Daemon(cfg, log)
        daemon.start()
        pub = Publisher(broker)
        try:
            pub.send(reading_messages("site/w", time.time() - 100, 5))
            db = f"sqlite:///{tmp_path / 'store.db'}"
            wait_for(lambda: count_readings(db, "w") == 5, 20, log)
            wait_for(lambda: "cannot serve the figures" in log.read_text(), 10, log)
            line = next(ln for ln in log.read_text().splitlines() if "cannot serve" in ln)
            assert f"[http] listen 127.0.0.1:{port}: cannot serve the figures" in line
        finally:
            pub.close()
            assert daemon.stop() == 0
