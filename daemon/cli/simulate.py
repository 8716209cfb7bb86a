"""``thermeta simulate --scenario NAME``: publish an invented site's readings over MQTT.

Also writes (``--config-out``) or prints (``--print-config``) a thermeta config that watches the
scenario's items, so ``thermeta run`` can be pointed at it.
"""

from __future__ import annotations

import argparse
import signal
import sys
import threading
import time


def add_arguments(p: argparse.ArgumentParser) -> None:
    from thermeta.daemon.simulation import NAMES

    p.add_argument(
        "--scenario",
        choices=NAMES,
        default="all",
        help="which invented site to play (default: all six on one timeline)",
    )
    p.add_argument("--host", default="127.0.0.1", help="MQTT broker host (default 127.0.0.1)")
    p.add_argument("--port", type=int, default=1883, help="MQTT broker port (default 1883)")
    p.add_argument(
        "--speed",
        type=float,
        default=1.0,
        help="simulated seconds per real second (default 1: real time)",
    )
    p.add_argument("--seed", type=int, default=0, help="noise seed (default 0)")
    p.add_argument(
        "--duration",
        type=float,
        metavar="S",
        help="stop after S real seconds (default: when the scenario ends)",
    )
    p.add_argument("--config-out", metavar="FILE", help="write a matching thermeta config here")
    p.add_argument(
        "--storage-url",
        default="sqlite:///thermeta-sim.db",
        help="store URL written into the config (default sqlite:///thermeta-sim.db)",
    )
    p.add_argument(
        "--print-config",
        action="store_true",
        help="print the matching config and the truth, then exit without publishing",
    )
    p.add_argument("--quiet", action="store_true", help="no progress lines")


def run(args: argparse.Namespace) -> int:
    from thermeta.daemon.clock import ScaledClock
    from thermeta.daemon.simulation.scenarios import build
    from thermeta.daemon.simulation.simulator import Simulator, config_text, truth_lines
    from thermeta.daemon.timefmt import duration

    if not args.speed > 0 or args.speed > 100_000:
        print(
            f"thermeta simulate: --speed must be in (0, 100000], got {args.speed:g}",
            file=sys.stderr,
        )
        return 2
    if not 0 < args.port < 65536:
        print(f"thermeta simulate: --port must be 1-65535, got {args.port}", file=sys.stderr)
        return 2
    if args.duration is not None and not args.duration > 0:
        print(
            f"thermeta simulate: --duration must be positive, got {args.duration:g}",
            file=sys.stderr,
        )
        return 2
    start = time.time()
    scenario = build(args.scenario, seed=args.seed, t_start=start)
    cfg = config_text(scenario, host=args.host, port=args.port, storage_url=args.storage_url)
    if args.print_config:
        print(cfg)
        print("\n".join("# " + line for line in truth_lines(scenario)))
        return 0
    if args.config_out:
        try:
            with open(args.config_out, "w", encoding="utf-8") as f:
                f.write(cfg)
        except OSError as exc:
            print(
                f"thermeta simulate: {args.config_out}: cannot write: {exc.strerror or exc}",
                file=sys.stderr,
            )
            return 2
        print(f"config for these items written to {args.config_out}")
    for line in truth_lines(scenario):
        print(line)
    if args.speed != 1:
        print(
            f"note: at --speed {args.speed:g} readings carry simulated times running ahead of the "
            "wall clock; a daemon on the wall clock sets them aside as future-dated. "
            "`thermeta demo --speed N` runs both on one clock."
        )
    clock = ScaledClock(start, args.speed)
    sim = Simulator(scenario, args.host, args.port, clock)
    stop_all = threading.Event()

    def on_signal(signum, frame):
        stop_all.set()

    old = signal.signal(signal.SIGTERM, on_signal)
    sim.start()
    deadline = None if args.duration is None else time.monotonic() + args.duration
    last_print = 0.0
    try:
        while not sim.wait(0.2):
            if stop_all.is_set() or (deadline is not None and time.monotonic() >= deadline):
                break
            if not args.quiet and time.monotonic() - last_print >= 5.0:
                last_print = time.monotonic()
                st = sim.stats
                print(
                    f"published {st.published}/{st.total} payloads ({st.readings} readings), "
                    f"simulated +{duration(clock.now() - start)}",
                    flush=True,
                )
    except KeyboardInterrupt:
        pass
    finally:
        sim.stop()
        signal.signal(signal.SIGTERM, old)
    st = sim.stats
    if st.error:
        print(f"thermeta simulate: {st.error}", file=sys.stderr)
        return 1
    print(f"done: published {st.published}/{st.total} payloads ({st.readings} readings)")
    return 0
