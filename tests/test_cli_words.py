"""The command line's own words: ``--version``, the exit-code table in ``--help`` (the one the
README shows), and ``--since`` / ``--until`` given as dates in the site's zone."""

from __future__ import annotations

import subprocess
import sys
from datetime import UTC, datetime
from importlib.metadata import version

from thermeta.daemon.cli import EXIT_CODES
from thermeta.storage.store import Store


def cli(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "thermeta.daemon.cli", *args],
        capture_output=True,
        text=True,
        timeout=60,
    )


def test_version_and_the_exit_codes():
    """--version names the installed version; --help lists every exit code a command returns,
    and `end` with no open episode returns 1, which the table says covers "nothing to act on"."""
    r = cli("--version")
    assert r.returncode == 0 and r.stdout.strip() == f"thermeta {version('thermeta')}"
    help_text = " ".join(cli("--help").stdout.split())
    for code in EXIT_CODES:
        assert f"{code} " in help_text
    assert "end with no open episode" in EXIT_CODES[1]


def test_since_and_until_as_dates_are_the_sites_days(tmp_path):
    """With timezone = "Asia/Kolkata" (UTC+5:30), `--since 2026-12-03 --until 2026-12-03`
    keeps the readings from 2026-12-02 18:30 UTC up to 2026-12-03 18:30 UTC."""
    url = f"sqlite:///{tmp_path / 's.db'}"
    store = Store(url)
    store.create_all()
    iid = store.ensure_item("reefer-07", now=0.0)
    hours = [17, 19, 30, 42, 43]  # hours after 2026-12-02 00:00 UTC
    t0 = datetime(2026, 12, 2, tzinfo=UTC).timestamp()
    store.write_batch([(iid, t0 + 3600.0 * h, 4.0, 0, t0) for h in hours])
    store.close()
    cfg = tmp_path / "c.toml"
    cfg.write_text(
        f'timezone = "Asia/Kolkata"\n[storage]\nurl = "{url}"\n'
        '[[item]]\nname = "reefer-07"\ntopic = "yard/reefer-07/load"\nthreshold = 8.0\n'
    )
    r = cli("readings", "reefer-07", "--config", str(cfg), "--since", "2026-12-03")
    r2 = cli(
        "readings", "reefer-07", "--config", str(cfg), "--since", "2026-12-03", "--until",
        "2026-12-03",
    )  # fmt: skip
    assert r.returncode == 0 and r2.returncode == 0, r.stderr + r2.stderr
    times = [line.split(",")[0] for line in r2.stdout.splitlines()[1:]]
    assert times == ["2026-12-02T19:00:00Z", "2026-12-03T06:00:00Z", "2026-12-03T18:00:00Z"]
    assert len(r.stdout.splitlines()) == 1 + 4
    bad = cli("readings", "reefer-07", "--config", str(cfg), "--since", "2026-13-40")
    assert bad.returncode == 2 and "YYYY-MM-DD" in bad.stderr


def test_a_zone_that_does_not_exist_is_named_at_its_line(tmp_path):
    """`timezone` is checked like every key: FILE:LINE: key: problem, exit 2."""
    cfg = tmp_path / "c.toml"
    cfg.write_text(
        '# site\ntimezone = "Europe/Amsterdm"\n'
        '[[item]]\nname = "reefer-07"\ntopic = "yard/reefer-07/load"\nthreshold = 8.0\n'
    )
    r = cli("check-config", str(cfg))
    assert r.returncode == 2
    assert r.stderr.startswith(f"{cfg}:2: timezone: unknown time zone 'Europe/Amsterdm'")
