"""Exact series solution of transient conduction at the centre of a slab, long cylinder or sphere.

A body at uniform initial temperature Ti is exposed at t = 0 to a fluid at Ta with a surface heat
transfer coefficient h.  With L the half-thickness (slab) or the outer radius (cylinder, sphere),
alpha the thermal diffusivity and k_s the solid's conductivity:

    Bi = h L / k_s,   Fo = alpha t / L^2,   theta = (T - Ta) / (Ti - Ta)

and the centre temperature is the series

    theta_centre(Fo) = sum_n C_n exp(-zeta_n^2 Fo)

with the eigenvalues zeta_n the positive roots of

    slab:      zeta tan zeta = Bi
    cylinder:  zeta J1(zeta) / J0(zeta) = Bi
    sphere:    1 - zeta cot zeta = Bi

and the centre coefficients

    slab:      C_n = 4 sin z / (2 z + sin 2z)
    cylinder:  C_n = (2 / z) J1(z) / (J0(z)^2 + J1(z)^2)
    sphere:    C_n = 4 (sin z - z cos z) / (2 z - sin 2z)

C_1 is the lag factor j of the centre; zeta_1^2 alpha / L^2 is the late-time exponential rate.  For
small Bi, zeta_1^2 -> m Bi (m = 1, 2, 3 for slab, cylinder, sphere) and C_1 -> 1: the lumped model.

The roots are found for all branches at once: each branch n lies in a known bracket, an initial
guess comes from a table over log Bi (built once per geometry by bisection), and a few
bracket-safeguarded Newton steps polish it to machine precision.  Everything broadcasts over
arrays of Bi, so a fit and its interval can evaluate many Biot numbers per call.
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.special import j0, j1, jn_zeros

GEOMETRIES = ("slab", "cylinder", "sphere")
# Lumped limit: k = m * Bi * alpha / L^2 (m = surface area * L / volume).
SHAPE_FACTOR = {"slab": 1, "cylinder": 2, "sphere": 3}

BIOT_MIN = 1e-5
BIOT_MAX = 1e4
# Terms used by theta_centre: with Fo > FO_CUT the omitted terms are below exp(-zeta_N^2 FO_CUT),
# which is < 1e-15 for N = 30 in every geometry (zeta_30 > 29 pi).  At Fo <= FO_CUT the centre has
# not yet felt the surface (1 - theta < 1e-9 there, checked in the tests), so theta = 1.
N_TERMS = 30
FO_CUT = 0.004
FO_FEW = 0.06
N_FEW = 8
_TABLE_TERMS = 64
NEWTON_MAX = 6
NEWTON_RTOL = 4 * np.finfo(float).eps
_TABLE_POINTS = 241

Float = NDArray[np.float64]


def _check_geometry(geometry: str) -> None:
    if geometry not in GEOMETRIES:
        raise ValueError(f"geometry must be one of {', '.join(GEOMETRIES)}, got {geometry!r}")


@lru_cache(maxsize=16)
def _brackets(geometry: str, n_terms: int) -> tuple[Float, Float]:
    """Lower and upper ends of the bracket holding root n (n = 1..n_terms) for any Bi > 0."""
    n = np.arange(1, n_terms + 1, dtype=float)
    if geometry == "slab":
        return (n - 1) * np.pi, (n - 1) * np.pi + np.pi / 2
    if geometry == "sphere":
        return (n - 1) * np.pi, n * np.pi
    # Cylinder: between the (n-1)th zero of J1 (Bi -> 0; the 0th is 0) and the nth zero of J0.
    j1z = np.concatenate(([0.0], jn_zeros(1, n_terms - 1))) if n_terms > 1 else np.zeros(1)
    return j1z, jn_zeros(0, n_terms)


def _f_and_df(geometry: str, z: Float, bi: Float) -> tuple[Float, Float]:
    """Root function F(z; Bi) written without poles, and dF/dz."""
    if geometry == "slab":
        # F = z sin z - Bi cos z
        s, c = np.sin(z), np.cos(z)
        return z * s - bi * c, s + z * c + bi * s
    if geometry == "sphere":
        # F = (1 - Bi) sin z - z cos z
        s, c = np.sin(z), np.cos(z)
        return (1.0 - bi) * s - z * c, -bi * c + z * s
    # F = z J1(z) - Bi J0(z);  d(z J1)/dz = z J0,  dJ0/dz = -J1
    a0, a1 = j0(z), j1(z)
    return z * a1 - bi * a0, z * a0 + bi * a1


def _sign_at_lower(n_terms: int) -> Float:
    """Sign of F at each bracket's lower end: (-1)^n in all three geometries (F(0+) = -Bi z)."""
    return np.where(np.arange(1, n_terms + 1) % 2 == 0, 1.0, -1.0)


def _bisect(geometry: str, bi: Float, lo: Float, hi: Float, s_lo: Float, iters: int) -> Float:
    lo, hi = np.broadcast_arrays(lo, hi)
    lo, hi = lo.copy(), hi.copy()
    for _ in range(iters):
        mid = 0.5 * (lo + hi)
        f, _ = _f_and_df(geometry, mid, bi)
        same = np.sign(f) == s_lo
        lo = np.where(same, mid, lo)
        hi = np.where(same, hi, mid)
    return 0.5 * (lo + hi)


@lru_cache(maxsize=8)
def _table(geometry: str) -> tuple[Float, Float]:
    """zeta_n on a grid of log Bi, by bisection: the initial guesses for Newton."""
    log_bi = np.linspace(np.log(BIOT_MIN), np.log(BIOT_MAX), _TABLE_POINTS)
    lo, hi = _brackets(geometry, _TABLE_TERMS)
    bi = np.exp(log_bi)[:, None]
    z = _bisect(geometry, bi, lo[None, :], hi[None, :], _sign_at_lower(_TABLE_TERMS), 56)
    return log_bi, z


def eigenvalues(geometry: str, biot: ArrayLike, n_terms: int = N_TERMS) -> Float:
    """The first ``n_terms`` eigenvalues zeta_n for each Biot number.

    biot: scalar or array (BIOT_MIN..BIOT_MAX); returns shape ``np.shape(biot) + (n_terms,)``.
    """
    _check_geometry(geometry)
    if n_terms < 1:
        raise ValueError(f"n_terms must be >= 1, got {n_terms}")
    bi = np.asarray(biot, dtype=float)
    if not np.all(np.isfinite(bi)) or np.any(bi < BIOT_MIN) or np.any(bi > BIOT_MAX):
        raise ValueError(f"biot must lie in [{BIOT_MIN:g}, {BIOT_MAX:g}], got {biot!r}")
    lo, hi = _brackets(geometry, n_terms)
    s_lo = _sign_at_lower(n_terms)
    bi_b = bi[..., None]
    n_tab = min(n_terms, _TABLE_TERMS)
    log_bi_grid, z_tab = _table(geometry)
    # Table guess, interpolated in log Bi, for the first branches; bisection for any further ones.
    pos = np.interp(np.log(bi).ravel(), log_bi_grid, np.arange(log_bi_grid.size))
    i0 = np.clip(np.floor(pos).astype(int), 0, log_bi_grid.size - 2)
    w = (pos - i0)[:, None]
    guess = ((1 - w) * z_tab[i0, :n_tab] + w * z_tab[i0 + 1, :n_tab]).reshape(bi.shape + (n_tab,))
    if n_terms > n_tab:
        rest = _bisect(geometry, bi_b, lo[n_tab:], hi[n_tab:], s_lo[n_tab:], 56)
        guess = np.concatenate([guess, rest], axis=-1)
    lo = np.broadcast_to(lo, guess.shape).copy()
    hi = np.broadcast_to(hi, guess.shape).copy()
    z = guess
    for _ in range(NEWTON_MAX):
        f, df = _f_and_df(geometry, z, bi_b)
        same = np.sign(f) == s_lo
        lo = np.where(same, z, lo)
        hi = np.where(same, hi, z)
        with np.errstate(divide="ignore", invalid="ignore"):
            step = f / df
        z_new = z - step
        # Newton steps that leave the bracket fall back to its midpoint.
        bad = ~np.isfinite(z_new) | (z_new < lo) | (z_new > hi)
        z_new = np.where(bad, 0.5 * (lo + hi), z_new)
        # from the table's guess (relative error ~2e-4) Newton converges quadratically: a few
        # ulps after 3 steps; stop once no root moved by more than that
        done = np.all(np.abs(z_new - z) <= NEWTON_RTOL * np.abs(z_new))
        z = z_new
        if done:
            break
    return z


def centre_coefficients(geometry: str, zeta: ArrayLike) -> Float:
    """C_n at the centre for eigenvalues ``zeta`` (any shape)."""
    _check_geometry(geometry)
    z = np.asarray(zeta, dtype=float)
    if geometry == "slab":
        # C = 4 sin z / (2 z + sin 2z)
        return 4.0 * np.sin(z) / (2.0 * z + np.sin(2.0 * z))
    if geometry == "sphere":
        # C = 4 (sin z - z cos z) / (2 z - sin 2z)
        return 4.0 * (np.sin(z) - z * np.cos(z)) / (2.0 * z - np.sin(2.0 * z))
    # C = (2 / z) J1 / (J0^2 + J1^2)
    a0, a1 = j0(z), j1(z)
    return 2.0 / z * a1 / (a0 * a0 + a1 * a1)


def first_term(geometry: str, biot: ArrayLike) -> tuple[Float, Float]:
    """(zeta_1, C_1): the late-time eigenvalue and the centre's lag factor j."""
    z = eigenvalues(geometry, biot, 1)[..., 0]
    return z, centre_coefficients(geometry, z)


@lru_cache(maxsize=4096)
def _modes_cached(geometry: str, biot: float, n_terms: int) -> tuple[Float, Float]:
    z = eigenvalues(geometry, biot, n_terms)
    return z, centre_coefficients(geometry, z)


def modes(geometry: str, biot: float, n_terms: int = N_TERMS) -> tuple[Float, Float]:
    """(zeta_n, C_n) for one Biot number, cached (fits revisit the same Bi)."""
    _check_geometry(geometry)
    return _modes_cached(geometry, float(biot), int(n_terms))


def theta_centre_series(fo: ArrayLike, biot: float, geometry: str, n_terms: int) -> Float:
    """The raw truncated sum  sum_{n<=n_terms} C_n exp(-zeta_n^2 Fo)  (no early-time clamp)."""
    z, c = modes(geometry, biot, n_terms)
    f = np.asarray(fo, dtype=float)
    return np.exp(-np.multiply.outer(f, z * z)) @ c


def theta_from_modes(fo: ArrayLike, zeta: Float, c: Float) -> Float:
    """theta_centre from precomputed modes: ``fo`` of shape S, zeta and c of shape S + (n,)."""
    f = np.asarray(fo, dtype=float)
    th = np.sum(c * np.exp(-np.maximum(f, FO_CUT)[..., None] * zeta * zeta), axis=-1)
    return np.where(f <= FO_CUT, 1.0, th)


def theta_centre(fo: ArrayLike, biot: ArrayLike, geometry: str) -> Float:
    """Centre temperature (T - Ta)/(Ti - Ta) at Fourier numbers ``fo``, accurate for all Fo >= 0.

    1 for Fo <= FO_CUT (the centre has not yet responded; the truncated series would wobble
    there), N_TERMS terms of the series above.  ``biot`` may be a scalar, or an array that
    broadcasts with ``fo`` (one Bi per Fo, used for interval draws).
    """
    f = np.asarray(fo, dtype=float)
    bi = np.asarray(biot, dtype=float)
    if bi.ndim == 0:
        z, c = modes(geometry, float(bi), N_TERMS)
        fe = np.maximum(f, FO_CUT)
        # Beyond FO_FEW the terms after N_FEW (zeta_n > N_FEW pi) are below
        # exp(-(N_FEW pi)^2 FO_FEW) ~ 3e-17:
        # most readings need only those, which makes a fit's model evaluations ~3x cheaper.
        late = fe >= FO_FEW
        th = np.empty(fe.shape)
        th[late] = np.exp(-np.multiply.outer(fe[late], z[:N_FEW] ** 2)) @ c[:N_FEW]
        th[~late] = np.exp(-np.multiply.outer(fe[~late], z * z)) @ c
    else:
        f, bi = np.broadcast_arrays(f, bi)
        z = eigenvalues(geometry, bi, N_TERMS)
        c = centre_coefficients(geometry, z)
        fe = np.maximum(f, FO_CUT)[..., None]
        th = np.sum(c * np.exp(-fe * z * z), axis=-1)
    return np.where(f <= FO_CUT, 1.0, th)
