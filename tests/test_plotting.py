"""The pictures: valid PNGs of the stated size whose figures hold the threshold, the band, the
crossing and the regime start, with curves that cross where the forecast says, in local time."""

from __future__ import annotations

import os
import struct
import subprocess
import sys
import time
from datetime import UTC, datetime
from zoneinfo import ZoneInfo

import numpy as np
import pytest
from matplotlib.collections import PolyCollection
from matplotlib.lines import Line2D
from thermeta.daemon.simulation import scenarios as S
from thermeta.daemon.views import plotting as P
from thermeta.predictors import forecast


def _png_size(data: bytes) -> tuple[int, int]:
    """Width and height from the IHDR chunk (PNG spec, ISO/IEC 15948: signature then IHDR)."""
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    assert data[12:16] == b"IHDR"
    return struct.unpack(">II", data[16:24])


def _case(name, probe, hours, mode="measured"):
    sc = S.build(name, seed=4)
    p = sc.probe(probe)
    cut = sc.t_start + hours * 3600
    sel = p.t <= cut
    kw, amb_t, amb_y = {}, None, None
    if mode == "measured":
        a = sc.probe(p.spec.ambient_probe)
        asel = a.t <= cut
        amb_t, amb_y = a.t[asel], a.y[asel]
        kw = dict(ambient_t=amb_t, ambient_y=amb_y)
    elif mode == "known":
        kw = dict(ambient=p.spec.ambient_known)
    series = P._Series(p.t[sel], p.y[sel], amb_t, amb_y)
    fc = forecast(
        series.t,
        series.y,
        p.spec.threshold,
        model=p.spec.model,
        window_s=p.spec.window_s or 7200.0,
        **kw,
    )
    return sc, p, series, fc


def _by_gid(fig, gid):
    return [a for a in fig.axes[0].get_children() if a.get_gid() == gid]


def test_png_size_and_the_parts_of_the_figure():
    """A wort forecast renders to a 1000 x 560 px PNG; its axes hold one threshold line at the
    threshold, a non-empty 90 % band, the crossing marker at the forecast crossing time, the fit
    and forecast curves, and axis labels with units."""
    _, _, series, fc = _case("wort-chill", "copperbeck/brewhouse/batch-0417/wort", 0.3, "known")
    assert fc.ok and fc.eta_s and fc.eta_s > 0
    fig = P.forecast_figure(series, fc, title="wort")
    data = P.figure_png(fig)
    assert _png_size(data) == (P.WIDTH_PX, P.HEIGHT_PX)
    (thr,) = _by_gid(fig, "threshold")
    assert isinstance(thr, Line2D) and set(thr.get_ydata()) == {20.0}
    (band,) = _by_gid(fig, "band")
    assert isinstance(band, PolyCollection) and band.get_paths()[0].vertices.shape[0] > 10
    (mark,) = _by_gid(fig, "crossing")
    assert mark.get_xdata()[0] == pytest.approx(P._to_dates(np.array([fc.crossing_t]))[0])
    assert _by_gid(fig, "fit") and _by_gid(fig, "forecast") and _by_gid(fig, "readings")
    ax = fig.axes[0]
    assert "°C" in ax.get_ylabel() and "local time" in ax.get_xlabel()


@pytest.mark.parametrize(
    "case",
    [
        ("wort-chill", "copperbeck/brewhouse/batch-0417/wort", 0.3, "known"),
        ("reefer-power-loss", "eastpier/reefer-12/load-top", 1.0, "measured"),
        ("blast-chill-rice", "riverside-canteen/blast-1/tray-c", 1.0, "measured"),
        ("frozen-trailer", "route9/trailer-4/carton-large", 3.0, "measured"),
    ],
)
def test_drawn_curve_crosses_the_threshold_at_the_forecast_eta(case):
    """The drawn forecast curve (lumped known, measured air, and the slab centre probe) meets the
    threshold within 2 % of the forecast's ETA, and the band meets it at the interval's ends."""
    _, p, series, fc = _case(*case)
    assert fc.ok and fc.eta_s and fc.eta_s > 0, fc.reason
    t = np.linspace(fc.t_last, fc.t_last + 3 * fc.eta_s, 3000)
    y = P.model_curve(fc, t, series)
    thr = p.spec.threshold
    cross = S.first_crossing(lambda x: np.interp(x, t, y), thr, p.spec.direction, t[0], t[-1], 5.0)
    assert cross is not None
    assert cross - fc.t_last == pytest.approx(fc.eta_s, rel=0.02, abs=30)
    lo, hi = P.band(fc, t, series)
    assert np.all(lo <= y + 1e-9) and np.all(y <= hi + 1e-9)
    if fc.eta_lo_s and fc.eta_hi_s and fc.eta_hi_s > fc.eta_lo_s + 60:
        edge_lo = np.interp(fc.t_last + fc.eta_lo_s, t, lo if p.spec.direction == "falling" else hi)
        edge_hi = np.interp(fc.t_last + fc.eta_hi_s, t, hi if p.spec.direction == "falling" else lo)
        assert edge_lo == pytest.approx(thr, abs=0.2)
        assert edge_hi == pytest.approx(thr, abs=0.2)


def test_regime_start_is_marked():
    """When the forecast fits only the readings after a change of surroundings, the figure marks
    where that regime began."""
    sc = S.build("walkin-door-ajar", seed=1)
    p = sc.probe("millrace-kitchen/walkin/dairy-shelf")
    sel = p.t <= sc.t_start + 48 * 60
    fc = forecast(p.t[sel], p.y[sel], 5.0)
    series = P._Series(p.t[sel], p.y[sel])
    fig = P.forecast_figure(series, fc)
    assert fc.regime_start is not None and fc.regime_start > p.t[0], fc.warnings
    (reg,) = _by_gid(fig, "regime-start")
    assert reg.get_xdata()[0] == pytest.approx(P._to_dates(np.array([fc.regime_start]))[0])
    assert "regime start" in reg.get_label()


def test_times_are_local_time():
    """With the zone set to UTC+05:30 the crossing is labelled with that zone's clock time (checked
    against zoneinfo), and the x axis says which zone."""
    old = os.environ.get("TZ")
    os.environ["TZ"] = "Asia/Kolkata"
    time.tzset()
    try:
        _, _, series, fc = _case("wort-chill", "copperbeck/brewhouse/batch-0417/wort", 0.3, "known")
        fig = P.forecast_figure(series, fc)
        want = (  # clock times are rounded to the minute, as the durations beside them
            datetime.fromtimestamp(round(fc.crossing_t / 60) * 60, tz=UTC)
            .astimezone(ZoneInfo("Asia/Kolkata"))
            .strftime("%H:%M")
        )
        (mark,) = _by_gid(fig, "crossing")
        assert want in mark.get_label()
        assert "IST" in fig.axes[0].get_xlabel()
        ticks = fig.axes[0].xaxis.get_major_formatter()
        x0 = P._to_dates(np.array([fc.crossing_t]))[0]
        tick = (  # the axis reads the clock at that point, to the minute below
            datetime.fromtimestamp(fc.crossing_t, tz=UTC)
            .astimezone(ZoneInfo("Asia/Kolkata"))
            .strftime("%H:%M")
        )
        assert ticks(x0) == tick
    finally:
        if old is None:
            os.environ.pop("TZ", None)
        else:
            os.environ["TZ"] = old
        time.tzset()


def test_forecast_cli_writes_the_plot(tmp_path):
    """`thermeta forecast FILE.csv --threshold X --plot OUT.png` writes a valid PNG of the size."""
    sc = S.build("blast-chill-rice", seed=2)
    p = sc.probe("riverside-canteen/blast-1/tray-b")
    sel = p.t < sc.t_start + 1800
    csv = tmp_path / "tray.csv"
    csv.write_text("time,value\n" + "".join(f"{t},{y}\n" for t, y in zip(p.t[sel], p.y[sel])))
    out = tmp_path / "tray.png"
    r = subprocess.run(
        [
            sys.executable,
            "-m",
            "thermeta.daemon.cli",
            "forecast",
            str(csv),
            "--threshold",
            "21",
            "--ambient",
            "-6",
            "--plot",
            str(out),
        ],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert r.returncode == 0, r.stderr
    assert _png_size(out.read_bytes()) == (P.WIDTH_PX, P.HEIGHT_PX)


def _store_with_reefer(tmp_path, unit="C"):
    from thermeta.daemon.simulation.simulator import config_text
    from thermeta.storage.store import Store

    sc = S.build("reefer-power-loss", seed=6)
    url = f"sqlite:///{tmp_path}/plot.db"
    text = config_text(sc, host="127.0.0.1", port=1883, storage_url=url)
    if unit == "F":
        text = text.replace("threshold = 8\n", 'threshold = 46.4\nunit = "F"\n', 1)
    cfg_path = tmp_path / "plot.toml"
    cfg_path.write_text(text)
    store = Store(url)
    store.create_all()
    cut = sc.t_start + 1.5 * 3600
    for name, stored in (
        ("eastpier/reefer-12/load-top", "eastpier/reefer-12/load-top"),
        ("eastpier/reefer-12/air", "eastpier/reefer-12/load-top.ambient"),
    ):
        pr = sc.probe(name)
        iid = store.ensure_item(
            stored,
            kind="ambient" if "ambient" in stored else "load",
            unit=unit,
            topic=pr.spec.topic,
        )
        sel = pr.t <= cut
        store.write_batch(
            [
                {
                    "item_id": iid,
                    "ts": float(t),
                    "value_c": float(v),
                    "flags": 0,
                    "received_at": float(t),
                }
                for t, v in zip(pr.t[sel], pr.y[sel])
            ]
        )
    return store, cfg_path


def test_item_png_from_the_store_in_the_item_unit(tmp_path):
    """item_png (the email hook's picture) reads the item and its ambient probe from the store and
    draws the threshold in the item's unit (46.4 degF = 8 degC)."""
    from thermeta.daemon.config import load_config

    store, cfg_path = _store_with_reefer(tmp_path, unit="F")
    cfg = load_config(cfg_path)
    item = cfg.items[0]
    data = P.item_png(store, item)
    assert data is not None and _png_size(data) == (P.WIDTH_PX, P.HEIGHT_PX)
    fig = P.item_figure(store, item)
    (thr,) = _by_gid(fig, "threshold")
    assert thr.get_ydata()[0] == pytest.approx(46.4)
    assert "°F" in fig.axes[0].get_ylabel()
    assert _by_gid(fig, "ambient") and _by_gid(fig, "band")
    store.close()


def test_plot_command(tmp_path):
    """`thermeta plot ITEM --config FILE --out FILE.png` writes the picture; an unknown item is
    exit 2 with one line naming it."""
    store, cfg_path = _store_with_reefer(tmp_path)
    store.close()
    out = tmp_path / "item.png"
    run = [sys.executable, "-m", "thermeta.daemon.cli", "plot"]
    r = subprocess.run(
        run + ["eastpier/reefer-12/load-top", "--config", str(cfg_path), "--out", str(out)],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert r.returncode == 0, r.stderr
    assert _png_size(out.read_bytes()) == (P.WIDTH_PX, P.HEIGHT_PX)
    bad = subprocess.run(
        run + ["no-such-item", "--config", str(cfg_path), "--out", str(out)],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert bad.returncode == 2 and "no-such-item" in bad.stderr
    assert len(bad.stderr.strip().splitlines()) == 1


def test_a_spike_does_not_flatten_the_picture():
    """A single -40 degC spike among readings near 3 degC stays off the y scale (which still holds
    the threshold and the readings), and the figure says one reading is off the scale."""
    _, _, series, fc = _case("reefer-power-loss", "eastpier/reefer-12/load-top", 1.0)
    y = series.y.copy()
    y[len(y) // 2] = -40.0
    spiky = P._Series(series.t, y, series.ambient_t, series.ambient_y)
    fig = P.forecast_figure(spiky, fc)
    lo, hi = fig.axes[0].get_ylim()
    assert lo > -5.0
    assert lo < float(np.min(series.y)) and hi > fc.threshold
    texts = [t.get_text() for t in fig.axes[0].texts]
    assert any("off the scale" in t for t in texts)
