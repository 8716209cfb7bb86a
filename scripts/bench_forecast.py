#!/usr/bin/env python3
"""Forecast quality bench: the predictor against the baselines and the Cramer-Rao bound.

Runs ``thermeta.predictors.forecast`` over seeded scenario families with known truth (the
package scripts/forecast_bench, see its __init__), at 25, 50 and 75 % of the time to the true
crossing, prints the tables with PASS / FAIL per target and writes docs/bench_forecast.md.

    python scripts/bench_forecast.py                 # the full run, a worker per CPU
    python scripts/bench_forecast.py --quick         # a smoke run, a few cases per family
    python scripts/bench_forecast.py --families chill_fitted,two_node --cases 100 --jobs 2
    python scripts/bench_forecast.py --readme        # also the README's block
"""

from __future__ import annotations

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
# the bench's names, for scripts and tests that load this file as a module
from forecast_bench import misspecified  # noqa: E402, F401
from forecast_bench.cases import *  # noqa: E402, F403
from forecast_bench.cli import *  # noqa: E402, F403
from forecast_bench.cli import main  # noqa: E402
from forecast_bench.judge import *  # noqa: E402, F403
from forecast_bench.params import *  # noqa: E402, F403
from forecast_bench.report import *  # noqa: E402, F403
from forecast_bench.runs import *  # noqa: E402, F403
from forecast_bench.stats import *  # noqa: E402, F403

if __name__ == "__main__":
    sys.exit(main())
