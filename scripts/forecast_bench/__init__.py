"""The forecast quality bench, run as ``python scripts/bench_forecast.py``.

params.py        scenario families and their ranges, fixed before any result was seen
misspecified.py  objects that are not one exponential, truth from solve_ivp
cases.py         one case at one point of progress: readings and what the forecast is told
runs.py          the predictor and the baselines over the cases (a unit of work per case)
stats.py         errors, coverage, the Cramer-Rao-limited figures
judge.py         the targets and their PASS / FAIL
report.py        the markdown, the README's block, the figure
cli.py           the command line and the worker pool
"""
