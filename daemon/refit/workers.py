"""The refit round's worker processes: the batch's fits of a round's chunks
(``predictors.batch.prepare_safely``) made in processes of their own, so that a round uses more
than one core while the service's process keeps the ingest, the store and each item's
bookkeeping (judging, storing, publishing).

``[fit] workers`` says how many (default: the machine's cores less one; 0: every fit in the
service's process).  Workers read no store: the round reads each chunk's windows itself, in one
query, and hands them over as numpy arrays; the fits come back the same way.  Processes are
started by ``forkserver`` (``spawn`` where there is none): the service runs threads (the broker
client, the writer, the scheduler), which a plain fork would copy mid-step.

The workers also make the per-item forecasts of the items the batch flags (``fit_chunk``):
``forecast()`` with the arguments the round would pass (``asks``: per item, each level's
threshold and side as configured, an ``auto`` side as the live value would decide it), so the
service's process takes them as made where its own arguments are the same (no learned prior,
the side as asked), and makes them itself otherwise.

Faults: an item on which the batch raises comes back flagged (``Flag.ERROR``), the rest of its
chunk fitted; a worker that dies (``BrokenProcessPool``) or gives no answer within the timeout
costs its chunk the batch: the chunk's items go the per-item way in the service's process,
counted (``crashes``, ``timeouts``), and the pool is started afresh for the chunks after it.
The round is never lost and the service never waits on a worker longer than the timeout.
"""

from __future__ import annotations

import logging
import multiprocessing as mp
import os
from concurrent.futures import Future, ProcessPoolExecutor
from concurrent.futures import TimeoutError as FutureTimeout
from concurrent.futures.process import BrokenProcessPool
from typing import Any

from thermeta.predictors.batch import Flag, Prepared, Series, prepare_safely
from thermeta.predictors.result import Forecast

Asks = dict[int, list[dict[str, Any]]]  # per row of the chunk: forecast()'s arguments, each
Made = dict[int, list[tuple[dict[str, Any], Forecast]]]  # per row: (arguments, forecast), each

log = logging.getLogger("thermeta.refit")


def fit_chunk(series: list[Series], asks: Asks, most: int) -> tuple[list[Prepared | Flag], Made]:
    """A worker's job: the chunk's batched fits, then the per-item forecasts the round asks for
    the rows the batch flags, on the readings thinned to ``most`` as the round thins them (a
    forecast that raises is left to the service's process, which logs it)."""
    from thermeta.daemon.refit.common import thin
    from thermeta.predictors import forecast

    got = prepare_safely(series)
    made: Made = {}
    for i, p in enumerate(got):
        if not isinstance(p, Flag) or i not in asks:
            continue
        t, y = thin(series[i].t, series[i].y, most)
        for kw in asks[i]:
            try:
                made.setdefault(i, []).append((kw, forecast(t, y, **kw)))
            except Exception:  # noqa: BLE001 - the service's process fits it and says why
                continue
    return got, made


def default_workers() -> int:
    """The machine's cores less one (the service's own process keeps one)."""
    return max((os.cpu_count() or 1) - 1, 0)


def _context() -> Any:
    if "forkserver" not in mp.get_all_start_methods():
        return mp.get_context("spawn")
    ctx = mp.get_context("forkserver")
    ctx.set_forkserver_preload(["thermeta.daemon.refit.workers"])  # a new worker starts warm
    return ctx


class FitPool:
    """Worker processes for the batch's fits, started on first use and kept between rounds."""

    def __init__(self, workers: int, timeout_s: float):
        self.workers = workers
        self.timeout_s = timeout_s
        self._pool: ProcessPoolExecutor | None = None
        self.generation = 0  # how many pools were started (a dead one is replaced)
        self.crashes = 0
        self.timeouts = 0
        self.most = 1500  # the readings a per-item fit sees at most (rounds.MAX_FIT_POINTS)

    def submit(self, series: list[Series], asks: Asks | None = None) -> tuple[Future | None, int]:
        """Hand a chunk's series to a worker: its future (None: no pool to take it) and the
        pool's generation; with ``asks``, the flagged rows' forecasts too (:func:`fit_chunk`)."""
        try:
            if self._pool is None:
                self._pool = ProcessPoolExecutor(self.workers, mp_context=_context())
                self.generation += 1
            if asks is None:
                return self._pool.submit(prepare_safely, series), self.generation
            return self._pool.submit(fit_chunk, series, asks, self.most), self.generation
        except (BrokenProcessPool, RuntimeError, OSError):
            self.crashes += 1
            log.exception("the refit's worker processes could not take a chunk")
            self._reset(kill=True)
            return None, self.generation

    def result(
        self, fut: Future | None, generation: int, series: list[Series], asks: Asks | None = None
    ) -> Any:
        """The chunk's fits, or None (its items go the per-item way).  A chunk whose pool died
        while it waited behind another one is handed to the new pool once."""
        if fut is None:
            return None
        try:
            return fut.result(timeout=self.timeout_s)
        except BrokenProcessPool:
            if generation != self.generation:  # its pool died on an earlier chunk: once more
                again, gen = self.submit(series, asks)
                return self.result(again, gen, [], asks) if again is not None and series else None
            self.crashes += 1
            log.error("a refit worker process died; its chunk goes the per-item way")
            self._reset(kill=True)
        except FutureTimeout:
            self.timeouts += 1
            log.error(
                "a refit worker gave no answer within %g s; its chunk goes the per-item way",
                self.timeout_s,
            )
            self._reset(kill=True)
        except Exception:  # noqa: BLE001 - the per-item way still works
            log.exception("a refit worker's chunk failed; its items go the per-item way")
        return None

    def _reset(self, kill: bool) -> None:
        pool, self._pool = self._pool, None
        if pool is None:
            return
        if kill:  # a hung or dying worker: end the processes this pool started
            for proc in list(getattr(pool, "_processes", {}).values()):
                if proc.is_alive():
                    proc.kill()
        pool.shutdown(wait=False, cancel_futures=True)

    def pids(self) -> list[int]:
        """The live workers' process ids (for the service's figures and the fault tests)."""
        procs = getattr(self._pool, "_processes", None) or {}
        return [p.pid for p in procs.values() if p.is_alive() and p.pid is not None]

    def close(self) -> None:
        pool, self._pool = self._pool, None
        if pool is not None:
            pool.shutdown(wait=True, cancel_futures=True)
