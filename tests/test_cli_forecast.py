"""The offline command's contract: JSON fields, and one-line errors with exit code 2."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest

CONTRACT_KEYS = {
    "eta_s",
    "eta_lo_s",
    "eta_hi_s",
    "crossing_at",
    "threshold",
    "k_per_s",
    "time_constant_s",
    "half_cooling_s",
    "ambient",
    "ambient_mode",
    "model",
    "biot",
    "value_now",
    "n_points",
    "regime_start",
    "warnings",
}


def run_cli(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "thermeta.daemon.cli", *args],
        capture_output=True,
        text=True,
        timeout=120,
    )


def write_warming_csv(path, ambient_col: bool = False) -> None:
    rng = np.random.default_rng(7)
    t = np.arange(0, 2 * 3600, 30.0)
    y = 27 + (2 - 27) * np.exp(-t / 18000) + rng.normal(0, 0.05, t.size)
    with open(path, "w") as f:
        f.write("time,value" + (",ambient" if ambient_col else "") + "\n")
        for a, b in zip(t, y):
            f.write(f"{1764600000 + a:.0f},{b:.1f}" + (",27.0" if ambient_col else "") + "\n")


def test_json_has_contract_keys(tmp_path):
    """--json prints one object with every key the contract names."""
    p = tmp_path / "load.csv"
    write_warming_csv(p)
    r = run_cli("forecast", str(p), "--threshold", "12", "--ambient", "27", "--json")
    assert r.returncode == 0, r.stderr
    out = json.loads(r.stdout)
    assert CONTRACT_KEYS <= out.keys()
    assert out["ambient_mode"] == "known"
    assert out["n_points"] == 240


def test_ambient_column_selects_measured(tmp_path):
    """An ambient column selects the measured mode."""
    p = tmp_path / "load.csv"
    write_warming_csv(p, ambient_col=True)
    out = json.loads(run_cli("forecast", str(p), "--threshold", "12", "--json").stdout)
    assert out["ambient_mode"] == "measured"


@pytest.mark.parametrize(
    "content, fragment",
    [
        (b"time,value\n", "no readings"),
        (b"when,value\n1,2\n", "missing column 'time'"),
        (b"time,value\n1764600000,abc\n", ":2: value: not a number"),
        (b"time,value\n1764600000,1\nyesterday,2\n", ":3: time: unparseable time"),
        (b"time,value\n2026-12-01T10:00:00,1\n", "has no zone"),
        (b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR", "binary data"),
        (b"time,value\n1764600000,1\n", ":2: too few readings"),
        (b"", "empty file"),
    ],
)
def test_bad_input_one_line_exit_2(tmp_path, content, fragment):
    """Each kind of bad input gives exit 2 and one stderr line naming the file and the problem."""
    p = tmp_path / "bad.csv"
    p.write_bytes(content)
    r = run_cli("forecast", str(p), "--threshold", "8")
    assert r.returncode == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1, r.stderr
    assert str(p) in lines[0] and fragment in lines[0]
    assert "Traceback" not in r.stderr


def test_two_readings_give_a_forecast(tmp_path):
    """Two readings and a given ambient are enough for the two-reading solve: exit 0, an ETA
    with an early end above 0 (one reading stays an error, above)."""
    p = tmp_path / "two.csv"
    p.write_text("time,value\n1764600000,2.0\n1764600600,2.8\n")
    r = run_cli("forecast", str(p), "--threshold", "8", "--ambient", "27", "--json")
    assert r.returncode == 0, r.stderr
    out = json.loads(r.stdout)
    assert out["n_points"] == 2 and out["eta_s"] > 0 and 0 < out["eta_lo_s"] < out["eta_s"]


def test_missing_file(tmp_path):
    """A missing file is named, exit 2."""
    r = run_cli("forecast", str(tmp_path / "nope.csv"), "--threshold", "8")
    assert r.returncode == 2 and "no such file" in r.stderr


def test_already_past_a_ceiling_gives_zero(tmp_path):
    """A load whose newest reading is above its threshold (side above, judged from the first
    reading): eta_s is 0, crossing now."""
    p = tmp_path / "load.csv"
    write_warming_csv(p)  # 2 -> about 10 degC over two hours
    out = json.loads(
        run_cli("forecast", str(p), "--threshold", "6", "--ambient", "27", "--json").stdout
    )
    assert out["side"] == "above"
    assert out["eta_s"] == 0
    assert out["value_now"] > 6


def test_never_reaching_threshold_gives_null(tmp_path):
    """A load levelling off toward 27 degC never reaches 40 degC: eta_s is null, no crossing
    time."""
    p = tmp_path / "load.csv"
    write_warming_csv(p)
    out = json.loads(
        run_cli("forecast", str(p), "--threshold", "40", "--ambient", "27", "--json").stdout
    )
    assert out["eta_s"] is None and out["crossing_at"] is None


def test_ambient_within_narrows_the_ambient_band(tmp_path):
    """--ambient-within W says the given ambient is right to within +-W: a smaller W gives a
    narrower ambient band (the doubt is a prior of sd W / sqrt 3); without --ambient it is an
    error naming the missing option, exit 2."""
    p = tmp_path / "load.csv"
    write_warming_csv(p)
    bands = {}
    for w in ("0.5", "6"):
        r = run_cli(
            "forecast",
            str(p),
            "--threshold",
            "12",
            "--ambient",
            "26",
            "--ambient-within",
            w,
            "--json",
        )
        assert r.returncode == 0, r.stderr
        out = json.loads(r.stdout)
        bands[w] = out["ambient_hi"] - out["ambient_lo"]
    assert bands["0.5"] < 0.5 * bands["6"]
    r = run_cli("forecast", str(p), "--threshold", "12", "--ambient-within", "2")
    assert r.returncode == 2 and "give --ambient too" in r.stderr
    r = run_cli(
        "forecast", str(p), "--threshold", "12", "--ambient", "26", "--ambient-within", "-1"
    )
    assert r.returncode == 2 and ">= 0" in r.stderr


def test_default_ambient_doubt_follows_the_unit(tmp_path):
    """The default doubt of a given ambient is 2.5 degC (1 sd): the same readings in degF give
    the same forecast and an ambient band 9/5 as wide (the doubt scaled too; left at 2.5 degF
    the band comes out about 8 % narrower)."""
    rng = np.random.default_rng(7)
    t = np.arange(0, 2 * 3600, 60.0)
    y = 27 + (2 - 27) * np.exp(-t / 18000) + rng.normal(0, 0.05, t.size)
    out = {}
    for unit, conv in (("C", lambda v: v), ("F", lambda v: v * 9 / 5 + 32)):
        p = tmp_path / f"load_{unit}.csv"
        p.write_text(
            "time,value\n" + "".join(f"{1764600000 + a:.0f},{conv(b):.3f}\n" for a, b in zip(t, y))
        )
        r = run_cli(
            "forecast",
            str(p),
            "--threshold",
            f"{conv(12.0):g}",
            "--ambient",
            f"{conv(25.0):g}",
            "--unit",
            unit,
            "--json",
        )
        assert r.returncode == 0, r.stderr
        out[unit] = json.loads(r.stdout)
    assert out["F"]["eta_s"] == pytest.approx(out["C"]["eta_s"], rel=0.01)
    band = {u: out[u]["ambient_hi"] - out[u]["ambient_lo"] for u in out}
    assert band["F"] == pytest.approx(band["C"] * 9 / 5, rel=0.02)


def test_fahrenheit_readings_forecast_as_their_celsius_twins(tmp_path):
    """Values in degF are forecast in degC as the daemon does (the assumed scatter of a
    two-reading forecast, 0.15 degC, and the default doubt of a given ambient are stated in
    degC): the same two readings in degF and degC give the same times, and the JSON's
    temperatures come back in degF (F = C * 9/5 + 32, the definition)."""
    out = {}
    for unit, conv in (("C", lambda v: v), ("F", lambda v: v * 9 / 5 + 32)):
        p = tmp_path / f"two_{unit}.csv"
        p.write_text(f"time,value\n1764600000,{conv(2.0):.2f}\n1764600600,{conv(2.8):.2f}\n")
        r = run_cli(
            "forecast",
            str(p),
            "--threshold",
            f"{conv(8.0):g}",
            "--ambient",
            f"{conv(27.0):g}",
            "--unit",
            unit,
            "--json",
        )
        assert r.returncode == 0, r.stderr
        out[unit] = json.loads(r.stdout)
    for key in ("eta_s", "eta_lo_s", "eta_hi_s", "k_per_s"):
        if out["C"][key] is None:
            assert out["F"][key] is None, key
        else:
            assert out["F"][key] == pytest.approx(out["C"][key], rel=1e-6), key
    for key in ("threshold", "ambient", "value_now"):
        assert out["F"][key] == pytest.approx(out["C"][key] * 9 / 5 + 32, abs=1e-6), key
    assert out["F"]["unit"] == "F"


def test_a_reader_that_goes_away_gets_no_traceback(tmp_path):
    """`thermeta forecast ... | head` with the reader gone before the output: no traceback,
    the exit status a shell gives a filter cut off (141 = 128 + SIGPIPE)."""
    p = tmp_path / "load.csv"
    write_warming_csv(p)
    proc = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "thermeta.daemon.cli",
            "forecast",
            str(p),
            "--threshold",
            "12",
            "--ambient",
            "27",
        ],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
    )
    proc.stdout.close()  # the reader is gone before anything is written
    err = proc.stderr.read().decode()
    assert proc.wait(timeout=120) == 141
    assert "Traceback" not in err and "BrokenPipe" not in err


def write_cooling_csv(path, conv) -> None:
    """A load cooling from 21 toward 40 degF (4.44 degC) with a 2 h time constant (Newton's law,
    closed form), 0.05 degC noise, each value written as ``conv`` of its degC."""
    rng = np.random.default_rng(3)
    t = np.arange(0, 2 * 3600, 60.0)
    amb = (40 - 32) * 5 / 9
    y = amb + (21.0 - amb) * np.exp(-t / 7200) + rng.normal(0, 0.05, t.size)
    path.write_text(
        "time,value\n" + "".join(f"{1764600000 + a:.0f},{conv(b):.4f}\n" for a, b in zip(t, y))
    )


KNOWN_NOTE = (
    "the given ambient {} is taken as uncertain by about {} (1 sd); the intervals include that"
)


def test_fahrenheit_warnings_show_fahrenheit(tmp_path):
    """A degF item with a given ambient of 40 degF: the warning shows that ambient in degF and
    its default doubt, 2.5 degC (1 sd), as the step 2.5 * 9/5 = 4.5 degF (degF = degC * 9/5 + 32,
    a step * 9/5: NIST SP 811 App. B, from memory), in the JSON and in the text; with
    --ambient-within 9 (degF) the doubt is 9 / sqrt 3 degF (GUM's rectangular sd)."""
    p = tmp_path / "cool_F.csv"
    write_cooling_csv(p, lambda v: v * 9 / 5 + 32)
    args = ("forecast", str(p), "--threshold", "45", "--ambient", "40", "--unit", "F")
    r = run_cli(*args, "--json")
    assert r.returncode == 0, r.stderr
    out = json.loads(r.stdout)
    assert out["ambient_mode"] == "known" and out["unit"] == "F"
    assert KNOWN_NOTE.format("40 °F", f"{2.5 * 9 / 5:g} °F") in out["warnings"]
    r = run_cli(*args)
    assert r.returncode == 0, r.stderr
    assert "warning: " + KNOWN_NOTE.format("40 °F", "4.5 °F") in r.stdout
    r = run_cli(*args, "--ambient-within", "9", "--json")
    assert r.returncode == 0, r.stderr
    sd_f = f"{9 / np.sqrt(3):g}"
    assert sd_f == "5.19615"
    assert KNOWN_NOTE.format("40 °F", f"{sd_f} °F") in json.loads(r.stdout)["warnings"]


def test_kelvin_warnings_show_kelvin(tmp_path):
    """A K item with a given ambient of 277.6 K: the warning shows 277.6 K and the 2.5 degC doubt
    as 2.5 K (K = degC + 273.15, a kelvin step equal to a degC step: NIST SP 811, from memory)."""
    p = tmp_path / "cool_K.csv"
    write_cooling_csv(p, lambda v: v + 273.15)
    r = run_cli(
        "forecast", str(p), "--threshold", "280", "--ambient", "277.6", "--unit", "K", "--json"
    )
    assert r.returncode == 0, r.stderr
    out = json.loads(r.stdout)
    assert out["ambient"] == pytest.approx(277.6, abs=0.5)
    assert KNOWN_NOTE.format("277.6 K", "2.5 K") in out["warnings"]


def test_celsius_warnings_carry_their_sign(tmp_path):
    """In degC (--unit C or no --unit) the warning shows the given ambient as typed and the
    2.5 degC default doubt, each with its sign, as the other units do."""
    p = tmp_path / "cool_C.csv"
    write_cooling_csv(p, lambda v: v)
    base = ("forecast", str(p), "--threshold", "7.2", "--ambient", "4.44", "--json")
    outs = [json.loads(run_cli(*base, *unit).stdout) for unit in ((), ("--unit", "C"))]
    assert outs[0] == outs[1]
    assert KNOWN_NOTE.format("4.44 °C", "2.5 °C") in outs[0]["warnings"]
