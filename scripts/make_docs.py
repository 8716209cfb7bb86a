"""Make the pictures the README shows, from the real program.

    python scripts/make_docs.py [--seconds 40] [--speed 60] [--width 120] [--height 34]

1. docs/dashboard.txt: `thermeta demo` (embedded broker) runs in a real terminal inside a detached
   tmux session of the given size; after --seconds the pane is captured (tmux capture-pane) and
   the demo is stopped with Ctrl-C.
2. docs/forecast-reefer.png: the reefer scenario's top pallet probe 40 simulated minutes after its
   power failed, forecast with the measured return air, drawn with the simulated truth beside it.

Needs tmux (apt-get install tmux).  Prints what it wrote.
"""

from __future__ import annotations

import argparse
import shlex
import shutil
import subprocess
import sys
import time
import uuid
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
DOCS = ROOT / "docs"


def capture_dashboard(seconds: float, speed: float, width: int, height: int) -> Path:
    if shutil.which("tmux") is None:
        raise SystemExit("make_docs: tmux is not installed (apt-get install tmux)")
    session = f"thermeta-docs-{uuid.uuid4().hex[:8]}"
    cmd = f"{shlex.quote(sys.executable)} -m thermeta.daemon.cli demo --embedded --speed {speed:g}"
    subprocess.run(
        ["tmux", "new-session", "-d", "-s", session, "-x", str(width), "-y", str(height), cmd],
        check=True,
    )
    try:
        time.sleep(seconds)
        text = subprocess.run(
            ["tmux", "capture-pane", "-p", "-t", session],
            check=True,
            capture_output=True,
            text=True,
        ).stdout
        subprocess.run(["tmux", "send-keys", "-t", session, "C-c"], check=False)
        for _ in range(50):  # let the demo stop cleanly before the session goes
            if (
                subprocess.run(
                    ["tmux", "has-session", "-t", session], capture_output=True
                ).returncode
                != 0
            ):
                break
            time.sleep(0.2)
    finally:
        subprocess.run(["tmux", "kill-session", "-t", session], capture_output=True)
    out = DOCS / "dashboard.txt"
    lines = [ln.rstrip() for ln in text.splitlines()]
    while lines and not lines[-1]:
        lines.pop()
    out.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return out


def reefer_plot() -> Path:
    import numpy as np
    from thermeta.daemon.simulation import scenarios as S
    from thermeta.daemon.views.plotting import _Series, plot_forecast
    from thermeta.predictors import forecast

    sc = S.build("reefer-power-loss", seed=0)
    load = sc.probe("eastpier/reefer-12/load-top")
    air = sc.probe("eastpier/reefer-12/air")
    cut = sc.events[0][0] + 40 * 60
    sel, asel = load.t <= cut, air.t <= cut
    series = _Series(load.t[sel], load.y[sel], air.t[asel], air.y[asel])
    fc = forecast(
        series.t,
        series.y,
        load.spec.threshold,
        ambient_t=series.ambient_t,
        ambient_y=series.ambient_y,
        window_s=7200,
    )
    tt = np.linspace(sc.t_start, sc.t_start + 4 * 3600, 400)
    out = DOCS / "forecast-reefer.png"
    plot_forecast(
        series,
        fc,
        out,
        title="eastpier/reefer-12/load-top (simulated: power lost at the 10th minute)",
        truth=(tt, load.spec.curve(tt - sc.t_start)),
    )
    return out


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=40.0, help="real seconds before the capture")
    ap.add_argument("--speed", type=float, default=60.0, help="demo speed")
    ap.add_argument("--width", type=int, default=120)
    ap.add_argument("--height", type=int, default=34)
    ap.add_argument("--no-dashboard", action="store_true", help="only the plot")
    args = ap.parse_args()
    DOCS.mkdir(exist_ok=True)
    print(f"wrote {reefer_plot().relative_to(ROOT)}")
    if not args.no_dashboard:
        path = capture_dashboard(args.seconds, args.speed, args.width, args.height)
        print(f"wrote {path.relative_to(ROOT)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
