"""The command line stays light: ``--help`` and the commands that only read the store never load
the numerics (numpy, scipy) or the plotting (matplotlib).  Checked in a fresh interpreter, by
the modules it holds after the command, not by timing it."""

from __future__ import annotations

import json
import subprocess
import sys

import pytest
from thermeta.storage.store import Store

PROBE = """
import contextlib, io, json, sys
from thermeta.daemon.cli import main
out = io.StringIO()
with contextlib.redirect_stdout(out), contextlib.redirect_stderr(io.StringIO()):
    try:
        code = main(sys.argv[1:])
    except SystemExit as exc:
        code = exc.code
heavy = [m for m in ("numpy", "scipy", "matplotlib") if m in sys.modules]
print(json.dumps({"code": code, "out": out.getvalue(), "heavy": heavy}))
"""


def run_cli(*args: str) -> dict:
    r = subprocess.run(
        [sys.executable, "-c", PROBE, *args], capture_output=True, text=True, timeout=60
    )
    assert r.returncode == 0, r.stderr
    return json.loads(r.stdout.strip().splitlines()[-1])


def test_help_loads_no_numerics():
    """`thermeta --help` lists every command (the scenario names too) without numpy or scipy."""
    got = run_cli("--help")
    assert got["code"] == 0 and "simulate" in got["out"] and "demo" in got["out"]
    assert got["heavy"] == []
    got = run_cli("simulate", "--help")
    assert got["code"] == 0 and "reefer-power-loss" in got["out"]
    assert got["heavy"] == []


@pytest.mark.parametrize("command", [["status"], ["readings", "a"]])
def test_store_reading_commands_load_no_numerics(tmp_path, command):
    """`status` and `readings` read a real store and print it, without numpy or scipy."""
    db = tmp_path / "s.db"
    cfg = tmp_path / "c.toml"
    cfg.write_text(
        f'[storage]\nurl = "sqlite:///{db}"\n[[item]]\nname = "a"\ntopic = "t/a"\nthreshold = 8.0\n'
    )
    store = Store(f"sqlite:///{db}")
    store.create_all()
    item = store.ensure_item("a", now=1.8e9)
    store.write_batch([(item, 1.8e9, 3.25, 0, 1.8e9)])
    # a forecast with a level, as the refit stores it: status reads its levels and the period
    body = {"item": "a", "value_now": 3.25, "threshold": 8.0, "unit": "C", "levels": []}
    store.save_forecasts([(item, 1.8e9, "steady", body, 1.8e9)])
    store.close()
    got = run_cli(command[0], "--config", str(cfg), *command[1:])
    assert got["code"] == 0
    assert "a" in got["out"] and (command[0] == "status" or "3.25" in got["out"])
    assert got["heavy"] == []
