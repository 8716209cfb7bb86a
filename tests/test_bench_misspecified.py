"""The forecast bench's misspecified families (scripts/forecast_bench/misspecified.py): their
truth is the ODE solved by scipy.integrate.solve_ivp, checked here against closed forms."""

from __future__ import annotations

import math
import sys
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "scripts"))
from forecast_bench import misspecified as ms  # noqa: E402


def test_one_exponential_families_follow_newtons_law():
    """The AR(1) and coarse-step families' truth is Newton's law: solve_ivp's trajectory equals
    Ta + (T0 - Ta) e^(-t / tau) (the published law) to 1e-6 degC, and the case's crossing is the
    closed form ln((T0 - Ta) / (thr - Ta)) tau."""
    for family in ("ar1_noise", "quantised"):
        rng = np.random.default_rng([2026, ms.FAMILIES.index(family), 0, 21, 0])
        p = ms.draw(ms.PARAMS[family], rng)
        tr = ms.build(family, p)
        x = np.linspace(0.0, 3 * p["tau_s"], 50)
        sol = ms.solve(tr, float(x[-1]), t_eval=x)
        T0 = float(tr.x0[0])
        closed = p["ambient"] + (T0 - p["ambient"]) * np.exp(-x / p["tau_s"])
        assert np.allclose(sol.y[0], closed, atol=1e-6)
        case = ms.make_case(family, 0, 2026)
        expected = math.log((T0 - p["ambient"]) / (case.threshold - p["ambient"])) * p["tau_s"]
        assert case.crossing_s == pytest.approx(expected, rel=1e-6)


def test_two_node_rates_are_the_systems_eigenvalues():
    """A two-node case's content relaxes with the two rates of its system matrix (numpy's
    eigenvalues): ln|T1 - Ta| late in the episode falls at the slow rate."""
    rng = np.random.default_rng([2026, ms.FAMILIES.index("two_node"), 1, 21, 0])
    p = ms.draw(ms.PARAMS["two_node"], rng)
    tr = ms.build("two_node", p)
    tau, share = p["tau_s"], p["container_share"]
    c1, c2 = 1.0 - share, share
    g = c1 / (p["coupling"] * tau)
    A = np.array([[-g / c1, g / c1], [g / c2, -(g + 1.0 / tau) / c2]])
    slow = float(np.min(-np.linalg.eigvals(A).real))
    x = np.array([3.0, 4.0]) * tau
    sol = ms.solve(tr, float(x[-1]), t_eval=x)
    gap = np.abs(sol.y[0] - p["ambient"])
    assert -np.log(gap[1] / gap[0]) / tau == pytest.approx(slow, rel=1e-3)


def test_every_family_gives_cases_that_cross_later():
    """Every family's seeded cases cross their threshold after the readings cut at 25 / 50 /
    75 % of the time to it, the threshold lies between the first value and the level the truth
    settles at, and the readings are the same for each cut (one noise realisation)."""
    for family in ms.FAMILIES:
        for index in range(3):
            case = ms.make_case(family, index, 2026)
            assert case.crossing_s > 0
            etas = []
            for frac in ms.PROGRESS:
                t, y, eta = ms.cut(case, frac)
                assert eta > 0
                assert np.array_equal(y, case.y[: t.size])
                etas.append(eta)
            assert etas == sorted(etas, reverse=True)
