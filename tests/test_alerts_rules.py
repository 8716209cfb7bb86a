"""The alert rules as pure logic: forecast dicts in, events out, time passed in.

The forecasts here are what the refitter would publish for a load following Newton's law of
cooling exactly (T(t) = Ta + (T0 - Ta) e^(-k t), the published law), with the crossing time solved
in closed form and a +-15 % interval around it; the rules are judged against that truth.
"""

from __future__ import annotations

import math

import pytest
from thermeta.daemon.alerts.message import build_alert, fit_clause, headline, sentence
from thermeta.daemon.alerts.rules import ItemAlertState, RuleParams, remaining_s, step
from thermeta.predictors.result import rfc3339

T0_EPOCH = 1_800_000_000.0
TA, T_START, K = 12.0, -20.0, 1.0 / 36000.0  # ambient 12 degC, load -20 degC, tau 10 h
THR = -15.0


def newton(t_s: float, ta: float = TA, t0: float = T_START, k: float = K) -> float:
    # T(t) = Ta + (T0 - Ta) e^(-k t)
    return ta + (t0 - ta) * math.exp(-k * t_s)


def crossing_s(thr: float = THR, ta: float = TA, t0: float = T_START, k: float = K) -> float:
    # t* = -ln((thr - Ta) / (T0 - Ta)) / k
    return -math.log((thr - ta) / (t0 - ta)) / k


def fc_at(
    t_s: float,
    value: float | None = None,
    *,
    state: str | None = None,
    spread: float = 0.15,
    horizon_s: float = 86400.0,
    notes: list[dict] | None = None,
    regime_start: float | None = None,
    direction: str = "rising",
) -> dict:
    """The forecast dict of the refitter at t_s seconds after the start (reading just taken)."""
    v = newton(t_s) if value is None else value
    eta = max(0.0, crossing_s() - t_s) if direction == "rising" else None
    if state is None:
        state = (
            "crossed"
            if v >= THR
            else ("approaching" if eta is not None and eta <= horizon_s else "steady")
        )
    return {
        "item": "trailer-4",
        "state": state,
        "value_now": v,
        "threshold": THR,
        "unit": "C",
        "direction": direction,
        "eta_s": eta,
        "eta_lo_s": None if eta is None else eta * (1 - spread),
        "eta_hi_s": None if eta is None else eta * (1 + spread),
        "ambient": TA,
        "time_constant_s": 1.0 / K,
        "k_per_s": K,
        "fit_ok": True,
        "last_reading_at": rfc3339(T0_EPOCH + t_s),
        "warnings": [n["text"] for n in notes or []],
        "notes": notes or [],
        "regime_start": rfc3339(regime_start),
        "ambient_mode": "known",
    }


def run(seq, p: RuleParams, st: ItemAlertState | None = None, acked: bool = False):
    st = st or ItemAlertState()
    out = []
    for t_s, fc in seq:
        for ev in step(st, fc, p, T0_EPOCH + t_s, acked):
            out.append((t_s, ev))
    return st, out


P = RuleParams(threshold=THR, lead_s=3600, hysteresis=0.5, hold_s=300, remind_every_s=1800)
# An item is first seen inside its limit; that tells the rules which side is unsafe.
FIRST = (-60.0, fc_at(0, value=THR - 2, state="steady"))


def test_approaching_once_at_least_lead_before_the_true_crossing_then_crossed_then_recovered():
    """A warming load: one `approaching` no later than lead before the exact crossing, one
    `crossed` at the crossing, and `recovered` once it is cooled back past the band."""
    t_cross = crossing_s()
    seq = [(t, fc_at(t)) for t in range(0, int(t_cross) + 1800, 300)]
    cool = [
        (
            t_cross + 1800 + i * 300,
            fc_at(0, value=-15.3 - 0.4 * i, state="steady", direction="falling"),
        )
        for i in range(6)
    ]
    for t, fc in cool:
        fc["last_reading_at"] = rfc3339(T0_EPOCH + t)
    st, out = run(seq + cool, P)
    assert not any(ev.reminder for _, ev in out)  # crossed for less than remind_every_s
    levels = [ev.event for _, ev in out]
    assert levels == ["approaching", "crossed", "recovered"]
    t_app, t_crossed, _t_rec = (t for t, _ in out)
    assert t_cross - t_app >= P.lead_s
    assert t_crossed >= t_cross and t_crossed - t_cross < 300 + 1e-9
    assert newton(0) < THR  # the start is inside the limit
    assert out[2][1].context["by"] == "band"
    assert st.levels["limit"].state == "steady" and st.incident == 1 and not st.incident_open


def test_early_end_of_the_interval_decides_not_the_middle():
    """eta 70 min with a 90 % interval starting at 50 min and lead 60 min: alert now."""
    fc = fc_at(0)
    fc.update(eta_s=4200.0, eta_lo_s=3000.0, eta_hi_s=6000.0, state="approaching")
    _, out = run([(0, fc)], P)
    assert [e.event for _, e in out] == ["approaching"]
    fc2 = dict(fc, eta_lo_s=3700.0)
    _, out2 = run([(0, fc2)], P)
    assert out2 == []


def test_a_wide_interval_beyond_the_horizon_does_not_cry_wolf():
    """A healthy cold room whose fit says 31 h with an interval from 0 s (state steady beyond
    the 24 h horizon) raises nothing."""
    fc = fc_at(0, state="steady")
    fc.update(eta_s=31 * 3600.0, eta_lo_s=0.0, eta_hi_s=None)
    _, out = run([(0, fc), (300, dict(fc))], P)
    assert out == []


def test_no_flapping_around_the_threshold():
    """A value wobbling +-0.3 degC around the threshold (band 0.5): one `crossed`, no recovery
    while it keeps coming back over, and the approach flickering never raises a second one."""
    seq = []
    for i in range(40):
        v = THR + (0.3 if i % 2 else -0.3)
        fc = fc_at(0, value=v)
        fc["state"] = "crossed" if v >= THR else "approaching"
        fc.update(eta_s=60.0, eta_lo_s=30.0, eta_hi_s=90.0)
        seq.append((i * 60.0, fc))
    _, out = run(seq, P)
    assert [e.event for _, e in out if not e.reminder] == ["approaching", "crossed"]


def test_inside_but_not_by_the_band_recovers_after_the_hold_time():
    """Back inside by 0.2 degC only (band 0.5): recovery after hold_s (300 s), not before."""
    seq = [FIRST, (0, fc_at(0, value=THR + 1, state="crossed"))]
    seq += [(60.0 * i, fc_at(0, value=THR - 0.2, state="steady")) for i in range(1, 8)]
    _, out = run(seq, P)
    rec = [(t, e) for t, e in out if e.event == "recovered"]
    assert len(rec) == 1
    assert rec[0][0] == pytest.approx(60 + 300)
    assert rec[0][1].context["by"] == "hold"


def test_approach_that_eases_clears_only_after_hold():
    """An approach whose forecast moves out past the lead clears once, after hold_s, and a
    short dip back in before then keeps it raised without a new alert."""
    near = fc_at(0)
    near.update(eta_s=2000.0, eta_lo_s=1500.0, eta_hi_s=2500.0, state="approaching")
    far = dict(near, eta_s=9000.0, eta_lo_s=8000.0, eta_hi_s=10000.0)
    seq = [(0, near), (100, far), (200, near), (300, far), (500, far), (700, far)]
    _, out = run(seq, P)
    assert [(t, e.event) for t, e in out] == [(0, "approaching"), (700, "recovered")]
    assert out[1][1].context["from_state"] == "approaching"


def test_reminders_while_crossed_and_ack_silences_them():
    """Crossed for 2 h with remind_every 30 min: 4 reminders; acknowledged: none."""
    seq = [FIRST] + [(60.0 * i, fc_at(0, value=THR + 2, state="crossed")) for i in range(121)]
    _, out = run(seq, P)
    assert [e.reminder for _, e in out] == [False, True, True, True, True]
    assert [t for t, _ in out] == [0, 1800, 3600, 5400, 7200]
    st = ItemAlertState()
    run(seq[:2], P, st)
    _, out_acked = run(seq[2:], P, st, acked=True)
    assert out_acked == []


def test_stale_once_and_resumed_once():
    """A silent sensor raises `stale` once however many refits see it, `resumed` on return."""
    seq = [(0, fc_at(0))] + [(300.0 * i, dict(fc_at(0), state="stale")) for i in range(1, 5)]
    seq.append((1800, fc_at(0)))
    _, out = run(seq, RuleParams(threshold=THR, lead_s=60))
    assert [e.event for _, e in out] == ["stale", "resumed"]


def test_regime_change_alerts_once_per_new_change_not_for_jitter():
    """A change of surroundings at t=1000 s alerts once; the estimate wandering by a reading
    does not alert again; a later change (t=5000 s) does."""
    note = [{"code": "regime_change", "text": "the surroundings changed 1 time(s); fitted ..."}]
    seq = [
        (1200, fc_at(1200, notes=note, regime_start=T0_EPOCH + 1000)),
        (1500, fc_at(1500, notes=note, regime_start=T0_EPOCH + 1060)),
        (1800, fc_at(1800, regime_start=T0_EPOCH + 1060)),
        (5400, fc_at(5400, notes=note, regime_start=T0_EPOCH + 5000)),
    ]
    _, out = run(seq, RuleParams(threshold=THR, lead_s=60))
    assert [(t, e.event) for t, e in out] == [(1200, "regime"), (5400, "regime")]


def test_lower_limit_falling_toward_a_floor():
    """A cellar cooling toward a 10 degC minimum: approaching, crossed below, recovered above
    the floor plus the band."""
    p = RuleParams(threshold=10.0, lead_s=3600, hysteresis=0.5, hold_s=300)
    base = {"item": "cellar", "unit": "C", "fit_ok": True, "warnings": [], "direction": "falling"}
    seq = [
        (
            0,
            dict(
                base,
                state="approaching",
                value_now=11.0,
                eta_s=3000.0,
                eta_lo_s=2500.0,
                eta_hi_s=3500.0,
                last_reading_at=rfc3339(T0_EPOCH),
            ),
        ),
        (
            3000,
            dict(
                base,
                state="crossed",
                value_now=9.8,
                eta_s=0.0,
                last_reading_at=rfc3339(T0_EPOCH + 3000),
            ),
        ),
        (
            4000,
            dict(
                base,
                state="steady",
                value_now=10.3,
                direction="rising",
                last_reading_at=rfc3339(T0_EPOCH + 4000),
            ),
        ),
        (
            4100,
            dict(
                base,
                state="steady",
                value_now=10.6,
                direction="rising",
                last_reading_at=rfc3339(T0_EPOCH + 4100),
            ),
        ),
    ]
    _, out = run(seq, p)
    assert [(t, e.event) for t, e in out] == [
        (0, "approaching"),
        (3000, "crossed"),
        (4100, "recovered"),
    ]


def test_state_survives_json_round_trip_so_a_restart_repeats_nothing():
    """The rule state stored as JSON and read back continues without raising again."""
    st, out = run([FIRST, (0, fc_at(0, value=THR + 1, state="crossed"))], P)
    st2 = ItemAlertState.from_json(st.to_json())
    _, out2 = run([(60, fc_at(0, value=THR + 1, state="crossed"))], P, st2)
    assert len(out) == 1 and out2 == []


def test_bad_params_are_value_errors():
    """Negative hysteresis or a zero lead is a ValueError naming the field."""
    with pytest.raises(ValueError, match="hysteresis"):
        RuleParams(threshold=0, hysteresis=-1)
    with pytest.raises(ValueError, match="lead_s"):
        RuleParams(threshold=0, lead_s=0)


def test_the_sentence_carries_the_numbers():
    """One sentence: item, level, value now, threshold, crossing clock time and 'in N min' with
    the interval; the technical figures (the ambient, given, measured or fitted, and the time
    constant) in the details, never "not known"; a headline in a few words."""
    now = T0_EPOCH + 600
    fc = fc_at(600)
    fc.update(
        eta_s=2520.0 + 600,
        eta_lo_s=1620.0 + 600,
        eta_hi_s=4080.0 + 600,
        last_reading_at=rfc3339(T0_EPOCH),
    )
    st = ItemAlertState()
    evs = step(st, fc, P, now)
    a = build_alert("trailer-4", fc, evs[0], st, P, now, unit="C", silence_s=900, site="yard")
    s = a["sentence"]
    assert remaining_s(fc, "eta_s", now) == pytest.approx(2520.0)
    assert s.startswith("trailer-4 is approaching its limit of -15.0 °C: ")
    assert f"{newton(600):.1f} °C now" in s
    assert ", in 42 min (90 %: " in s and ", in 27 min to 1 h 08 min)" in s
    assert "time constant" not in s and "ambient" not in s
    assert a["headline"] == "trailer-4 (yard): may cross -15.0 °C in about 42 min"
    # the ambient says where it came from: the item's config (here), its air probe, or the fit
    assert a["details"] == "given ambient 12.0 °C, time constant 10 h 00 min"
    assert fit_clause(dict(a, ambient_mode="fitted")).startswith("fitted ambient 12.0 °C,")
    assert fit_clause(dict(a, ambient_mode="measured")).startswith("air probe heading for 12.0")
    assert fit_clause(dict(a, ambient_mode="measured", ambient=None)).startswith(
        "ambient from the air probe, time"
    )
    # nothing known: nothing said (not "not known, time constant not known")
    assert fit_clause(dict(a, ambient=None, ambient_given=None, time_constant_s=None)) == ""
    assert s.count(". ") == 0 and s.endswith(".")
    assert a["crossing_at"] == rfc3339(now + 2520.0)
    assert a["id"] == "trailer-4:1:approaching:1"
    rec = sentence(dict(a, event="recovered", from_state="crossed", by="band"))
    assert rec.startswith(
        "trailer-4 is back below its limit of -15.0 °C by more than the 0.5 °C band: "
    )
    for event in ("crossed", "recovered", "stale", "resumed", "regime"):
        b = dict(a, event=event, from_state="crossed", by="band", regime_start_s=now)
        assert b["item"] in sentence(b) and headline(b).startswith("trailer-4 (yard): ")
    # the crossing says which way: a warming load rose above, a chilled batch fell below
    assert sentence(dict(a, event="crossed", side="above")).startswith(
        "trailer-4 has risen above its limit of -15.0 °C: "
    )
    assert sentence(dict(a, event="crossed", side="below")).startswith(
        "trailer-4 has fallen below its limit of -15.0 °C: "
    )
    assert sentence(dict(a, event="crossed", side=None)).startswith(
        "trailer-4 has crossed its limit of -15.0 °C: "
    )


def test_the_daemons_side_is_used_when_given():
    """A forecast saying side = "below" (a floor, configured) makes a value under the threshold
    a crossing even on first sight, and one above it safe."""
    p = RuleParams(threshold=10.0, lead_s=600)
    base = {
        "item": "cellar",
        "unit": "C",
        "fit_ok": True,
        "warnings": [],
        "side": "below",
        "last_reading_at": rfc3339(T0_EPOCH),
    }
    _, out = run([(0, dict(base, state="crossed", value_now=9.0))], p)
    assert [e.event for _, e in out] == ["crossed"]
    _, out = run([(0, dict(base, state="steady", value_now=11.0, side="below"))], p)
    assert out == []


NOTE = [{"code": "regime_change", "text": "the surroundings changed 1 time(s); fitted ..."}]


def _excursion(
    start_s: float,
    minutes: int,
    every_s: float = 60.0,
    inside: float = THR - 2,
    past: float = THR + 1.5,
):
    """An air probe by a busy door: inside its limit, then past it for ``minutes``, then back,
    one refit a minute, the fit reporting the change from its start on."""
    seq = []
    for i in range(90):
        t = start_s - 600 + i * every_s
        is_past = start_s <= t < start_s + 60 * minutes
        seq.append(
            (
                t,
                fc_at(
                    t,
                    value=past if is_past else inside,
                    state="crossed" if is_past else "steady",
                    notes=NOTE if t >= start_s else None,
                    regime_start=T0_EPOCH + start_s if t >= start_s else None,
                    direction="rising" if is_past else "falling",  # no crossing ahead inside
                ),
            )
        )
    return seq


def test_delay_lets_a_short_excursion_pass_and_raises_a_long_one_when_it_is_over():
    """The alarm delay (common practice for air probes by a door): with delay 15 min, 10 minutes
    past the threshold raise nothing, not even the change of surroundings; 20 minutes raise the
    regime change and `crossed` 15 min after the value went past (the order as without a delay).
    Without a delay the short excursion raises regime, crossed and recovered."""
    d15 = RuleParams(threshold=THR, lead_s=1800, hold_s=300, delay_s=900)
    _, out = run([FIRST] + _excursion(3600, 10), d15)
    assert out == []
    _, out = run([FIRST] + _excursion(3600, 20), d15)
    assert [(t, e.event) for t, e in out][:2] == [(3600 + 900, "regime"), (3600 + 900, "crossed")]
    _, out = run([FIRST] + _excursion(3600, 10), RuleParams(threshold=THR, lead_s=1800, hold_s=300))
    assert [e.event for _, e in out] == ["regime", "crossed", "recovered"]
    assert [t for t, e in out][:2] == [3600, 3600]


def test_delay_holds_an_approach_until_it_has_lasted():
    """An approach due from t = 0 (early end within lead) is raised at once without a delay and
    10 min later with delay 10 min; an approach that lapses before the delay starts over."""
    seq = [(t, fc_at(t)) for t in range(int(crossing_s() - 3000), int(crossing_s() - 1000), 60)]
    lead = RuleParams(threshold=THR, lead_s=3600)
    first = run(seq, lead)[1][0]
    delayed = run(seq, RuleParams(threshold=THR, lead_s=3600, delay_s=600))[1][0]
    assert first[1].event == delayed[1].event == "approaching"
    assert delayed[0] - first[0] == 600
    # the condition lapses (no crossing forecast) for one refit after 5 minutes: counted again
    t0 = seq[0][0]
    broken = [
        (t, fc if t != t0 + 300 else fc_at(t, state="steady", direction="falling")) for t, fc in seq
    ]
    again = run(broken, RuleParams(threshold=THR, lead_s=3600, delay_s=600))[1][0]
    assert again[0] == t0 + 360 + 600


def test_a_change_inside_a_defrost_hold_is_not_told():
    """The fit finds the defrost itself as a change of the surroundings; inside the hold that
    is noted without an alert, and not told later either (the same start)."""
    start = 1000.0
    defrost = {
        "on": False,
        "started_at": rfc3339(T0_EPOCH + start),
        "ended_at": rfc3339(T0_EPOCH + start + 1500),
    }
    seq = [
        (
            t,
            dict(
                fc_at(
                    t,
                    value=THR - 3,
                    state="steady",
                    notes=NOTE,
                    regime_start=T0_EPOCH + start,
                    direction="falling",
                ),
                defrost=defrost,
            ),
        )
        for t in range(1200, 9000, 300)
    ]
    _, out = run(seq, RuleParams(threshold=THR, lead_s=60))
    assert out == []
    no_defrost = [(t, {k: v for k, v in fc.items() if k != "defrost"}) for t, fc in seq]
    assert [e.event for _, e in run(no_defrost, RuleParams(threshold=THR, lead_s=60))[1]] == [
        "regime"
    ]
