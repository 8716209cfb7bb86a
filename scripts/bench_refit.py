"""How many items one service can refit: the refit round's time per item, from a real store.

    python scripts/bench_refit.py [--items 10,100,500] [--rounds 3] [--seed 1] [--families ...]

For each family and item count, a fresh SQLite file is filled with two hours of one-minute
readings per item (seeded simulations, noise 0.05 degC, 0.1 degC steps), then the service's own
refitter (`thermeta.daemon.refit.Refitter`, the code the APScheduler job runs) makes:

- a first round (every item fitted from its whole window, as after a start), then
- ``--rounds`` live rounds, each after one new reading per item (a probe logging every minute),
  which is what the service does every ``refit_every`` seconds.

Prints a markdown table: per family and item count the first round's time, the median live round,
milliseconds per item (live median / items), and how many such items one CPU core refits within
the default ``refit_every`` of 30 s.  Refits run in one thread, so a round uses one core; ingest,
alerts and the store use the other.  Times are wall clock on this machine; run it on an idle one.
"""

from __future__ import annotations

import argparse
import dataclasses
import os
import resource
import shutil
import statistics
import sys
import tempfile
import time
import tomllib
from pathlib import Path

import numpy as np
from thermeta.daemon.clock import ManualClock
from thermeta.daemon.config import AMBIENT_SUFFIX, parse_config
from thermeta.daemon.ingest.writer import Activity
from thermeta.daemon.refit.rounds import Refitter
from thermeta.daemon.simulation import synth, synth_conduction
from thermeta.daemon.simulation.synth import Corruption
from thermeta.storage.store import Store

HISTORY_S = 2 * 3600.0
DT_S = 60.0
REFIT_EVERY_S = 30.0  # the config's default
NOISE = Corruption(noise=0.05, quantum=0.1)
END = synth.T_START + 86400.0  # every series ends here


def _series(
    family: str, i: int, seed: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray | None, np.ndarray | None]:
    """Readings (degC) over the history and 30 spare minutes, shifted to end at END (every item
    of a round is then equally fresh); the caller holds the spare ones back for the live rounds.
    The ranges keep most items short of their threshold (approaching or steady), as on a site."""
    rng = np.random.default_rng([seed, i])
    span = HISTORY_S + 30 * DT_S
    if family in ("known", "fitted", "levels"):
        s = synth.lumped(
            seed * 100_000 + i,
            T0=rng.uniform(1, 4),
            ambient=rng.uniform(12, 18),
            k_per_s=1 / (3600 * rng.uniform(8, 12)),
            threshold=8.0,
            duration_s=span,
            dt_s=DT_S,
            corruption=NOISE,
        )
    elif family == "cycling":
        s = synth.compressor_sawtooth(
            seed * 100_000 + i, duration_s=span, dt_s=DT_S, corruption=NOISE
        )
    elif family == "measured":
        s = synth.measured_air(
            seed * 100_000 + i,
            load_T0=rng.uniform(1, 4),
            air_T0=rng.uniform(1, 4),
            outside=rng.uniform(12, 18),
            k_air_per_s=1 / (3600 * rng.uniform(0.5, 2)),
            k_load_per_s=1 / (3600 * rng.uniform(3, 9)),
            threshold=8.0,
            duration_s=span,
            dt_s=DT_S,
            corruption=NOISE,
        )
    elif family == "core":
        s = synth_conduction.core_probe(
            seed * 100_000 + i,
            geometry="slab",
            biot=rng.uniform(0.5, 5),
            a_per_s=1 / (3600 * 6),
            t_i=rng.uniform(-22, -18),
            ambient=rng.uniform(5, 15),
            threshold=-15.0,
            seen_fraction=0.6,
            dt_s=DT_S,
            corruption=NOISE,
        )
    else:
        raise SystemExit(f"bench_refit: unknown family {family!r}")
    shift = END - float(np.max(s.t))
    return (s.t + shift, s.y, None if s.ambient_t is None else s.ambient_t + shift, s.ambient_y)


def _item_toml(family: str, name: str) -> str:
    base = f'[[item]]\nname = "{name}"\ntopic = "bench/{name}"\n'
    if family == "known":
        return base + "threshold = 8.0\nambient = 25.0\n"
    if family == "levels":  # the same probes asked three questions: a fit per threshold
        return (
            base + "threshold = 8.0\nambient = 25.0\n"
            '[[item.level]]\nname = "warning"\nthreshold = 6.0\nside = "above"\n'
            '[[item.level]]\nname = "floor"\nthreshold = 0.0\nside = "below"\n'
        )
    if family == "fitted":
        return base + "threshold = 8.0\n"
    if family == "cycling":
        return base + "threshold = 8.0\n"
    if family == "measured":
        return base + f'threshold = 8.0\nambient_topic = "bench/{name}/air"\n'
    return base + 'threshold = -15.0\nmodel = "slab"\nambient = 10.0\n'


class _Writer:
    """Readings of many items written in large batches (a store of 100,000 items fills in
    minutes, not an hour of one transaction per item)."""

    def __init__(self, store: Store):
        self.store = store
        self.rows: list[tuple] = []

    def add(self, iid: int, t: np.ndarray, y: np.ndarray) -> None:
        self.rows.extend((iid, float(a), float(b), 0, float(a)) for a, b in zip(t, y))
        if len(self.rows) >= 50_000:
            self.flush()

    def flush(self) -> None:
        if self.rows:
            self.store.write_batch(self.rows)
            self.rows = []


def build(family: str, n_items: int, rounds: int, seed: int, folder: Path) -> dict:
    """A store filled with the family's history (the live rounds' readings held back)."""
    db = folder / f"{family}-{n_items}.db"
    text = f'[storage]\nurl = "sqlite:///{db}"\n[fit]\nrefit_every = {REFIT_EVERY_S:g}\n' + "".join(
        _item_toml(family, f"{family}-{i:05d}") for i in range(n_items)
    )
    cfg = parse_config(tomllib.loads(text), "bench.toml", text)
    store = Store(cfg.storage.url)
    store.create_all()
    names = [f"{family}-{i:05d}" for i in range(n_items)]
    ids = store.ensure_items([(n, "load", "C", f"bench/{n}") for n in names])
    amb_ids: dict[str, int] = {}
    if family == "measured":
        amb_ids = store.ensure_items(
            [(n + AMBIENT_SUFFIX, "ambient", "C", f"bench/{n}/air") for n in names]
        )
    w = _Writer(store)
    held: dict[str, list[tuple[np.ndarray, np.ndarray, np.ndarray | None, np.ndarray | None]]] = {}
    last: dict[str, float] = {}
    cut_at = 0.0
    for i, name in enumerate(names):
        t, y, at, ay = _series(family, i, seed)
        cut = float(t[-1]) - rounds * DT_S  # the newest readings wait for the live rounds
        cut_at = max(cut_at, cut)
        keep = t <= cut
        w.add(ids[name], t[keep], y[keep])
        if at is not None and ay is not None:
            w.add(amb_ids[name + AMBIENT_SUFFIX], at[at <= cut], ay[at <= cut])

        def part(a: np.ndarray | None, r: int, ref: np.ndarray, cut: float = cut):
            if a is None:
                return None
            return a[(ref > cut + r * DT_S) & (ref <= cut + (r + 1) * DT_S)]

        held[name] = [
            (
                part(t, r, t),
                part(y, r, t),
                part(at, r, at) if at is not None else None,
                part(ay, r, at) if at is not None else None,
            )  # fmt: skip
            for r in range(rounds)
        ]
        last[name] = float(t[keep].max())
    w.flush()
    store.close()
    return {"db": db, "cfg": cfg, "held": held, "last": last, "cut_at": cut_at, "ids": ids,
            "amb_ids": amb_ids}  # fmt: skip


def _worker_cpu(refitter: Refitter) -> tuple[float, float]:
    """The worker processes' CPU seconds so far and their largest peak RSS (MB), from /proc."""
    pool = refitter.batch.pool
    cpu, peak = 0.0, 0.0
    for pid in pool.pids() if pool is not None else []:
        try:
            stat = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
            cpu += (int(stat[11]) + int(stat[12])) / os.sysconf("SC_CLK_TCK")
            for line in Path(f"/proc/{pid}/status").read_text().splitlines():
                if line.startswith("VmHWM:"):
                    peak = max(peak, int(line.split()[1]) / 1024)
        except (OSError, IndexError, ValueError):
            continue
    return cpu, peak


def run_case(
    family: str, n_items: int, rounds: int, seed: int, folder: Path, use_batch: bool = True,
    built: dict | None = None, workers: int = 0,
) -> dict:  # fmt: skip
    """The first round and ``rounds`` live rounds, the batch on or off (with ``workers`` worker
    processes), on a copy of the store."""
    b = built or build(family, n_items, rounds, seed, folder)
    way = "batch" if use_batch else "item"
    db = folder / f"{family}-{n_items}-{way}{f'-w{workers}' if workers else ''}.db"
    shutil.copy(b["db"], db)
    cfg = b["cfg"]
    cfg = dataclasses.replace(cfg, fit=cfg.fit.model_copy(update={"workers": workers}))
    store = Store(f"sqlite:///{db}")
    act = Activity()
    by_name = {it.name: it for it in cfg.items}
    for name, ts in b["last"].items():
        act.note(name, by_name[name], ts)
    clock = ManualClock(b["cut_at"] + 5.0)
    refitter = Refitter(store, cfg, clock, act)
    refitter.use_batch = use_batch
    t0 = time.perf_counter()
    done = refitter.run_once()
    first_s = time.perf_counter() - t0
    live: list[float] = []
    cpu: list[float] = []  # the service's process and the workers, CPU seconds a live round
    for r in range(rounds):
        w = _Writer(store)
        for name, chunks in b["held"].items():
            t, y, at, ay = chunks[r]
            if t.size:
                w.add(b["ids"][name], t, y)
                act.note(name, by_name[name], float(t.max()))
            if at is not None and at.size:
                w.add(b["amb_ids"][name + AMBIENT_SUFFIX], at, ay)
        w.flush()
        clock.set(b["cut_at"] + (r + 1) * DT_S + 5.0)
        t0, c0, w0 = time.perf_counter(), time.process_time(), _worker_cpu(refitter)[0]
        refitter.run_once()
        live.append(time.perf_counter() - t0)
        cpu.append(time.process_time() - c0 + _worker_cpu(refitter)[0] - w0)
    worker_mb = _worker_cpu(refitter)[1]
    refitter.batch.close()  # the workers end
    store.close()
    states: dict[str, int] = {}
    for s in done.values():
        states[s] = states.get(s, 0) + 1
    med = statistics.median(live)
    counts = refitter.batch.counts
    return {
        "family": family,
        "items": n_items,
        "first_s": first_s,
        "live_s": med,
        "cpu_ms": 1000 * statistics.median(cpu) / n_items,
        "worker_mb": worker_mb,
        "ms_per_item": 1000 * med / n_items,
        "per_core": int(REFIT_EVERY_S / (med / n_items)),
        "states": states,
        "batched": counts["batch"] / max(counts["batch"] + counts["item"], 1),
        "forecasts": {n: refitter.previous[n] for n in list(refitter.previous)[:2000]},
        "db": db,
    }


def _agree(batch: dict, item: dict) -> None:
    """Say on stderr where the two ways disagree: a state, or an ETA by more than 1 %."""
    off = 0
    for name, a in batch["forecasts"].items():
        b = item["forecasts"].get(name)
        if b is None:
            continue
        ea, eb = a.get("eta_s"), b.get("eta_s")
        if a.get("state") != b.get("state") or (ea is None) != (eb is None):
            off += 1
        elif ea is not None and eb and abs(ea / eb - 1) > 0.01:
            off += 1
    if off:
        print(f"bench_refit: {off} items differ between the ways", file=sys.stderr)


def _windows(family: str, n_items: int, seed: int) -> list:
    """The estimator's windows: the history as a round sees it (the spare half hour cut)."""
    out = []
    for i in range(n_items):
        t, y, _, _ = _series(family, i, seed)
        out.append((t[:-30], y[:-30]))
    return out


def _old_batch(rev: str, folder: Path):
    """``predictors/batch*.py`` as they were at ``rev`` (git), loaded beside these as a package
    of their own (their imports of each other rewritten), for a same-run comparison."""
    import importlib
    import subprocess

    root = Path(__file__).resolve().parent.parent
    names = subprocess.run(
        ["git", "-C", str(root), "ls-tree", "--name-only", rev, "predictors/"],
        capture_output=True, text=True, check=True,
    ).stdout.split()  # fmt: skip
    pkg = folder / "batch_then"
    pkg.mkdir()
    (pkg / "__init__.py").write_text("")
    for path in names:
        name = Path(path).name
        if not (name.startswith("batch") and name.endswith(".py")):
            continue
        text = subprocess.run(
            ["git", "-C", str(root), "show", f"{rev}:{path}"],
            capture_output=True, text=True, check=True,
        ).stdout  # fmt: skip
        text = text.replace("thermeta.predictors.batch", "batch_then.batch")
        (pkg / name).write_text(text)
    sys.path.insert(0, str(folder))
    return importlib.import_module("batch_then.batch")


def _batch_cpu(mod, windows: list, ambient: float | None) -> tuple[float, int]:
    """CPU seconds of ``mod.prepare`` and one forecast each over the windows, in the refitter's
    chunks, and how many it flagged."""
    from thermeta.daemon.refit.batched import CHUNK

    cpu, flagged = 0.0, 0
    for at in range(0, len(windows), CHUNK):
        part = windows[at : at + CHUNK]
        series = [mod.Series(t, y, ambient=ambient, thresholds=(8.0,)) for t, y in part]
        c0 = time.process_time()
        for p in mod.prepare(series):
            out = p if isinstance(p, mod.Flag) else p.forecast(8.0, "upper")
            flagged += isinstance(out, mod.Flag)
        cpu += time.process_time() - c0
    return cpu, flagged


def estimator(family: str, n_items: int, seed: int, sample: int = 300, then=None) -> dict:
    """The estimator alone, no store: ``predictors.batch`` over ``n_items`` windows in chunks of
    the refitter's size (prepare and one forecast each; CPU time, median of 3 where ``then``, an
    earlier revision's module, is timed beside it in turns), against ``forecast()`` per item on
    the first ``sample`` of them (the per-item way's cost per item does not depend on N)."""
    from thermeta.predictors import batch, forecast

    ambient = 25.0 if family == "known" else None
    windows = _windows(family, n_items, seed)
    now, old = [], []
    for _ in range(3 if then is not None else 1):
        now.append(_batch_cpu(batch, windows, ambient))
        if then is not None:
            old.append(_batch_cpu(then, windows, ambient))
    batch_s, flagged = statistics.median(c for c, _ in now), now[0][1]
    c0 = time.process_time()
    for t, y in windows[: min(sample, n_items)]:
        forecast(t, y, 8.0, ambient=ambient, limit="upper")
    item_ms = 1000 * (time.process_time() - c0) / min(sample, n_items)
    out = {
        "batch_us": 1e6 * batch_s / n_items,
        "item_ms": item_ms,
        "flagged": flagged / n_items,
        "batch_s": batch_s,
    }
    if then is not None:
        out["then_us"] = 1e6 * statistics.median(c for c, _ in old) / n_items
        out["then_flagged"] = old[0][1] / n_items
    return out


DESCRIBE = {
    "known": "lumped, ambient given",
    "levels": "lumped, ambient given, 3 levels",
    "fitted": "lumped, ambient fitted",
    "cycling": "cold room, compressor cycling",
    "measured": "lumped, air probe measured",
    "core": "centre probe (slab), ambient given",
}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--items", default="10,100,500", help="comma list of item counts")
    ap.add_argument("--rounds", type=int, default=3, help="live rounds after the first")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--ways", default="batch,item", help="batch, item or both (batch,item)")
    ap.add_argument(
        "--workers", default="0", help="comma list of worker process counts for the batch way"
    )
    ap.add_argument(
        "--estimator",
        metavar="N,N",
        help="instead: the batched estimator alone (no store, no round) at these item counts",
    )
    ap.add_argument(
        "--families", default=",".join(DESCRIBE), help="comma list of: " + ", ".join(DESCRIBE)
    )
    ap.add_argument(
        "--against",
        metavar="REV",
        help="with --estimator: also time predictors/batch*.py as they were at this git "
        "revision, in turns with these (CPU time, medians of 3)",
    )
    args = ap.parse_args(argv)
    try:
        counts = [int(x) for x in args.items.split(",") if x.strip()]
    except ValueError:
        print(
            f"bench_refit: --items must be a comma list of whole numbers, got {args.items!r}",
            file=sys.stderr,
        )
        return 2
    families = [f.strip() for f in args.families.split(",") if f.strip()]
    try:
        workers = [int(x) for x in args.workers.split(",") if x.strip()]
    except ValueError:
        workers = [-1]
    if not workers or min(workers) < 0:
        print(
            f"bench_refit: --workers must be a comma list of counts, got {args.workers!r}",
            file=sys.stderr,
        )
        return 2
    bad = [f for f in families if f not in DESCRIBE]
    if bad or not counts or min(counts) < 1 or args.rounds < 1:
        print(
            f"bench_refit: families must be among {', '.join(DESCRIBE)}; --items and --rounds "
            f"at least 1 (got families {families}, items {counts}, rounds {args.rounds})",
            file=sys.stderr,
        )
        return 2
    if args.estimator:
        return _estimator_table(args, families)
    ways = [w.strip() for w in args.ways.split(",") if w.strip()]
    if not ways or any(w not in ("batch", "item") for w in ways):
        print(
            f"bench_refit: --ways must be batch, item or both, got {args.ways!r}", file=sys.stderr
        )
        return 2
    print(
        f"Measured by `python scripts/bench_refit.py --items {args.items} --rounds {args.rounds}"
        f" --seed {args.seed} --ways {args.ways} --workers {args.workers} --families "
        f"{','.join(families)}`: 2 h of one-minute readings per item, one new "
        "reading per item before each live round; wall clock.  batch: the round's "
        "lumped items fitted together (predictors/batch.py) in the service's process (workers "
        "0) or in worker processes, what it flags one by one; item: one forecast() per item.  "
        f"{os.cpu_count()} cores, load average {os.getloadavg()[0]:.1f} at the start.\n"
    )
    print(
        "| family | items | way | first round | live round (median) | ms per item | items within "
        "60 s | batched | item / batch | workers | CPU ms per item | worker's RSS | first round's "
        "states |"
    )
    print("|---|---|---|---|---|---|---|---|---|---|---|---|---|")
    started = time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="thermeta-bench-refit-") as d:
        for fam in families:
            for n in counts:
                built = build(fam, n, args.rounds, args.seed, Path(d))
                got = {}
                for way, nw in [(w, c) for w in ways for c in (workers if w == "batch" else [0])]:
                    r = got[way] = run_case(
                        fam, n, args.rounds, args.seed, Path(d), way == "batch", built, nw
                    )
                    r["db"].unlink()
                    states = ", ".join(f"{k} {v}" for k, v in sorted(r["states"].items()))
                    wmb = f"{r['worker_mb']:.0f} MB" if r["worker_mb"] else ""
                    ratio = ""
                    if way == "item" and "batch" in got:
                        ratio = f"{r['live_s'] / got['batch']['live_s']:.1f} x"
                        _agree(got["batch"], r)
                    print(
                        f"| {DESCRIBE[fam]} | {n} | {way} | {r['first_s']:.2f} s | "
                        f"{r['live_s']:.2f} s | {r['ms_per_item']:.2f} | "
                        f"{int(60.0 / (r['live_s'] / n))} | {100 * r['batched']:.0f} % | {ratio} | "
                        f"{nw if way == 'batch' else ''} | {r['cpu_ms']:.2f} | {wmb} | {states} |",
                        flush=True,
                    )
                built["db"].unlink()
    peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(
        f"\n{time.perf_counter() - started:.0f} s in all; peak RSS {peak_mb:.0f} MB (the bench's "
        "process: the store's filling, the refitter and the rounds; a worker's is in the table)."
    )
    return 0


def _estimator_table(args: argparse.Namespace, families: list[str]) -> int:
    try:
        sizes = [int(x) for x in args.estimator.split(",") if x.strip()]
    except ValueError:
        print("bench_refit: --estimator must be a comma list of whole numbers", file=sys.stderr)
        return 2
    against = f" --against {args.against}" if args.against else ""
    print(
        f"Measured by `python scripts/bench_refit.py --estimator {args.estimator} --families "
        f"{','.join(families)}{against}`: the estimator alone on the windows (2 h of one-minute "
        "readings), in chunks of the refitter's size, CPU time"
        + (f" (medians of 3, {args.against}'s predictors/batch*.py in turns)" if against else "")
        + "; the per-item forecast() timed on 300 of them.  Flagged items would go one by one: "
        f"their time is not in the batch column.  Load average {os.getloadavg()[0]:.1f} at the "
        "start.\n"
    )
    cols = "| family | items | batch, µs per item | batch, whole run | flagged |"
    if against:
        cols += f" {args.against}, µs per item | {args.against}, flagged | then / now |"
    print(cols + " forecast(), ms per item | ratio |")
    print("|---" * (cols.count("|") + 1) + "|")
    with tempfile.TemporaryDirectory(prefix="thermeta-bench-then-") as d:
        then = _old_batch(args.against, Path(d)) if args.against else None
        for fam in families:
            if fam not in ("known", "fitted"):
                continue
            for n in sizes:
                r = estimator(fam, n, args.seed, then=then)
                extra = ""
                if then is not None:
                    extra = (
                        f" {r['then_us']:.0f} | {100 * r['then_flagged']:.1f} % | "
                        f"{r['then_us'] / r['batch_us']:.2f} x |"
                    )
                print(
                    f"| {DESCRIBE[fam]} | {n} | {r['batch_us']:.0f} | {r['batch_s']:.1f} s | "
                    f"{100 * r['flagged']:.1f} % |{extra} {r['item_ms']:.2f} | "
                    f"{1000 * r['item_ms'] / r['batch_us']:.0f} x |",
                    flush=True,
                )
    peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"\npeak RSS {peak_mb:.0f} MB.")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
