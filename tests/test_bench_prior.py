"""The priors bench (scripts/bench_prior.py): one family's quick run, its arithmetic on a case.

Checks the instrument, not the figures it reports (those are the bench's output)."""

from __future__ import annotations

import importlib.util
import math
import sys
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent


def load():
    sys.path.insert(0, str(ROOT / "scripts"))
    spec = importlib.util.spec_from_file_location(
        "bench_prior", ROOT / "scripts" / "bench_prior.py"
    )
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def test_quick_run_prints_every_variant(capsys):
    """--quick on the chilled-liquid family prints one row per prior variant plus the gain row,
    and an unknown family is refused with exit 2."""
    b = load()
    assert b.main(["--quick", "--families", "chill_fitted"]) == 0
    out = capsys.readouterr().out
    rows = [r for r in out.splitlines() if r.startswith("| chill_fitted |")]
    assert [r.split("|")[2].strip() for r in rows[:-1]] == list(b.VARIANTS)
    assert "earlier by" in rows[-1]
    assert b.main(["--families", "nope"]) == 2


def test_first_within_is_the_start_of_the_last_good_run():
    """run_case's "first" is the grid point after the last error above 10 %: recomputed here from
    the case's own error series, and a right prior learned 8 of 8 chilling episodes."""
    b = load()
    c = b.run_case("chill_fitted", 11)
    assert c["n_episodes"] == b.N_PAST
    for v in b.VARIANTS:
        errs, first = c[v]["errs"], c[v]["first"]
        assert errs.size == b.GRID.size
        if math.isfinite(first):
            i = int(np.nonzero(b.GRID == first)[0][0])
            assert np.all(errs[i:] <= b.WITHIN)
            assert i == 0 or errs[i - 1] > b.WITHIN
