"""Quantiles and tail areas of the F, Student t and chi-square distributions, from
``scipy.special``: the same figures as ``scipy.stats`` (to about 1e-15 here) without its import,
which costs about 0.6 s at every start of a command or the service."""

from __future__ import annotations

from scipy.special import chdtri, fdtrc, fdtri, stdtrit


def f_ppf(q: float, dfn: float, dfd: float) -> float:
    """The F(dfn, dfd) distribution's ``q`` quantile."""
    return float(fdtri(dfn, dfd, q))


def f_sf(x: float, dfn: float, dfd: float) -> float:
    """P(F > x) for F(dfn, dfd)."""
    return float(fdtrc(dfn, dfd, x))


def t_ppf(q: float, df: float) -> float:
    """Student's t(df) distribution's ``q`` quantile."""
    return float(stdtrit(df, q))


def chi2_ppf(q: float, df: float) -> float:
    """The chi-square(df) distribution's ``q`` quantile."""
    return float(chdtri(df, 1.0 - q))
