"""The forecast bench (scripts/bench_forecast.py): its quick path runs and its output is whole.

These tests check the instrument's structure and arithmetic, not the estimator's quality (the
bench itself reports that) and not its speed.
"""

from __future__ import annotations

import importlib.util
import math
import sys
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="module")
def bench():
    spec = importlib.util.spec_from_file_location(
        "bench_forecast", ROOT / "scripts" / "bench_forecast.py"
    )
    mod = importlib.util.module_from_spec(spec)
    sys.modules["bench_forecast"] = mod
    spec.loader.exec_module(mod)
    return mod


@pytest.fixture(scope="module")
def quick(bench, tmp_path_factory):
    out = tmp_path_factory.mktemp("bench")
    args = bench.parse_args(["--quick", "--out", str(out)])
    summary, checks, text = bench.bench(args)
    return out, summary, checks, text


def test_quick_run_writes_table_and_figure(quick):
    """--quick writes the markdown table (the text it prints) and a PNG."""
    out, _, _, printed = quick
    text = (out / "bench_forecast.md").read_text()
    assert text.startswith("# Forecast quality bench")
    assert "## Targets" in text and "## Per family" in text
    assert printed.startswith(text)
    png = (out / "bench_forecast.png").read_bytes()
    assert png[:8] == b"\x89PNG\r\n\x1a\n"


def test_every_family_is_in_the_table(bench, quick):
    """Each scenario family and each variant of the curve families appears in the output."""
    out = quick[0]
    text = (out / "bench_forecast.md").read_text()
    for fam in bench.FAMILIES:
        assert fam in text, fam
    for fam in bench.VARIANT_FAMILIES:
        for var in bench.VARIANTS:
            assert f"| {fam} | {var} |" in text, (fam, var)
    assert "nan" not in text.lower()


def test_quick_figures_are_finite(bench, quick):
    """The summary of a quick run has finite errors and coverages in [0, 1] for every curve
    family, variant and point of progress, and each target is judged or marked n/a."""
    _, summary, checks, _ = quick
    for fam in bench.VARIANT_FAMILIES:
        for var in bench.VARIANTS:
            for frac in bench.PROGRESS:
                row = summary[(fam, var, frac)]
                assert row["n"] >= 1
                assert math.isfinite(row["median"]) and math.isfinite(row["p90"])
                assert 0.0 <= row["median"] <= row["p90"] <= bench.MISSING_ERR
                assert 0.0 <= row["cover"] <= 1.0
    for after in bench.PARAMS["regime_door"]["after_s"]:
        assert math.isfinite(summary[("regime_door", "clean", after)]["median"])
    assert summary[("cycling", "clean", 0.0)]["windows"] > 0
    assert {k[1] for k in summary if k[0] == "asymptote"} == {"warm", "chill"}
    assert checks and all(c.ok in (True, False, None) for c in checks)
    # the centre families also measure the ETA with the shape the predictor picked itself
    for fam in ("centre_slab", "centre_cylinder", "centre_sphere"):
        med, p90 = summary[(fam, "clean", 0.5)]["auto"]
        assert 0.0 <= med <= p90 <= bench.MISSING_ERR


def test_draws_stay_inside_the_fixed_ranges(bench):
    """Every drawn parameter lies inside the range written in PARAMS."""
    rng = np.random.default_rng(3)
    for spec in bench.PARAMS.values():
        for _ in range(50):
            p = bench.draw(spec, rng)
            for key, v in spec.items():
                if isinstance(v, tuple) and len(v) == 3 and v[0] == "log":
                    assert v[1] <= p[key] <= v[2]
                elif isinstance(v, tuple) and len(v) == 2 and all(isinstance(x, float) for x in v):
                    assert v[0] <= p[key] <= v[1]


def test_error_arithmetic(bench):
    """Relative error |eta - true| / true, a missing ETA counted as 1000 %, a non-crossing truth
    left out; coverage counts open interval ends as unbounded."""
    recs = [
        {"eta_true": 100.0, "eta": 110.0, "ok": True, "lo": 90.0, "hi": None},
        {"eta_true": 100.0, "eta": None, "ok": True, "lo": None, "hi": None},
        {"eta_true": None, "eta": 5.0, "ok": True, "lo": 1.0, "hi": 9.0},
        {"eta_true": 200.0, "eta": 150.0, "ok": True, "lo": 160.0, "hi": 190.0},
    ]
    e = bench.rel_errors(recs)
    assert e.tolist() == pytest.approx([0.10, bench.MISSING_ERR, 0.25])
    assert bench.coverage(recs) == pytest.approx(2 / 3)


def test_bad_family_exits_2(bench, capsys):
    """An unknown family is a one-line error and exit code 2."""
    with pytest.raises(SystemExit) as exc:
        bench.parse_args(["--families", "nonesuch"])
    assert exc.value.code == 2
    err = capsys.readouterr().err.strip()
    assert "nonesuch" in err and len(err.splitlines()) == 1


def test_a_failure_at_the_statistical_limit_is_marked(bench):
    """A target is marked "at the limit" only where the CRB-limited figure fails it too."""
    summary = {
        ("chill_fitted", "clean", f): {
            "median": m,
            "p90": 0.01,
            "crb": 1.0,
            "crb_limited": (lim, 0.01),
            "cover": 0.9,
        }
        for f, m, lim in zip(bench.PROGRESS, (0.05, 0.02, 0.01), (0.046, 0.011, 0.007))
    }
    cs = [c for c in bench.checks(summary, ("chill_fitted",)) if c.figure == "median"]
    assert len(cs) == 1 and cs[0].ok is False
    assert cs[0].beyond_limit() == [0]  # 25 %: 5 % against a limit of 4.6 %; 50 %: reachable
    assert cs[0].result().startswith("FAIL (at the limit at 25 %")


def test_readme_block_is_replaced_between_its_markers(tmp_path):
    """--readme rewrites only the bench's own block (markers kept, text around untouched) and
    names the file when the markers are missing."""
    sys.path.insert(0, str(ROOT / "scripts"))
    from readme_block import update_readme

    begin, end = "<!-- b: begin -->", "<!-- b: end -->"
    p = tmp_path / "README.md"
    p.write_text(f"intro\n{begin}\nold table\n{end}\noutro\n")
    assert update_readme(p, f"{begin}\nnew table\n{end}", begin, end) is None
    assert p.read_text() == f"intro\n{begin}\nnew table\n{end}\noutro\n"
    q = tmp_path / "OTHER.md"
    q.write_text("no markers here\n")
    err = update_readme(q, f"{begin}\nx\n{end}", begin, end)
    assert err is not None and str(q) in err and q.read_text() == "no markers here\n"


def _paired_records(family: str, n: int, dirty_scale: float, seed: int) -> list[dict]:
    """Clean and dropouts records of n cases at 50 %: relative errors |N(0, 0.02)|, the dirty
    ones dirty_scale times larger, paired by case index."""
    rng = np.random.default_rng(seed)
    recs = []
    for i in range(n):
        e = abs(rng.normal(0.0, 0.02))
        for variant, scale in (("clean", 1.0), ("dropouts", dirty_scale)):
            recs.append(
                {
                    "family": family,
                    "variant": variant,
                    "progress": 0.5,
                    "index": i,
                    "eta_true": 3600.0,
                    "eta": 3600.0 * (1.0 + scale * e),
                }
            )
    return recs


def test_ratio_range_brackets_the_ratio_and_stands_alone(bench):
    """The bootstrap range of a ratio to the clean figures holds the ratio itself (here exactly
    1.6, every dirty error being 1.6 times its clean one), and it is the same whether or not
    other families ran in the same bench (each figure draws from its own seed)."""
    cyl = _paired_records("centre_cylinder", 200, 1.6, seed=3)
    alone = bench.ratio_ranges(cyl)[("centre_cylinder", "dropouts", 0.5)]
    lo, hi = alone["p90"]
    assert lo == pytest.approx(1.6) and hi == pytest.approx(1.6)
    # errors independent between the variants: the range widens and still holds the ratio
    mixed = _paired_records("centre_sphere", 200, 1.0, seed=4)
    rng = np.random.default_rng(5)
    for r in mixed:
        if r["variant"] == "dropouts":
            r["eta"] = 3600.0 * (1.0 + abs(rng.normal(0.0, 0.03)))
    both = bench.ratio_ranges(cyl + mixed)
    # the sphere's figure comes after the cylinder's: it must not depend on it having run
    key = ("centre_sphere", "dropouts", 0.5)
    assert both[key] == bench.ratio_ranges(mixed)[key]
    assert both[("centre_cylinder", "dropouts", 0.5)] == alone
    clean = bench.rel_errors([r for r in mixed if r["variant"] == "clean"])
    dirty = bench.rel_errors([r for r in mixed if r["variant"] == "dropouts"])
    ratio = np.percentile(dirty, 90) / np.percentile(clean, 90)
    lo, hi = both[("centre_sphere", "dropouts", 0.5)]["p90"]
    assert lo < ratio < hi and hi - lo > 0.2


def test_straight_trend_tells_a_bend_from_a_straight_rise(bench):
    """straight_trend says "bent" for readings that level off clearly, and for a straight rise
    gives the reach of its line: here 0.5 degC/h from 4 degC watched for 2 h, so 8 degC is
    reached 6 h after the newest reading, 3 spans of readings watched."""
    t = np.arange(0.0, 7200.0 + 1.0, 120.0)
    rng = np.random.default_rng(11)
    straight = 4.0 + 0.5 * t / 3600.0 + rng.normal(0.0, 0.02, t.size)
    out = bench.straight_trend(t, straight, 8.0, "upper")
    assert out["bent"] is False
    assert out["trend_reach"] == pytest.approx(3.0, rel=0.05)
    assert out["trend_eta"] == pytest.approx(6 * 3600.0, rel=0.05)
    bent = 6.0 - 5.0 * np.exp(-t / 1800.0) + rng.normal(0.0, 0.02, t.size)
    assert bench.straight_trend(t, bent, 8.0, "upper") == {"bent": True}


def _what_if_summary(bench, asym_reach: float) -> dict:
    """Nine warming cases forecast 0-8 % off and one without an ETA whose straight trend reaches
    3 spans ahead (3.3 h against a true 3 h); twenty asymptotes, two of them straight with a
    trend that reaches ``asym_reach`` spans ahead; linear's median and p90 both 50 %."""
    warm = [(3600.0 * (1 + 0.01 * i), None, None, 3600.0) for i in range(9)]
    warm.append((None, 3.3 * 3600.0, 3.0, 3.0 * 3600.0))
    asym_warm = [(None, None, None, None)] * 8 + [(None, 7200.0, asym_reach, None)] * 2
    asym_chill = [(None, None, None, None)] * 10
    summary = {}
    for f in bench.PROGRESS:
        summary[("warm_fitted", "clean", f)] = {"trend": warm, "linear": (0.5, 0.5)}
        summary[("asymptote", "warm", f)] = {"trend": asym_warm}
        summary[("asymptote", "chill", f)] = {"trend": asym_chill}
    return summary


def test_trend_what_if_trades_the_warming_load_against_the_asymptotes(bench):
    """The what-if takes the straight trend only where the predictor gave no ETA and the trend
    reaches the threshold within the rule; it counts the asymptotes that then get an ETA."""
    rows = {
        r: (med, p90, sh) for r, med, p90, sh in bench.trend_what_if(_what_if_summary(bench, 2))
    }
    errs_none = [0.01 * i for i in range(9)] + [bench.MISSING_ERR]
    errs_taken = [0.01 * i for i in range(9)] + [0.1]
    # reach 1: the warming case keeps no ETA (1000 %), every asymptote keeps "never"
    assert rows[1.0][1][0] == pytest.approx(np.percentile(errs_none, 90) - 0.5)
    assert rows[1.0][2] == [1.0, 1.0, 1.0]
    # reach 2: two asymptotes of twenty get an ETA; the warming case still has none
    assert rows[2.0][2][0] == pytest.approx(0.9)
    assert rows[2.0][1][0] == rows[1.0][1][0]
    # reach 3: the warming case's ETA is 10 % off: median and p90 now below linear's
    assert rows[3.0][0][0] == pytest.approx(np.median(errs_taken) - 0.5)
    assert rows[3.0][1][0] == pytest.approx(np.percentile(errs_taken, 90) - 0.5)
    assert bench.rules_keeping_both(bench.trend_what_if(_what_if_summary(bench, 2))) == []
    assert bench.trend_verdict(bench.trend_what_if(_what_if_summary(bench, 2))).startswith(
        "no reach tried"
    )
    # asymptotes whose trend reaches 5 spans: a reach of 3 or 4 keeps both targets
    what_if = bench.trend_what_if(_what_if_summary(bench, 5))
    assert bench.rules_keeping_both(what_if) == [3.0, 4.0]
    assert bench.trend_verdict(what_if) == "a reach of 3, 4 spans keeps both targets."


def test_misses_split_early_and_late(bench):
    """A crossing before the interval's early end is an early miss, after its late end a late
    miss; an open end cannot be missed, and a failed fit is neither (coverage counts it)."""
    recs = [
        {"ok": True, "eta_true": 100.0, "lo": 150.0, "hi": 300.0},  # early
        {"ok": True, "eta_true": 400.0, "lo": 150.0, "hi": 300.0},  # late
        {"ok": True, "eta_true": 9e9, "lo": 150.0, "hi": None},  # open late end: covered
        {"ok": True, "eta_true": 1.0, "lo": None, "hi": 300.0},  # open early end: covered
        {"ok": True, "eta_true": 200.0, "lo": 150.0, "hi": 300.0},  # inside
        {"ok": False, "eta_true": 200.0, "lo": None, "hi": None},  # failed
        {"ok": True, "eta_true": None, "lo": 150.0, "hi": 300.0},  # never crosses
    ]
    assert bench.misses(recs) == (1, 1)
    assert bench.coverage(recs) == pytest.approx(3 / 6)


def test_replays_of_an_efficient_estimator(bench):
    """Replays draw one |N(0, sd_CRB)| per case: with every case's bound at 2 % of its ETA, the
    replayed median and p90 centre on the half-normal's 0.674 and 1.645 times 2 % (from memory:
    the standard normal's 75th and 95th percentiles), and an rms z of exactly 1 reads 1."""
    recs = [{"eta_true": 3600.0, "crb_sd": 72.0} for _ in range(200)]
    reps = bench.efficient_replays(recs)
    assert reps.shape == (2000, 2)
    assert np.median(reps[:, 0]) == pytest.approx(0.6745 * 0.02, rel=0.03)
    assert np.median(reps[:, 1]) == pytest.approx(1.645 * 0.02, rel=0.03)
    assert np.percentile(reps[:, 1], 5) < 1.645 * 0.02 < np.percentile(reps[:, 1], 95)
    signed = [dict(r, eta=3600.0 + (72.0 if i % 2 else -72.0)) for i, r in enumerate(recs)]
    assert bench.z_rms(signed) == pytest.approx(1.0)
    assert bench.z_rms([dict(r, eta=3600.0 + 144.0) for r in recs]) == pytest.approx(2.0)


def test_a_reachable_failure_says_how_often_an_efficient_one_fails(bench):
    """A failed p90 at a point an efficient estimator meets on average (50 % here) gets the
    replays' range and how often they fail; a point at the limit (25 %) keeps its own mark and
    is not repeated; a point that passes (75 %) is not named."""
    bound = 0.04
    sizes = (0.05, bound / 1.645, 0.001)  # crb_sd / eta_true at 25, 50, 75 %
    summary = {}
    for frac, rel, p90 in zip(bench.PROGRESS, sizes, (0.2, 0.045, 0.01)):
        recs = [
            {"eta_true": 1000.0, "crb_sd": 1000.0 * rel, "eta": 1000.0 + 1000.0 * rel}
            for _ in range(200)
        ]
        summary[("chill_fitted", "clean", frac)] = {
            "median": 0.01,
            "p90": p90,
            "crb": 1.0,
            "crb_limited": bench.crb_limited(recs),
            "efficient": bench.efficient_replays(recs),
            "z_rms": bench.z_rms(recs),
            "cover": 0.9,
        }
    (c,) = [c for c in bench.checks(summary, ("chill_fitted",)) if c.figure == "p90"]
    assert c.ok is False and c.beyond_limit() == [0]
    text = c.result()
    assert text.startswith("FAIL (at the limit at 25 %: CRB-limited")
    assert "at 50 %: an efficient unbiased estimator's p90 on these cases is" in text
    assert "at 75 %" not in text and "rms z 1.00" in text
    share = float(text.split("over 4 % in ")[1].split(" %")[0])
    assert 30 <= share <= 70  # the bound sits at the replays' centre


def test_calibrated_coverage_note(bench):
    """With every late end open, a calibrated 90 % interval can miss only its lower 5 % tail:
    10 of 200 on average; 5 misses or fewer then happen in 6 % of runs (the binomial sum,
    worked here with math.comb); with no end open it misses 20, and 30 or more happen in 1.6 %."""
    rows = [{"n": 200, "open_hi": 200}, {"n": 200, "open_hi": 0}]
    text = bench.calibrated_note(rows, [0.975, 0.85])
    assert "misses 10.0 / 20.0 on average, against 5 / 30 seen" in text
    low = sum(math.comb(200, i) * 0.05**i * 0.95 ** (200 - i) for i in range(6))
    high = sum(math.comb(200, i) * 0.1**i * 0.9 ** (200 - i) for i in range(30, 201))
    assert f"{100 * low:.0f} % / {100 * high:.0f} % of runs" in text
    assert round(100 * low) == 6 and round(100 * high, 1) == 1.6
