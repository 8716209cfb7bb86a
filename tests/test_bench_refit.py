"""The refit-capacity bench (scripts/bench_refit.py): a small run through the service's refitter
on a real SQLite file.  Checks the instrument, not the times it reports (those are its output)."""

from __future__ import annotations

import importlib.util
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def load():
    spec = importlib.util.spec_from_file_location(
        "bench_refit", ROOT / "scripts" / "bench_refit.py"
    )
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def test_every_item_is_refitted_in_each_round(tmp_path):
    """Three warming items with a given ambient: the first round and each live round publish a
    forecast for all three, fresh (none stale), with the crossing still ahead; a compressor-
    cycling room is steady.  The live rounds see the held-back readings: their newest reading is
    the series' last."""
    b = load()
    r = b.run_case("known", 3, 2, seed=1, folder=tmp_path)
    # not crossed: steady, or approaching where the early end of the interval is within lead
    assert set(r["states"]) <= {"steady", "approaching"} and sum(r["states"].values()) == 3
    assert r["live_s"] > 0 and r["ms_per_item"] == 1000 * r["live_s"] / 3
    assert b.run_case("cycling", 2, 1, seed=1, folder=tmp_path)["states"] == {"steady": 2}

    from thermeta.storage.store import Store

    store = Store(f"sqlite:///{tmp_path / 'known-3-batch.db'}")
    last = store.last_reading_times()
    store.close()
    assert set(last) == {"known-00000", "known-00001", "known-00002"}
    assert all(abs(t - b.END) < 1e-6 for t in last.values())


def test_table_and_bad_arguments(capsys):
    """One row per family and count; a bad family or count is exit 2 with one line."""
    b = load()
    assert b.main(["--items", "2", "--rounds", "1", "--families", "fitted,measured"]) == 0
    out = capsys.readouterr().out
    rows = [ln for ln in out.splitlines() if ln.startswith("| lumped")]
    fams = [b.DESCRIBE["fitted"]] * 2 + [b.DESCRIBE["measured"]] * 2
    assert [r.split("|")[1].strip() for r in rows] == fams
    assert all(r.split("|")[2].strip() == "2" for r in rows)
    # each family batched, then one by one, with the ratio of their live rounds
    assert [r.split("|")[3].strip() for r in rows] == ["batch", "item"] * 2
    assert all(r.split("|")[9].strip().endswith(" x") for r in rows[1::2])
    for bad in (["--families", "nope"], ["--items", "x"], ["--items", "0"]):
        assert b.main(bad) == 2
        err = capsys.readouterr().err
        assert len(err.strip().splitlines()) == 1


def test_estimator_table(capsys):
    """--estimator times the batched estimator alone against forecast() per item: one row per
    family and count, the flagged share and the ratio filled."""
    b = load()
    assert b.main(["--estimator", "30", "--families", "fitted"]) == 0
    rows = [ln for ln in capsys.readouterr().out.splitlines() if ln.startswith("| lumped")]
    assert len(rows) == 1 and rows[0].split("|")[2].strip() == "30"
    assert rows[0].split("|")[7].strip().endswith(" x")
    assert b.main(["--estimator", "x"]) == 2
