"""``thermeta forecast FILE.csv --threshold X``: the offline forecast (a fixed contract)."""

from __future__ import annotations

import argparse
import json
import sys
from typing import get_args

from thermeta.daemon.states import MODELS, SideSetting, predictor_side
from thermeta.daemon.units import UNIT_SIGN, UNITS
from thermeta.storage.errors import InputError

CAUTION = (
    "Forecasts support decisions; they are not a food-safety plan or a regulatory record. "
    "Local codes and licensed practice decide the limits and actions."
)


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("csv", metavar="FILE.csv", help="readings: header with time,value[,ambient]")
    p.add_argument("--threshold", type=float, required=True, help="the limit to forecast")
    p.add_argument("--ambient", type=float, help="known constant ambient (known mode)")
    p.add_argument(
        "--ambient-within",
        type=float,
        metavar="W",
        help="the known ambient is right to within +-W: a hard bound on the fitted ambient "
        "(sd W / sqrt 3; default a 2.5 degC sd, no bound), in the unit of the values",
    )
    p.add_argument(
        "--model",
        choices=MODELS,
        default="lumped",
        help="lumped (Newton) or a centre probe in a slab, long cylinder or sphere",
    )
    p.add_argument("--unit", choices=UNITS, default="C", help="unit of the values")
    p.add_argument(
        "--side",
        choices=get_args(SideSetting),
        default="auto",
        help="the side of the threshold that counts (past a limit, at a target); auto: the side "
        "the first reading is not on",
    )
    p.add_argument("--json", action="store_true", help="one JSON object on stdout")
    p.add_argument("--plot", metavar="OUT.png", help="also draw readings and forecast to a PNG")


def summary(fc, unit: str, source: str) -> str:
    """The forecast in words; ``fc`` is in degC, shown in ``unit``."""
    from thermeta.daemon.timefmt import clock, duration, span
    from thermeta.daemon.units import to_item_units

    u = UNIT_SIGN[unit]
    d = to_item_units(fc.to_dict(), unit)
    now = None  # clock times carry their date unless they fall on today
    lines = [f"{source}: {d['n_points']} readings, {d['model']} model, ambient {d['ambient_mode']}"]
    if d["value_now"] is not None:
        lines.append(f"  now {d['value_now']:.1f} {u} (last reading {clock(fc.t_last, now)})")
    if not fc.ok:
        lines.append(f"  no forecast: {fc.reason}")
    else:
        if d["ambient"] is not None:
            band = ""
            if d["ambient_lo"] is not None and d["ambient_hi"] is not None:
                band = f" (90 %: {d['ambient_lo']:.1f} to {d['ambient_hi']:.1f} {u})"
            lines.append(
                f"  {fc.direction or 'moving'} toward an ambient of {d['ambient']:.1f} {u}{band}"
            )
        thr = f"{d['threshold']:g} {u}"
        if d["eta_s"] is None:
            lines.append(f"  does not reach {thr}: the fitted curve levels off before it")
        elif d["eta_s"] == 0:
            lines.append(f"  already past {thr}")
        else:
            lines.append(
                f"  crosses {thr} in {duration(d['eta_s'])} "
                f"(90 %: {span(d['eta_lo_s'], d['eta_hi_s'])}), at {clock(fc.crossing_t, now)}"
            )
        if d["time_constant_s"]:
            # the half-cooling time is the trade's word for a cooling item; a warming one
            # closes half its gap to the ambient in the same time
            half = "half-cooling time" if fc.direction == "falling" else "half the gap closes in"
            lines.append(
                f"  time constant {duration(d['time_constant_s'])}, {half} "
                f"{duration(d['half_cooling_s'])}, seven-eighths in "
                f"{duration(d['seven_eighths_cooling_s'])}"
                + (f", Biot number {d['biot']:.2f}" if d["biot"] is not None else "")
            )
    for w in d["warnings"]:
        lines.append(f"  warning: {w}")
    lines.append(f"  {CAUTION}")
    return "\n".join(lines)


def _ambient_doubt(args: argparse.Namespace) -> dict:
    """How far off the given ambient may be, as the forecast's keyword (degC): a stated bound
    (--ambient-within, a hard bound on the fitted ambient) or the default doubt."""
    from thermeta.daemon.units import scale_to_celsius
    from thermeta.predictors.forecast import AMBIENT_UNCERTAINTY

    if args.ambient_within is not None:
        if args.ambient is None:
            raise InputError(
                "--ambient-within says how far off --ambient may be: give --ambient too"
            )
        if not args.ambient_within >= 0 or args.ambient_within == float("inf"):
            raise InputError(f"--ambient-within must be a number >= 0, got {args.ambient_within:g}")
        return {"ambient_within": scale_to_celsius(args.ambient_within, args.unit)}
    return {} if args.ambient is None else {"ambient_uncertainty": AMBIENT_UNCERTAINTY}


def _celsius(values, unit: str):
    """Readings in ``unit`` as degC (an array; None stays None)."""
    import numpy as np
    from thermeta.daemon.units import to_celsius

    if values is None or unit == "C":
        return values
    return np.vectorize(lambda v: to_celsius(v, unit), otypes=[float])(values)


def run(args: argparse.Namespace) -> int:
    import numpy as np
    from thermeta.daemon.ingest.csvio import read_series
    from thermeta.daemon.units import from_celsius, shown_in, to_celsius, to_item_units
    from thermeta.predictors import forecast
    from thermeta.predictors.outcome import Reason

    try:
        doubt = _ambient_doubt(args)
        series = read_series(args.csv)
        note = series.skipped_note(str(args.csv))
        if note:
            print(f"thermeta forecast: warning: {note}", file=sys.stderr)
        if series.t.size < 2:
            raise InputError(
                f"{args.csv}:{series.last_line}: too few readings to fit "
                f"({series.t.size}; want at least 2)"
            )
        side = args.side
        if side == "auto":
            # a probe that starts below its threshold is asked about the side above it
            first = float(series.y[series.t.argmin()])
            side = (
                None
                if first == args.threshold
                else ("above" if first < args.threshold else "below")
            )
        # as the daemon does, the forecast is made in degC (its defaults are stated in degC)
        series.y = _celsius(series.y, args.unit)
        series.ambient_y = _celsius(series.ambient_y, args.unit)
        threshold_c = to_celsius(args.threshold, args.unit)
        ambient_c = None if args.ambient is None else to_celsius(args.ambient, args.unit)
        fc = forecast(
            series.t,
            series.y,
            threshold_c,
            model=args.model,
            ambient=ambient_c,
            ambient_t=series.ambient_t if args.ambient is None else None,
            ambient_y=series.ambient_y if args.ambient is None else None,
            limit=predictor_side(side),
            shown=shown_in(args.unit),
            **doubt,
        )
        if not fc.ok and fc.reason_code == Reason.TOO_FEW_READINGS:
            raise InputError(f"{args.csv}:{series.last_line}: {fc.reason}")
    except InputError as exc:
        print(f"thermeta forecast: {exc}", file=sys.stderr)
        return 2
    if args.plot:
        try:
            from thermeta.daemon.views.plotting import plot_forecast
        except ModuleNotFoundError:
            print("thermeta forecast: --plot is not available in this build", file=sys.stderr)
            return 2
        convert = None if args.unit == "C" else np.vectorize(lambda v: from_celsius(v, args.unit))
        plot_forecast(series, fc, args.plot, unit=args.unit, title=str(args.csv), convert=convert)
    if args.json:
        out = to_item_units(fc.to_dict(), args.unit)
        out["unit"] = args.unit
        out["side"] = side
        print(json.dumps(out))
    else:
        print(summary(fc, args.unit, str(args.csv)))
    return 0
