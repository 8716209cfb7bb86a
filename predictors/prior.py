"""Priors learned from past episodes: the spread of k and of the ambient over an item class.

A class (one item, or e.g. all reefers at a yard, all batches in one fermenter) collects, from
each finished episode whose readings pinned them down, ln k and (in fitted-ambient mode) the
ambient.  A new episode's fit then carries

    ln k ~ N(mu_k, sd_k^2)        ambient ~ N(mu_a, sd_a^2)

as Gaussian penalties (see :mod:`thermeta.predictors.lumped`), so its first minutes already give
a usable forecast; as curvature accumulates the readings outweigh the prior.

Updating is deliberately cautious, so that a few episodes (or one odd one) cannot make the prior
overconfident:
- exponentially weighted mean and variance, the weight never below 1 / N_MEMORY (old episodes
  fade; a class that changed product follows within some tens of episodes);
- the variance is shrunk toward a wide default by N_PSEUDO pseudo-episodes,
      sd^2 = (n_eff var + N_PSEUDO sd0^2) / (n_eff + N_PSEUDO),
  and never below a floor (SD_LOGK_FLOOR, SD_AMBIENT_FLOOR_C);
- once the class has N_ROBUST episodes, a new value is clipped to mu +- CLIP_SD sd before it is
  averaged in (a mislabelled episode moves the prior by at most a few of its own sds).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Any

SD_LOGK_DEFAULT = 0.7  # a factor of 2 in k either way (1 sd): what one episode says of the next
SD_LOGK_FLOOR = 0.15  # even identical episodes differ by ~15 % in k (load, packing, airflow)
SD_AMBIENT_DEFAULT_C = 4.0
SD_AMBIENT_FLOOR_C = 1.0
N_PSEUDO = 2.0
N_MEMORY = 30.0
N_ROBUST = 3
CLIP_SD = 3.0
# a fit is worth learning from when its 90 % interval of k spans less than this ratio (~ +-25 %)
K_RATIO_MAX = 1.6
AMBIENT_WIDTH_MAX_C = 3.0  # ... and, with the ambient fitted, its 90 % interval less than this


@dataclass
class Prior:
    """Running statistics of ln k (k in 1/s) and of the ambient (degC) over a class's episodes."""

    n_episodes: int = 0
    logk_mean: float = 0.0
    logk_var: float = 0.0
    n_ambient: int = 0
    ambient_mean_c: float = 0.0
    ambient_var_c2: float = 0.0

    @property
    def logk_sd(self) -> float:
        return _shrunk_sd(self.n_episodes, self.logk_var, SD_LOGK_DEFAULT, SD_LOGK_FLOOR)

    @property
    def ambient_sd_c(self) -> float:
        return _shrunk_sd(
            self.n_ambient, self.ambient_var_c2, SD_AMBIENT_DEFAULT_C, SD_AMBIENT_FLOOR_C
        )

    @property
    def k_per_s(self) -> float | None:
        """The prior's typical k (its geometric mean), or None before any episode."""
        return math.exp(self.logk_mean) if self.n_episodes else None

    def k_prior(self) -> tuple[float, float] | None:
        """(mean, sd) of ln k for the fit, or None before any episode."""
        return (self.logk_mean, self.logk_sd) if self.n_episodes else None

    def ambient_prior(self) -> tuple[float, float] | None:
        """(mean, sd) of the ambient in degC, or None if no episode gave one."""
        return (self.ambient_mean_c, self.ambient_sd_c) if self.n_ambient else None

    def updated(self, k_per_s: float, ambient_c: float | None = None) -> Prior:
        """A new prior with one more episode (k > 0; the ambient where the fit gave one)."""
        if not (k_per_s > 0 and math.isfinite(k_per_s)):
            raise ValueError(f"k_per_s must be a positive finite number, got {k_per_s!r}")
        n, mu, var = _update(
            self.n_episodes, self.logk_mean, self.logk_var, self.logk_sd, math.log(k_per_s)
        )
        out = Prior(n, mu, var, self.n_ambient, self.ambient_mean_c, self.ambient_var_c2)
        if ambient_c is not None and math.isfinite(ambient_c):
            out.n_ambient, out.ambient_mean_c, out.ambient_var_c2 = _update(
                self.n_ambient,
                self.ambient_mean_c,
                self.ambient_var_c2,
                self.ambient_sd_c,
                float(ambient_c),
            )
        return out

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> Prior:
        return cls(**{k: d[k] for k in cls.__dataclass_fields__ if k in d})


def _shrunk_sd(n: int, var: float, sd0: float, floor: float) -> float:
    """sd^2 = (n_eff var + N_PSEUDO sd0^2) / (n_eff + N_PSEUDO), at least floor."""
    n_eff = min(float(n), N_MEMORY)
    return max(math.sqrt((n_eff * var + N_PSEUDO * sd0**2) / (n_eff + N_PSEUDO)), floor)


def _update(n: int, mean: float, var: float, sd: float, x: float) -> tuple[int, float, float]:
    """Exponentially weighted mean/variance: w = max(1/(n+1), 1/N_MEMORY),
    mean' = mean + w (x - mean), var' = (1 - w) (var + w (x - mean)^2)."""
    if n == 0:
        return 1, x, 0.0
    if n >= N_ROBUST:
        x = min(max(x, mean - CLIP_SD * sd), mean + CLIP_SD * sd)
    w = max(1.0 / (n + 1), 1.0 / N_MEMORY)
    dx = x - mean
    return n + 1, mean + w * dx, (1.0 - w) * (var + w * dx * dx)


def learnable(fc: Any) -> bool:
    """Whether a forecast's fit pinned k (and a fitted ambient) down well enough to learn from:
    a lumped fit, fitted or known ambient, k's 90 % interval within a ratio K_RATIO_MAX and,
    with the ambient fitted, the ambient's 90 % interval narrower than AMBIENT_WIDTH_MAX_C."""
    if not fc.ok or fc.model != "lumped" or fc.ambient_mode not in ("fitted", "known"):
        return False
    k, lo, hi = fc.k_per_s, fc.k_lo_per_s, fc.k_hi_per_s
    if not k or not lo or not hi or lo <= 0 or not math.isfinite(hi) or hi / lo > K_RATIO_MAX:
        return False
    if fc.ambient_mode == "fitted":
        a_lo, a_hi = fc.ambient_lo, fc.ambient_hi
        if a_lo is None or a_hi is None or a_hi - a_lo > AMBIENT_WIDTH_MAX_C:
            return False
    return True


def learn(prior: Prior | None, fc: Any) -> Prior:
    """The prior updated from a finished episode's forecast (see :func:`learnable`); the ambient
    is learned only where it was fitted (a given ambient is the configuration's, not the class's).
    The forecast should come from a fit WITHOUT the prior, so the prior never feeds on itself."""
    if not learnable(fc):
        raise ValueError("this forecast does not pin k down well enough to learn from")
    prior = prior or Prior()
    return prior.updated(fc.k_per_s, fc.ambient if fc.ambient_mode == "fitted" else None)
