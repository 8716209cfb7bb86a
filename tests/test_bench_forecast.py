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
    assert "PASS" in text or "FAIL" in text
    assert printed.startswith(text)
    png = (out / "bench_forecast.png").read_bytes()  # drawn: it did not exist yet
    assert png[:8] == b"\x89PNG\r\n\x1a\n"


def test_every_family_is_in_the_table(bench, quick):
    """Each scenario family and each variant of the curve families appears in the output."""
    out = quick[0]
    text = (out / "bench_forecast.md").read_text()
    for fam in bench.FAMILIES:
        assert fam in text, fam
    for fam in bench.misspecified.FAMILIES:
        assert f"| {fam} | given |" in text and f"| {fam} | fitted |" in text
    for fam in bench.VARIANT_FAMILIES:
        for var in bench.VARIANTS:
            assert f"| {fam} | {var} |" in text, (fam, var)
    assert "nan" not in text.lower()


def test_readme_block_is_short_and_names_every_family(quick):
    """The README's block is a summary (one row per family, no variants' rows, under 40
    lines) between its markers; every target not met is named in it."""
    from forecast_bench import misspecified
    from forecast_bench.params import VARIANT_FAMILIES
    from forecast_bench.report import README_BEGIN, README_END, readme_block

    _, summary, checks, _ = quick
    meta = {"command": "x", "elapsed_s": 1.0, "jobs": 1, "seed": 1, "commit": "c"}
    block = readme_block(summary, checks, meta)
    lines = block.splitlines()
    assert lines[0] == README_BEGIN and lines[-1] == README_END and len(lines) < 40
    for fam in (*VARIANT_FAMILIES, *misspecified.FAMILIES):
        assert sum(line.startswith(f"| {fam} |") for line in lines) == 1, fam
    for c in checks:
        if c.ok is False:
            assert c.target in block
    assert "nan" not in block.lower()


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


def _row(median, p90, limited, crb=1.0, cover=0.9, closed=0.9):
    return {
        "median": median,
        "p90": p90,
        "crb": crb,
        "crb_limited": limited,
        "cover": cover,
        "cover_closed": closed,
    }


def test_figures_are_judged_against_the_bound_on_the_same_cases(bench):
    """A median passes within 1.3 x the Cramer-Rao-limited median of the same cases (25 %: 5.0
    against 4.6, 1.09 x) and fails beyond it (50 %: 2 % against 1.1 %); a figure under the floor
    (0.2 %) passes whatever the bound."""
    summary = {
        ("chill_fitted", "clean", f): _row(m, 0.01, (lim, 0.01))
        for f, m, lim in zip(bench.PROGRESS, (0.05, 0.02, 0.001), (0.046, 0.011, 0.0001))
    }
    (c,) = [
        c
        for c in bench.checks(summary, ("chill_fitted",))
        if c.figure.startswith("median") and c.target == "chill_fitted, clean"
    ]
    assert c.values == pytest.approx([0.05 / 0.046, 0.02 / 0.011, 1.0])
    assert c.ok is False and c.result() == "FAIL"
    summary[("chill_fitted", "clean", 0.5)] = _row(0.014, 0.01, (0.011, 0.01))
    (c,) = [
        c
        for c in bench.checks(summary, ("chill_fitted",))
        if c.figure.startswith("median") and c.target == "chill_fitted, clean"
    ]
    assert c.ok is True and c.result() == "PASS"


def test_coverage_is_one_sided_where_the_late_end_is_open(bench):
    """Coverage passes at 97 % overall when the closed intervals alone cover 92 % (the open
    ones can only miss early), and fails at 97 % when the closed ones cover 97 % too, or below
    85 % whatever the closed ones do."""

    def cover_check(cover, closed):
        summary = {
            ("warm_fitted", "clean", f): _row(0.01, 0.02, (0.01, 0.02), cover=cover, closed=closed)
            for f in bench.PROGRESS
        }
        (c,) = [
            c
            for c in bench.checks(summary, ("warm_fitted",))
            if c.figure.startswith("90 %") and c.target == "warm_fitted, clean"
        ]
        return c.ok

    assert cover_check(0.97, 0.92) is True
    assert cover_check(0.97, 0.97) is False
    assert cover_check(0.84, 0.90) is False
    assert cover_check(0.90, math.nan) is True


def test_misspecified_families_are_judged_against_both_baselines(bench):
    """A misspecified family passes when its pooled median and p90 lie below the better of the
    straight line's and the plain curve_fit's on the same cases."""
    errs = np.array([0.01, 0.02, 0.03, 0.04, 0.5])
    line = np.array([0.2, 0.3, 0.3, 0.4, 0.6])
    lsq = np.array([0.02, 0.02, 0.02, 0.02, 0.02])
    summary = {
        ("two_node/given", "clean", 0.5): {
            "errors": errs,
            "linear_errors": line,
            "lsq3_errors": lsq,
            "n": 5,
            "cover": 0.9,
        }
    }
    cs = [c for c in bench.checks(summary, ("two_node",)) if c.target.endswith("two_node/given")]
    med, p90 = cs
    assert med.ok is False  # 3 % against curve_fit's 2 %
    assert p90.ok is False and p90.values[0] == pytest.approx(np.percentile(errs, 90) / 0.02)
    summary[("two_node/given", "clean", 0.5)]["lsq3_errors"] = line
    med, p90 = [c for c in bench.checks(summary, ("two_node",)) if c.target.endswith("given")]
    assert med.ok is True and p90.ok is True


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
