"""Seeded core-probe readings with known truth, and an independent heat-equation reference.

:func:`centre_mol` integrates the heat equation by a finite-volume method of lines with
``scipy.integrate.solve_ivp`` (no series, no eigenvalues), for any ambient history; it is the
reference the series is tested against and the truth for measured-ambient cases.
:func:`core_probe` draws readings of a probe at the centre of a slab, cylinder or sphere.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
from numpy.typing import NDArray
from scipy.integrate import solve_ivp
from scipy.optimize import brentq
from scipy.sparse import csr_matrix
from thermeta.daemon.simulation.synth import T_START, Corruption, Synth, corrupt, sample_times
from thermeta.predictors.conduction_series import GEOMETRIES, theta_centre

Float = NDArray[np.float64]


def centre_mol(
    geometry: str,
    biot: float,
    fo: Float,
    ambient_of_fo: Callable[[Float], Float],
    t_i: float,
    n_cells: int = 120,
) -> Float:
    """Centre temperature at Fourier numbers ``fo`` for a body at uniform ``t_i`` whose surface
    convects (Biot number ``biot``) to an ambient ``ambient_of_fo(fo)``.

    In rho = r / L and Fo:  dT/dFo = rho^-p d/drho (rho^p dT/drho), p = 0, 1, 2 (slab, cylinder,
    sphere);  -dT/drho = Bi (T - Ta) at rho = 1;  symmetry at rho = 0.  Finite volumes of width
    1/n_cells; the centre value is the quadratic through the two innermost cell values.
    """
    if geometry not in GEOMETRIES:
        raise ValueError(f"geometry must be one of {', '.join(GEOMETRIES)}")
    p = GEOMETRIES.index(geometry)
    m = p + 1
    dr = 1.0 / n_cells
    faces = np.arange(n_cells + 1) * dr
    vol = (faces[1:] ** m - faces[:-1] ** m) / m
    area = faces**p
    # Conductance between neighbouring cells (face i+1) and from the last cell to the fluid.
    g_in = area[1:-1] / dr
    g_out = area[-1] / (0.5 * dr + 1.0 / biot)
    mat = np.zeros((n_cells, n_cells))
    idx = np.arange(n_cells - 1)
    mat[idx, idx] -= g_in
    mat[idx + 1, idx + 1] -= g_in
    mat[idx, idx + 1] += g_in
    mat[idx + 1, idx] += g_in
    mat[-1, -1] -= g_out
    mat /= vol[:, None]
    # Sparse (tridiagonal): cheap products and LU in the implicit solver, no BLAS threads.
    mat = csr_matrix(mat)
    src = np.zeros(n_cells)
    src[-1] = g_out / vol[-1]

    def rhs(f: float, temp: Float) -> Float:
        return mat @ temp + src * float(ambient_of_fo(np.array([f]))[0])

    fo = np.asarray(fo, dtype=float)
    sol = solve_ivp(
        rhs,
        (0.0, float(fo.max())),
        np.full(n_cells, float(t_i)),
        method="BDF",
        t_eval=fo,
        jac=mat,
        rtol=1e-9,
        atol=1e-11,
    )
    if not sol.success:
        raise RuntimeError(f"solve_ivp failed: {sol.message}")
    return (9.0 * sol.y[0] - sol.y[1]) / 8.0


def _first_crossing(f: Callable[[Float], Float], thr: float, t_max: float) -> float | None:
    """The first time in [0, t_max] where ``f`` (vectorised) crosses ``thr``: a sign change on a
    grid of 2001 points, refined by brentq; None when there is none."""
    grid = np.linspace(0.0, t_max, 2001)
    v = np.asarray(f(grid), dtype=float) - thr
    sign_change = np.nonzero(np.sign(v[1:]) != np.sign(v[:-1]))[0]
    if v[0] == 0.0:
        return 0.0
    if sign_change.size == 0:
        return None
    i = int(sign_change[0])
    return float(
        brentq(lambda t: float(f(np.array([t]))[0]) - thr, grid[i], grid[i + 1], xtol=1e-3)
    )


def core_probe(
    seed: int,
    *,
    geometry: str,
    biot: float,
    a_per_s: float,
    t_i: float,
    ambient: float,
    threshold: float,
    seen_fraction: float,
    dt_s: float = 60.0,
    corruption: Corruption | None = None,
    ambient_rise: float = 0.0,
    ambient_k_per_s: float = 0.0,
    t_start: float = T_START,
) -> Synth:
    """A centre probe from an episode start at ``t_start`` until it has gone ``seen_fraction``
    of the way (in time) to its true crossing of ``threshold``.

    With ``ambient_rise`` the ambient is measured and drifts: Ta(t) = ambient + ambient_rise
    (1 - exp(-ambient_k t)) (air warming toward the outside); the truth then comes from
    :func:`centre_mol`, else from the series.  The ambient series (noise-free, every dt_s) is
    returned in ``ambient_t``/``ambient_y`` when it drifts.
    """
    rng = np.random.default_rng(seed)
    c = corruption or Corruption()
    drifting = ambient_rise != 0.0

    def amb_abs(t_rel: Float) -> Float:
        return ambient + ambient_rise * (1.0 - np.exp(-ambient_k_per_s * np.asarray(t_rel)))

    if drifting:
        horizon = 30.0 / a_per_s
        fo_grid = np.linspace(0.0, horizon * a_per_s, 12001)
        truth_grid = centre_mol(geometry, biot, fo_grid, lambda f: amb_abs(f / a_per_s), t_i)
        t_grid = fo_grid / a_per_s

        def truth(t_rel: Float) -> Float:
            return np.interp(t_rel, t_grid, truth_grid)
    else:
        horizon = 30.0 / a_per_s

        def truth(t_rel: Float) -> Float:
            return ambient + (t_i - ambient) * theta_centre(
                a_per_s * np.asarray(t_rel), biot, geometry
            )

    cross = _first_crossing(truth, threshold, horizon)
    if cross is None or cross == 0.0:
        raise ValueError("this case never crosses the threshold (or starts past it)")
    duration = seen_fraction * cross
    x = sample_times(rng, duration, dt_s, c)
    clean = truth(x)
    xs, y, clean, spikes = corrupt(rng, x, clean, c)
    x_last = float(x.max())
    out = Synth(
        t=xs + t_start,
        y=y,
        threshold=threshold,
        eta_true_s=cross - x_last,
        crossing_t_true=t_start + cross,
        t_last=t_start + x_last,
        truth={
            "geometry_index": float(GEOMETRIES.index(geometry)),
            "biot": biot,
            "a_per_s": a_per_s,
            "Ti": t_i,
            "ambient": ambient,
            "t0": t_start,
        },
        y_clean=clean,
        spike_mask=spikes,
    )
    if drifting:
        out.ambient_t = np.arange(0.0, x_last + 0.5 * dt_s, dt_s) + t_start
        out.ambient_y = amb_abs(out.ambient_t - t_start)
    return out
