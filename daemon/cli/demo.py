"""``thermeta demo``: the whole product on simulated sites, in one command.

Uses the MQTT broker at --host/--port when one answers there, else starts one inside this process
(amqtt, loopback, a free port).  Then a temporary SQLite store, the service (ingest, refits,
forecasts, alerts) and the simulator, all on ONE scaled clock so that at ``--speed N`` readings,
refits and countdowns run N times faster together.  Shows the dashboard, or with ``--headless``
prints forecast and alert lines and exits 0 after ``--duration`` seconds.  Ctrl-C stops it all.
"""

from __future__ import annotations

import argparse
import json
import logging
import shutil
import signal
import sys
import tempfile
import threading
import time
from pathlib import Path

DEMO_PREFIX = "thermeta-demo"


def add_arguments(p: argparse.ArgumentParser) -> None:
    from thermeta.daemon.simulation import NAMES

    p.add_argument(
        "--scenario",
        choices=NAMES,
        default="all",
        help="which invented site to play (default: all six)",
    )
    p.add_argument(
        "--speed",
        type=float,
        default=60.0,
        help="simulated seconds per real second (default 60: an hour a minute)",
    )
    p.add_argument(
        "--headless",
        action="store_true",
        help="print forecast and alert lines instead of the dashboard",
    )
    p.add_argument(
        "--duration",
        type=float,
        metavar="S",
        help="stop after S real seconds (default: run until Ctrl-C)",
    )
    p.add_argument(
        "--host",
        default="127.0.0.1",
        help="broker to use if it accepts an anonymous client (default 127.0.0.1)",
    )
    p.add_argument("--port", type=int, default=1883, help="its port (default 1883)")
    p.add_argument(
        "--embedded",
        action="store_true",
        help="always start the in-process broker, even if one accepts at host:port",
    )
    p.add_argument("--seed", type=int, default=0, help="noise seed (default 0)")
    p.add_argument(
        "--keep",
        metavar="DIR",
        help="keep the store, config and log in DIR (default: a temporary folder, removed)",
    )
    p.add_argument(
        "--summary-json",
        metavar="FILE",
        help="write forecasts against the simulated truth as JSON at the end",
    )


class _HeldClock:
    """A scaled clock that stands at ``start_epoch_s`` until :meth:`release`, so the set-up time
    (broker, store, connections) is not played as simulated hours."""

    def __init__(self, start_epoch_s: float, rate: float):
        self.rate = float(rate)
        self._start = float(start_epoch_s)
        self._m0: float | None = None

    def release(self) -> None:
        self._m0 = time.monotonic()

    def now(self) -> float:
        # now = start + (monotonic elapsed since release) * rate
        m0 = self._m0
        return self._start if m0 is None else self._start + (time.monotonic() - m0) * self.rate


def run(args: argparse.Namespace) -> int:
    if not 0 < args.speed <= 100_000:
        print(f"thermeta demo: --speed must be in (0, 100000], got {args.speed:g}", file=sys.stderr)
        return 2
    if args.duration is not None and not args.duration > 0:
        print(f"thermeta demo: --duration must be positive, got {args.duration:g}", file=sys.stderr)
        return 2
    if not 0 < args.port < 65536:
        print(f"thermeta demo: --port must be 1-65535, got {args.port}", file=sys.stderr)
        return 2
    if args.keep and (Path(args.keep) / "demo.db").exists():
        print(
            f"thermeta demo: --keep {args.keep}: holds an earlier run's demo.db; choose a new "
            "folder",
            file=sys.stderr,
        )
        return 2
    workdir = Path(args.keep) if args.keep else Path(tempfile.mkdtemp(prefix="thermeta-demo-"))
    try:
        workdir.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        print(f"thermeta demo: --keep {args.keep}: {exc.strerror or exc}", file=sys.stderr)
        return 2
    try:
        return _run(args, workdir)
    finally:
        if not args.keep:
            shutil.rmtree(workdir, ignore_errors=True)


def _run(args: argparse.Namespace, workdir: Path) -> int:
    from thermeta.daemon.config import load_config
    from thermeta.daemon.service import Service
    from thermeta.daemon.simulation.broker import EmbeddedBroker, broker_accepts
    from thermeta.daemon.simulation.recorder import Recorder, alert_subscriber, print_summary
    from thermeta.daemon.simulation.scenarios import build
    from thermeta.daemon.simulation.simulator import Simulator, config_text, truth_lines

    log_path = workdir / "thermeta-demo.log"
    handler = logging.FileHandler(log_path, encoding="utf-8")
    handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s"))
    root = logging.getLogger()
    root.addHandler(handler)
    root.setLevel(logging.INFO)
    logging.getLogger("apscheduler").setLevel(logging.WARNING)
    # numerical warnings of hard fits go to the log, not over the dashboard
    logging.captureWarnings(True)
    out = sys.stdout
    broker = None
    config = None
    service = None
    sim = None
    alerts_client = None
    stop = threading.Event()
    old_term = signal.signal(signal.SIGTERM, lambda signum, frame: stop.set())
    try:
        host, port = args.host, args.port
        if args.embedded or not broker_accepts(host, port):
            broker = EmbeddedBroker().start()
            host, port = broker.host, broker.port
            where = f"an embedded broker on {host}:{port}"
        else:
            where = f"the broker at {host}:{port}"
        start = time.time()
        clock = _HeldClock(start, args.speed)
        scenario = build(args.scenario, seed=args.seed, t_start=start)
        # at most one refit round per real second: a round of all sites takes a few tenths of a
        # second on a small machine, and the machine is shared
        refit_every_s = max(30.0, args.speed * 1.0)
        cfg_path = workdir / "demo.toml"
        text = config_text(
            scenario,
            host=host,
            port=port,
            storage_url=f"sqlite:///{workdir / 'demo.db'}",
            refit_every_s=refit_every_s,
            client_id=f"{DEMO_PREFIX}-{int(start)}",
        )
        text = text.replace(
            'topic_prefix = "thermeta/alert"', f'topic_prefix = "{DEMO_PREFIX}/alert"'
        )
        if broker is not None:
            # amqtt speaks MQTT 3.1.1 only, and does not answer an MQTT 5 CONNECT at all
            text = text.replace("[broker]\n", '[broker]\nprotocol = "3.1.1"\n', 1)
        else:
            # someone else's broker: leave no week-long session behind
            text = text.replace("[broker]\n", "[broker]\nsession_expiry = 60\n", 1)
        text += (
            f'\n[publish]\ntopic_prefix = "{DEMO_PREFIX}/forecast"\n'
            f'status_topic = "{DEMO_PREFIX}/status"\n'
        )
        cfg_path.write_text(text, encoding="utf-8")
        config = load_config(cfg_path)
        print(
            f"thermeta demo: {scenario.title}, {len(scenario.loads)} items, at {args.speed:g}x, "
            f"using {where}; "
            + (
                f"store, config and log in {workdir}"
                if args.keep
                else "a temporary store, config and log, removed at the end (--keep DIR keeps them)"
            ),
            file=out,
            flush=True,
        )
        print(
            "Forecasts support decisions; they are not a food-safety plan or a regulatory "
            "record. Simulated, invented sites.",
            file=out,
            flush=True,
        )
        lines = args.headless or not _have_dashboard()
        if lines:
            for line in truth_lines(scenario):
                print(line, file=out, flush=True)
        recorder = Recorder(scenario, clock, out, echo=lines)
        service = Service(config, clock=clock)
        service.add_forecast_listener(recorder.on_forecast)
        service.start()
        alerts_client = alert_subscriber(
            host,
            port,
            f"{DEMO_PREFIX}/alert",
            recorder,
            client_id=f"{DEMO_PREFIX}-alerts-{id(recorder)}",
        )
        deadline = time.monotonic() + 10.0
        while not (service.stats["connected"] or time.monotonic() > deadline):
            time.sleep(0.05)
        if not service.stats["connected"]:
            print(
                f"thermeta demo: the service could not connect to {host}:{port} (see {log_path})",
                file=sys.stderr,
            )
            return 1
        sim = Simulator(scenario, host, port, clock, client_id=f"{DEMO_PREFIX}-sim-{int(start)}")
        clock.release()  # simulated time starts now, when everything is connected
        sim.start()
        end_at = None if args.duration is None else time.monotonic() + args.duration
        if lines:
            if not args.headless:
                print(
                    "thermeta demo: the dashboard is not in this build; showing lines instead "
                    "(Ctrl-C stops)",
                    file=out,
                    flush=True,
                )
            _wait(stop, end_at, sim)
        else:
            _dashboard(service, stop, end_at, sim, out)
        if sim.stats.error:
            print(f"thermeta demo: simulator: {sim.stats.error}", file=sys.stderr)
            return 1
        recorder.echo = False  # the closing summary is the last thing printed
        summary = recorder.summary()
        if lines:
            print_summary(summary, out)
        if args.summary_json:
            Path(args.summary_json).write_text(json.dumps(summary, indent=1), encoding="utf-8")
        return 0
    except KeyboardInterrupt:
        return 0
    finally:
        signal.signal(signal.SIGTERM, old_term)
        if sim is not None:
            sim.stop()
        if service is not None:
            service.stop()
        if alerts_client is not None:
            if broker is None and config is not None:
                _clear_retained(alerts_client, config)
            alerts_client.disconnect()
            alerts_client.loop_stop()
        if broker is not None:
            broker.stop()
        # a refit round still ending after stop() logs its alerts to the log file, not (once the
        # file's handler is gone) to the terminal below the closing summary
        deadline = time.monotonic() + 20.0
        while service is not None and service.busy() and time.monotonic() < deadline:
            time.sleep(0.1)
        logging.captureWarnings(False)
        root.removeHandler(handler)
        handler.close()


def _clear_retained(client, config) -> None:
    """Remove the demo's retained forecasts and status from a broker that is not ours."""
    infos = [
        client.publish(f"{config.publish.topic_prefix}/{it.name}", b"", qos=1, retain=True)
        for it in config.items
    ]
    from thermeta.daemon.service import status_topic_of

    infos.append(client.publish(status_topic_of(config), b"", qos=1, retain=True))
    for info in infos:
        info.wait_for_publish(2.0)


def _wait(stop: threading.Event, end_at: float | None, sim) -> None:
    while not stop.is_set():
        if end_at is not None and time.monotonic() >= end_at:
            return
        stop.wait(0.2)


def _have_dashboard() -> bool:
    import importlib.util

    return importlib.util.find_spec("thermeta.daemon.views.dashboard") is not None


def _dashboard(service, stop: threading.Event, end_at: float | None, sim, out) -> None:
    import inspect

    from thermeta.daemon.views.dashboard import run_foreground

    takes_stop = "stop" in inspect.signature(run_foreground).parameters
    running = threading.Event()
    running.set()

    def ender() -> None:
        # the dashboard blocks until the user quits; this ends it for --duration or SIGTERM
        while running.is_set() and not stop.is_set():
            if end_at is not None and time.monotonic() >= end_at:
                break
            stop.wait(0.2)
        if running.is_set():
            stop.set()
            if not takes_stop:
                import _thread

                _thread.interrupt_main()

    threading.Thread(target=ender, name="demo-timer", daemon=True).start()
    try:
        if takes_stop:
            run_foreground(service, stop)
        else:
            run_foreground(service)
    except KeyboardInterrupt:
        pass
    finally:
        running.clear()
    stop.set()
