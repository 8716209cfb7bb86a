"""One series, several questions: the steps of a forecast that do not depend on the threshold are
done once for all of a probe's levels.

A probe with a limit, a target and a schedule's stage asks three questions of one window of
readings.  Cleaning, the regime search, the two-time-constant test, the self-check and the
candidates' rolling-origin backtest read the readings only, never the threshold; only the
crossing (and the profile interval around it) is the question's own.  Inside :func:`shared_fits`
those steps (each marked :func:`shared`) keep their result for the same arguments, so the
forecasts of the other levels reuse it, and each answer is exactly the one a lone
``forecast()`` gives: the steps are pure functions of their arguments.

    with shared_fits():
        fcs = [forecast(t, y, thr, limit=side) for thr, side in questions]

or :func:`thermeta.predictors.forecast_levels`.  Outside the block nothing is kept.
"""

from __future__ import annotations

import functools
import hashlib
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from contextvars import ContextVar
from typing import Any, TypeVar

import numpy as np

F = TypeVar("F", bound=Callable[..., Any])
_CACHE: ContextVar[dict[tuple, Any] | None] = ContextVar("thermeta_shared_fits", default=None)


@contextmanager
def shared_fits() -> Iterator[None]:
    """Keep the threshold-free steps' results while the block runs (nested blocks share the
    outer one's)."""
    token = _CACHE.set({}) if _CACHE.get() is None else None
    try:
        yield
    finally:
        if token is not None:
            _CACHE.reset(token)


def _key(value: Any) -> Any:
    """A hashable stand-in for an argument: arrays by their shape, type and bytes' digest."""
    if isinstance(value, np.ndarray):
        digest = hashlib.blake2b(np.ascontiguousarray(value).tobytes(), digest_size=16).digest()
        return ("array", value.shape, value.dtype.str, digest)
    if isinstance(value, dict):
        return ("dict", tuple(sorted((k, _key(v)) for k, v in value.items())))
    if isinstance(value, list | tuple):
        return (type(value).__name__, tuple(_key(v) for v in value))
    return value


def shared(fn: F) -> F:
    """Mark a pure, threshold-free step: inside :func:`shared_fits` its result is kept for the
    same arguments (its callers must not change what it returns)."""

    @functools.wraps(fn)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        cache = _CACHE.get()
        if cache is None:
            return fn(*args, **kwargs)
        key = (
            fn.__module__,
            fn.__qualname__,
            tuple(_key(a) for a in args),
            tuple(sorted((k, _key(v)) for k, v in kwargs.items())),
        )
        try:
            hit = key in cache
        except TypeError:  # an argument that cannot be keyed: no keeping
            return fn(*args, **kwargs)
        if not hit:
            cache[key] = fn(*args, **kwargs)
        return cache[key]

    return wrapper  # type: ignore[return-value]
