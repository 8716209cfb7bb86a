"""Pictures of one item: readings, the fitted curve, the forecast with its 90 % band, the threshold,
the predicted crossing with its time, and where the current regime began.

Matplotlib's object API on the Agg canvas (no pyplot state, safe in threads).  Times are shown in
the machine's local time zone; temperatures in the item's unit.  Key artists carry a ``gid``
("readings", "ambient", "fit", "forecast", "band", "threshold", "crossing", "crossing-interval",
"regime-start", "truth") so tests and tools can find them.

The curves drawn (the fit, the forecast and its band) are rebuilt in ``curves.py``.
"""

from __future__ import annotations

import io
import logging
from datetime import UTC, datetime

import numpy as np
from thermeta.daemon.states import Side
from thermeta.daemon.units import UNIT_SIGN
from thermeta.daemon.views.curves import SeriesLike, band, model_curve
from thermeta.predictors.result import Forecast

log = logging.getLogger("thermeta.plot")

WIDTH_PX, HEIGHT_PX, DPI = 1000, 560, 100
CAUTION = (
    "Forecasts support decisions; they are not a food-safety plan or a regulatory record. "
    "Local codes and licensed practice decide the limits and actions."
)
# Colours of our own; meaning is also carried by labels and line styles.
C_READ, C_FIT, C_BAND, C_THR, C_AMB, C_REG, C_TRUTH = (
    "#2f6f8f",
    "#1b3b4b",
    "#e0a040",
    "#b3261e",
    "#6a8f3f",
    "#7a5c99",
    "#888888",
)


# ---------------------------------------------------------------------------------------------
# the figure
# ---------------------------------------------------------------------------------------------


def _local_tz():
    from thermeta.daemon.timefmt import zone

    return zone()  # the site's zone (the config's timezone), else the machine's


def _to_dates(t: np.ndarray) -> np.ndarray:
    """Epoch seconds to matplotlib date numbers (days since 1970-01-01 UTC)."""
    import matplotlib.dates as mdates

    return np.asarray(t, float) / 86400.0 + mdates.date2num(datetime(1970, 1, 1, tzinfo=UTC))


def _to_date(t: float) -> float:
    """One epoch time as a matplotlib date number."""
    return float(_to_dates(np.asarray(t, float)))


def _span_end(fc: Forecast, t_last: float, span_s: float) -> float:
    """How far ahead to draw: past the slow end of the crossing interval, at most two days."""
    ahead = max(0.25 * span_s, 900.0)
    if fc.eta_s:
        slow = fc.eta_hi_s if fc.eta_hi_s is not None else 2.0 * fc.eta_s
        ahead = max(ahead, 1.15 * max(slow, fc.eta_s))
    return t_last + min(ahead, 2 * 86400.0)


def forecast_figure(
    series: SeriesLike,
    fc: Forecast,
    *,
    unit: str = "C",
    title: str | None = None,
    truth: tuple[np.ndarray, np.ndarray] | None = None,
    convert=None,
):
    """A matplotlib Figure (Agg canvas) of the item; ``truth`` = (t, y) draws the true curve
    (simulations only); ``convert`` maps degC values to the display unit (default: none)."""
    import matplotlib.dates as mdates
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from thermeta.daemon.timefmt import duration, local_clock

    conv = convert or (lambda v: v)
    sign = UNIT_SIGN.get(unit, unit)
    fig = Figure(figsize=(WIDTH_PX / DPI, HEIGHT_PX / DPI), dpi=DPI)
    FigureCanvasAgg(fig)
    ax = fig.add_axes((0.08, 0.16, 0.72, 0.74))
    t = np.asarray(series.t, float)
    y = np.asarray(series.y, float)
    order = np.argsort(t, kind="stable")
    t, y = t[order], y[order]
    t_last = fc.t_last if fc.t_last is not None else (float(t[-1]) if t.size else 0.0)
    t_first = float(t[0]) if t.size else t_last
    t_end = _span_end(fc, t_last, t_last - t_first)
    D = _to_dates
    ax.plot(D(t), conv(y), ".", ms=3, color=C_READ, label="readings", gid="readings")
    amb_t, amb_y = getattr(series, "ambient_t", None), getattr(series, "ambient_y", None)
    if amb_t is not None and amb_y is not None and len(amb_t):
        ao = np.argsort(amb_t)
        ax.plot(
            D(np.asarray(amb_t)[ao]),
            conv(np.asarray(amb_y)[ao]),
            "-",
            lw=0.8,
            color=C_AMB,
            alpha=0.8,
            label="ambient (measured)",
            gid="ambient",
        )
    elif fc.ok and fc.ambient is not None and fc.ambient_mode in ("known", "fitted"):
        ax.axhline(
            conv(fc.ambient),
            color=C_AMB,
            lw=0.8,
            ls=(0, (1, 2)),
            label=f"ambient ({fc.ambient_mode}) {conv(fc.ambient):.1f} {sign}",
            gid="ambient",
        )
    if truth is not None:
        ax.plot(
            D(truth[0]),
            conv(np.asarray(truth[1])),
            ":",
            lw=1.6,
            color=C_TRUTH,
            zorder=5,
            label="truth (simulated)",
            gid="truth",
        )
    reg = fc.regime_start if fc.regime_start is not None else t_first
    t_fit = np.linspace(reg, t_last, 200)
    t_fc = np.linspace(t_last, t_end, 300)
    fit_y = model_curve(fc, t_fit, series)
    fc_y = model_curve(fc, t_fc, series)
    if fit_y is not None:
        ax.plot(D(t_fit), conv(fit_y), "-", lw=2.0, color=C_FIT, label="fitted curve", gid="fit")
    if fc_y is not None:
        ax.plot(D(t_fc), conv(fc_y), "--", lw=2.0, color=C_FIT, label="forecast", gid="forecast")
        region = band(fc, t_fc, series)
        if region is not None:
            ax.fill_between(
                D(t_fc),
                conv(region[0]),
                conv(region[1]),
                color=C_BAND,
                alpha=0.35,
                lw=0,
                label="90 % band",
                gid="band",
            )
    ax.axhline(
        conv(fc.threshold),
        color=C_THR,
        lw=1.5,
        ls="-.",
        label=f"threshold {conv(fc.threshold):g} {sign}",
        gid="threshold",
    )
    if fc.regime_start is not None and fc.regime_start > t_first:
        ax.axvline(
            _to_date(fc.regime_start),
            color=C_REG,
            lw=1.0,
            ls=":",
            label=f"regime start {local_clock(fc.regime_start)}",
            gid="regime-start",
        )
    cross = fc.crossing_t
    if cross is not None and fc.eta_s and fc.eta_s > 0:
        ax.plot(
            [_to_date(cross)],
            [conv(fc.threshold)],
            "X",
            ms=11,
            color=C_THR,
            mec="white",
            label=f"crossing {local_clock(cross)}",
            gid="crossing",
        )
        ax.annotate(
            f"crosses {local_clock(cross)}\nin {duration(fc.eta_s)}",
            (_to_date(cross), conv(fc.threshold)),
            textcoords="offset points",
            xytext=(-10, 10),
            ha="right",
            fontsize=9,
            color=C_THR,
        )
        if fc.eta_lo_s is not None:
            hi = t_last + fc.eta_hi_s if fc.eta_hi_s is not None else t_end
            ax.plot(
                [_to_date(t_last + fc.eta_lo_s), _to_date(hi)],
                [conv(fc.threshold)] * 2,
                "-",
                lw=5,
                color=C_THR,
                alpha=0.35,
                solid_capstyle="butt",
                gid="crossing-interval",
                label="crossing, 90 % interval",
            )
    tz = _local_tz()
    ax.xaxis.set_major_locator(mdates.AutoDateLocator(tz=tz, minticks=4, maxticks=9))
    ax.xaxis.set_major_formatter(mdates.DateFormatter("%H:%M", tz=tz))
    day = datetime.fromtimestamp(t_last, tz=UTC).astimezone().strftime("%Y-%m-%d %Z")
    ax.set_xlabel(f"local time ({day})")
    ax.set_ylabel(f"temperature ({sign})")
    ax.grid(True, alpha=0.3)
    ax.set_xlim(_to_date(t_first), _to_date(t_end))
    context = [c for c in (fit_y, fc_y) if c is not None]
    if amb_t is not None and amb_y is not None and len(amb_y) >= 7:
        context.append(np.percentile(np.asarray(amb_y, float), [2.0, 98.0]))
    _robust_ylim(ax, conv(y), [conv(fc.threshold)] + [conv(np.asarray(c)) for c in context])
    ax.set_title(title or "forecast", fontsize=11, loc="left")
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=8, frameon=False)
    fig.text(0.08, 0.03, _summary(fc, sign, conv), fontsize=8)
    fig.text(0.08, 0.005, CAUTION, fontsize=7, color="#555555")
    return fig


def _robust_ylim(ax, readings: np.ndarray, keep: list) -> None:
    """Scale the y axis to the bulk of the readings and the curves, so one spike (a probe lifted
    out, a loose contact) does not flatten the picture; say how many readings fall outside."""
    parts = [np.asarray(v, float).ravel() for v in keep]
    vals = np.concatenate(parts) if parts else np.zeros(0)
    vals = vals[np.isfinite(vals)]
    r = np.asarray(readings, float)
    r = r[np.isfinite(r)]
    if r.size >= 7:
        # a reading far from the running median of its neighbours is a spike
        med = np.median(
            np.lib.stride_tricks.sliding_window_view(np.pad(r, 3, mode="edge"), 7), axis=1
        )
        dev = np.abs(r - med)
        scale = max(1.4826 * float(np.median(dev)), 0.2)
        good = r[dev <= 6 * scale]
        bulk = np.array([good.min(), good.max()]) if good.size else np.zeros(0)
    elif r.size:
        bulk = np.array([r.min(), r.max()])
    else:
        bulk = np.zeros(0)
    span = np.concatenate([bulk, vals])
    if span.size == 0:
        return
    lo, hi = float(span.min()), float(span.max())
    pad = max(0.08 * (hi - lo), 0.5)
    lo, hi = lo - pad, hi + pad
    off = int(np.sum((r < lo) | (r > hi)))
    ax.set_ylim(lo, hi)
    if off:
        ax.text(
            0.99,
            0.02,
            f"{off} reading{'s' if off > 1 else ''} off the scale (spikes)",
            transform=ax.transAxes,
            ha="right",
            va="bottom",
            fontsize=8,
            color="#555555",
        )


def _summary(fc: Forecast, sign: str, conv) -> str:
    from thermeta.daemon.timefmt import duration, span

    if not fc.ok:
        return f"no forecast: {fc.reason}"
    bits = [f"model {fc.model}, ambient {fc.ambient_mode}"]
    if fc.ambient is not None:
        bits.append(f"ambient {conv(fc.ambient):.1f} {sign}")
    if fc.time_constant_s:
        bits.append(f"time constant {duration(fc.time_constant_s)}")
    if fc.biot is not None:
        bits.append(f"Biot {fc.biot:.2f}")
    if fc.eta_s is None:
        bits.append("does not reach the threshold")
    elif fc.eta_s == 0:
        bits.append("already past the threshold")
    else:
        bits.append(f"crosses in {duration(fc.eta_s)} (90 %: {span(fc.eta_lo_s, fc.eta_hi_s)})")
    return "; ".join(bits)


def figure_png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI)
    return buf.getvalue()


def forecast_png(
    series: SeriesLike,
    fc: Forecast,
    *,
    unit: str = "C",
    title: str | None = None,
    truth=None,
    convert=None,
) -> bytes:
    """The picture as PNG bytes (1000 x 560 px), e.g. for an email attachment."""
    return figure_png(
        forecast_figure(series, fc, unit=unit, title=title, truth=truth, convert=convert)
    )


def plot_forecast(
    series: SeriesLike,
    fc: Forecast,
    out_path,
    *,
    unit: str = "C",
    title: str | None = None,
    truth=None,
    convert=None,
) -> None:
    """Write the picture to ``out_path`` (PNG); ``convert`` as in :func:`forecast_figure`."""
    data = forecast_png(series, fc, unit=unit, title=title, truth=truth, convert=convert)
    with open(out_path, "wb") as f:
        f.write(data)


# ---------------------------------------------------------------------------------------------
# from the store (the `thermeta plot` command and the email hook)
# ---------------------------------------------------------------------------------------------


class _Series:
    def __init__(self, t, y, ambient_t=None, ambient_y=None):
        self.t, self.y, self.ambient_t, self.ambient_y = t, y, ambient_t, ambient_y


def item_series(store, cfg, *, history_s: float | None = None):
    """An item's recent readings (and its ambient probe's) from the store, in degC.

    history_s: how far back from the newest reading (default: the item's fit window)."""
    from thermeta.daemon.config import AMBIENT_SUFFIX

    last = store.last_reading_times().get(cfg.name)
    if last is None:
        return None
    since = last - (history_s if history_s is not None else cfg.window_s)
    rows = store.recent_readings(cfg.name, since_ts=since)
    if not rows:
        return None
    t = np.array([r[0] for r in rows], float)
    y = np.array([r[1] for r in rows], float)
    at = ay = None
    if cfg.ambient_topic:
        arows = store.recent_readings(cfg.name + AMBIENT_SUFFIX, since_ts=since)
        if arows:
            at = np.array([r[0] for r in arows], float)
            ay = np.array([r[1] for r in arows], float)
    return _Series(t, y, at, ay)


def item_forecast(
    series, cfg, *, side: Side | None = None, prior=None, threshold_c: float | None = None
) -> Forecast:
    """Refit the item as the service does (the refit's own arguments: model, ambient mode and
    its doubt, window, side, the learned prior) for one of its levels (default its first), in
    degC."""
    from thermeta.daemon.levels.spec import levels_of
    from thermeta.daemon.refit.rounds import forecast_kwargs
    from thermeta.predictors import forecast

    thr = levels_of(cfg)[0].threshold_c if threshold_c is None else threshold_c
    return forecast(
        series.t,
        series.y,
        thr,
        prior=prior,
        **forecast_kwargs(cfg, side, series.ambient_t, series.ambient_y),
    )


def focus_level(store, cfg):
    """The level the item's newest forecast is about (its focus) and its side as the refit
    decides it: configured, recorded, or (not yet recorded) from the newest reading."""
    from thermeta.daemon.levels.spec import auto_side, levels_of
    from thermeta.daemon.units import from_celsius
    from thermeta.storage.episodes import EpisodeStore

    levels = levels_of(cfg)
    latest = {f.item: f.forecast for f in store.latest_forecasts()}.get(cfg.name) or {}
    lv = next((x for x in levels if x.name == latest.get("focus")), levels[0])
    if lv.side != "auto":
        return lv, lv.side
    recorded = EpisodeStore(store).sides(cfg.name) if store.has_table("level_sides") else {}
    if lv.name in recorded:
        return lv, recorded[lv.name]
    last = store.last_reading_times().get(cfg.name)
    rows = [] if last is None else store.recent_readings(cfg.name, since_ts=last)
    value = from_celsius(rows[-1][1], cfg.unit) if rows else None
    return lv, auto_side(lv, value)


def _limit_and_prior(store, cfg, measured: bool):
    """The focus level, its side and the learned prior the refit would use for the item, read
    from the store."""
    from thermeta.daemon.refit.rounds import uses_prior
    from thermeta.predictors.prior import Prior
    from thermeta.storage.priors import PriorStore

    level, limit = focus_level(store, cfg)
    prior = None
    if uses_prior(cfg, measured):
        try:
            body = PriorStore(store).get(cfg.prior_class or cfg.name)
        except Exception:  # noqa: BLE001 - as the refit: the picture goes on without a prior
            log.exception("reading the prior of %s failed", cfg.name)
            body = None
        prior = Prior() if body is None else Prior.from_dict(body)
    return level, limit, prior


def item_png(
    store, cfg, *, history_s: float | None = None, title: str | None = None
) -> bytes | None:
    """PNG bytes of an item's recent readings and a fresh forecast (None without readings)."""
    fig = item_figure(store, cfg, history_s=history_s, title=title)
    return None if fig is None else figure_png(fig)


def item_figure(store, cfg, *, history_s: float | None = None, title: str | None = None):
    from thermeta.daemon.units import from_celsius

    series = item_series(store, cfg, history_s=history_s)
    if series is None:
        return None
    level, side, prior = _limit_and_prior(store, cfg, series.ambient_y is not None)
    fc = item_forecast(series, cfg, side=side, prior=prior, threshold_c=level.threshold_c)
    return forecast_figure(
        series,
        fc,
        unit=cfg.unit,
        title=title or cfg.name,
        convert=None if cfg.unit == "C" else np.vectorize(lambda v: from_celsius(v, cfg.unit)),
    )
