"""The conduction eigen-solver and centre series against published tables and scipy's own
solvers."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import brentq
from scipy.special import j0, j1
from thermeta.daemon.simulation.synth_conduction import centre_mol
from thermeta.predictors.conduction_series import (
    FO_CUT,
    GEOMETRIES,
    SHAPE_FACTOR,
    centre_coefficients,
    eigenvalues,
    first_term,
    theta_centre,
    theta_centre_series,
)

# Incropera & DeWitt, Fundamentals of Heat and Mass Transfer, Table 5.1 (from memory):
# (geometry, Bi) -> (zeta_1, C_1), four decimals.
TABLE_5_1 = {
    ("slab", 0.1): (0.3111, 1.0161),
    ("cylinder", 0.1): (0.4417, 1.0246),
    ("sphere", 0.1): (0.5423, 1.0298),
    ("slab", 1.0): (0.8603, 1.1191),
    ("cylinder", 1.0): (1.2558, 1.2071),
    ("sphere", 1.0): (1.5708, 1.2732),
    ("slab", 10.0): (1.4289, 1.2620),
    ("cylinder", 10.0): (2.1795, 1.5677),
    ("sphere", 10.0): (2.8363, 1.9249),
}


@pytest.mark.parametrize(("key", "expected"), sorted(TABLE_5_1.items()))
def test_first_term_matches_incropera_table_5_1(key, expected):
    """zeta_1 and C_1 reproduce Incropera & DeWitt Table 5.1 (from memory) to its 4 decimals."""
    geometry, bi = key
    z1, c1 = first_term(geometry, bi)
    assert float(z1) == pytest.approx(expected[0], abs=6e-5)
    assert float(c1) == pytest.approx(expected[1], abs=6e-5)


def _brentq_roots(geometry: str, bi: float, n: int) -> np.ndarray:
    """Roots of the textbook eigen-equations, each bracketed by a sign change found by scanning."""
    if geometry == "slab":

        def f(z):  # z tan z = Bi, multiplied through by cos z
            return z * np.sin(z) - bi * np.cos(z)
    elif geometry == "sphere":

        def f(z):  # 1 - z cot z = Bi, multiplied through by sin z
            return (1 - bi) * np.sin(z) - z * np.cos(z)
    else:

        def f(z):  # z J1(z) / J0(z) = Bi, multiplied through by J0
            return z * j1(z) - bi * j0(z)

    xs = np.linspace(1e-9, (n + 1) * np.pi, 40000 * (n + 1))
    fs = f(xs)
    idx = np.nonzero(np.sign(fs[:-1]) * np.sign(fs[1:]) < 0)[0]
    roots = [brentq(f, xs[i], xs[i + 1], xtol=1e-15) for i in idx]
    return np.array(roots[:n])


@pytest.mark.parametrize("geometry", GEOMETRIES)
@pytest.mark.parametrize("bi", [1e-3, 0.05, 0.7, 6.0, 100.0])
def test_eigenvalues_agree_with_scipy_brentq(geometry, bi):
    """The vectorised solver finds the same first 12 roots as scipy.optimize.brentq on a scan."""
    ours = eigenvalues(geometry, bi, 12)
    ref = _brentq_roots(geometry, bi, 12)
    np.testing.assert_allclose(ours, ref, rtol=1e-11, atol=1e-12)


def test_eigenvalues_broadcast_over_biot_arrays():
    """An array of Bi gives one row of roots per Bi, the same as solving each alone."""
    bis = np.array([[0.01, 0.3], [2.0, 40.0]])
    z = eigenvalues("cylinder", bis, 5)
    assert z.shape == (2, 2, 5)
    np.testing.assert_allclose(z[1, 0], eigenvalues("cylinder", 2.0, 5), rtol=1e-13)


@pytest.mark.parametrize("bad", [0.0, -1.0, np.nan, 1e7])
def test_eigenvalues_reject_bad_biot(bad):
    """Bi outside the solver's range is a ValueError naming the range."""
    with pytest.raises(ValueError, match="biot must lie"):
        eigenvalues("slab", bad)


def test_unknown_geometry_is_rejected():
    """A geometry name other than slab/cylinder/sphere is a ValueError."""
    with pytest.raises(ValueError, match="geometry"):
        eigenvalues("cube", 1.0)


@pytest.mark.parametrize("geometry", ["slab", "cylinder"])
def test_series_at_fo_zero_sums_to_one(geometry):
    """At Fo = 0 the centre series sums to the uniform initial state (Fourier-series completeness);
    the partial sums converge slowly (alternating), so the mean of two successive ones is used."""
    c = centre_coefficients(geometry, eigenvalues(geometry, 2.0, 4001))
    partial = np.cumsum(c)
    assert 0.5 * (partial[-1] + partial[-2]) == pytest.approx(1.0, abs=2e-3)


@pytest.mark.parametrize("geometry", GEOMETRIES)
@pytest.mark.parametrize("bi", [1e-3, 1.0, 100.0])
def test_early_lag_centre_has_not_moved(geometry, bi):
    """Just after the step the centre still reads Ti: with 400 terms theta = 1 to 1e-9 at small Fo,
    and the clamped default series agrees with 400 terms everywhere (the sphere's series does not
    converge at Fo = 0 itself, so small positive Fo is used)."""
    fo = np.array([1e-3, 2e-3, FO_CUT, 0.006])
    assert np.all(np.abs(theta_centre_series(fo, bi, geometry, 400) - 1.0) < 1e-9)
    fo_all = np.concatenate([[0.0], np.geomspace(1e-4, 5.0, 200)])
    np.testing.assert_allclose(
        theta_centre(fo_all, bi, geometry),
        theta_centre_series(np.maximum(fo_all, 1e-3), bi, geometry, 400),
        atol=1e-9,
    )


@pytest.mark.parametrize("geometry", GEOMETRIES)
def test_small_biot_is_the_lumped_exponential(geometry):
    """For Bi = 1e-3 the centre follows exp(-m Bi Fo), m = 1/2/3 for slab/cylinder/sphere (the
    lumped limit, Incropera & DeWitt sec. 5.2, from memory), to 0.1 %."""
    bi = 1e-3
    fo = np.linspace(0.0, 3000.0, 50)
    lumped = np.exp(-SHAPE_FACTOR[geometry] * bi * fo)
    np.testing.assert_allclose(theta_centre(fo, bi, geometry), lumped, rtol=1e-3, atol=2e-4)


@pytest.mark.parametrize(("geometry", "bi"), [("slab", 3.0), ("cylinder", 0.5), ("sphere", 8.0)])
def test_series_matches_method_of_lines_with_solve_ivp(geometry, bi):
    """The centre series equals an independent finite-volume method-of-lines solution of the heat
    equation integrated by scipy.integrate.solve_ivp (BDF), including the early lag."""
    fo = np.linspace(0.0, 1.5, 61)
    ref = centre_mol(geometry, bi, fo, lambda f: np.zeros_like(f), t_i=1.0, n_cells=160)
    np.testing.assert_allclose(theta_centre(fo, bi, geometry), ref, atol=1e-4)
