"""The TOML config: the issue's minimal config as written, every problem as FILE:LINE: key:
problem."""

from __future__ import annotations

import subprocess
import sys
import textwrap

import pytest
from thermeta.daemon.config import load_config
from thermeta.storage.errors import ConfigError

MINIMAL = """\
[broker]
host = "127.0.0.1"
port = 1883

[storage]
url = "sqlite:///thermeta.db"

[fit]
refit_every = 30     # seconds
window = 7200        # seconds of history a fit may use at most

[[item]]
name = "reefer-07"
topic = "yard/reefer-07/load"
threshold = 8.0
ambient = 27.0       # known; or ambient_topic = "yard/reefer-07/air" (measured); omit to fit it
"""


def write(tmp_path, text: str, name: str = "site.toml"):
    p = tmp_path / name
    p.write_text(textwrap.dedent(text))
    return p


def problems(tmp_path, text: str) -> list[str]:
    p = write(tmp_path, text)
    with pytest.raises(ConfigError) as info:
        load_config(p)
    return info.value.problems


def test_minimal_config_from_the_issue_loads_as_written(tmp_path):
    """The issue's minimal config is valid and means what it says (known ambient, 30 s refits)."""
    cfg = load_config(write(tmp_path, MINIMAL))
    assert cfg.broker.host == "127.0.0.1" and cfg.broker.port == 1883
    assert cfg.storage.url == "sqlite:///thermeta.db"
    assert cfg.fit.refit_every_s == 30 and cfg.fit.window_s == 7200
    (item,) = cfg.items
    assert (item.name, item.topic, item.threshold, item.ambient) == (
        "reefer-07",
        "yard/reefer-07/load",
        8.0,
        27.0,
    )
    assert item.unit == "C" and item.ambient_topic is None and not item.is_pattern


def test_every_problem_is_reported_with_its_line(tmp_path):
    """All problems come at once, each as FILE:LINE: key: problem, pointing at the offending
    line."""
    text = """\
    [broker]
    port = "eighteen"

    [fit]
    refit_every = -5

    [[item]]
    name = "a"
    topic = "x/#/y"
    threshold = "eight"

    [[item]]
    name = "b"
    topic = "x/b"
    threshold = 5
    unit = "R"
    tresh = 3
    """
    got = problems(tmp_path, text)
    f = str(tmp_path / "site.toml")
    assert f'{f}:2: broker.port: must be an integer, got "eighteen"' in got
    assert f"{f}:5: fit.refit_every: must be > 0, got -5" in got
    assert any(
        p.startswith(f"{f}:9: item.topic: '#' must be a whole level and the last one") for p in got
    )
    assert f'{f}:10: item.threshold: must be a number, got "eight"' in got
    assert f'{f}:16: item.unit: must be one of C, F, K, got "R"' in got
    assert f"{f}:17: item.tresh: unknown key" in got
    assert len(got) == 6


def test_toml_syntax_error_names_the_line(tmp_path):
    """A TOML syntax error becomes one FILE:LINE: toml: problem line."""
    got = problems(tmp_path, "[broker]\nhost = 127.0.0.1.x\n")
    assert len(got) == 1 and got[0].startswith(f"{tmp_path / 'site.toml'}:2: toml: ")


def test_missing_required_item_keys(tmp_path):
    """An item without topic or threshold is rejected naming the [[item]] line."""
    got = problems(tmp_path, '[[item]]\nname = "x"\n')
    f = str(tmp_path / "site.toml")
    assert f"{f}:1: item.topic: missing (required)" in got
    assert (
        f"{f}:1: item.threshold: missing (required): give threshold, [[item.level]] tables or "
        "a schedule"
    ) in got


def test_secret_comes_from_the_named_environment_variable(tmp_path, monkeypatch):
    """The broker password is read from the env var named in the config and kept out of repr."""
    monkeypatch.setenv("H3_TEST_BROKER_PW", "s3cret-value")
    cfg = load_config(
        write(
            tmp_path,
            MINIMAL.replace(
                "port = 1883", 'port = 1883\nusername = "ops"\npassword_env = "H3_TEST_BROKER_PW"'
            ),
        )
    )
    assert cfg.broker.password == "s3cret-value"
    assert "s3cret-value" not in repr(cfg)
    monkeypatch.delenv("H3_TEST_BROKER_PW")
    got = problems(
        tmp_path,
        MINIMAL.replace(
            "port = 1883", 'port = 1883\nusername = "ops"\npassword_env = "H3_TEST_BROKER_PW"'
        ),
    )
    assert got == [
        f"{tmp_path / 'site.toml'}:5: broker.password_env: "
        "environment variable H3_TEST_BROKER_PW is not set"
    ]


def test_literal_password_is_refused(tmp_path):
    """A password written into the file is refused, pointing to password_env instead."""
    got = problems(tmp_path, MINIMAL.replace("port = 1883", 'port = 1883\npassword = "hunter2"'))
    assert (
        len(got) == 1 and "broker.password: put the password in an environment variable" in got[0]
    )
    assert "hunter2" not in got[0]


def test_wildcard_items_need_a_name_template(tmp_path):
    """A wildcard topic with a fixed name would merge probes: it must use a {N} level."""
    got = problems(tmp_path, '[[item]]\nname = "probe"\ntopic = "site/+/t"\nthreshold = 5\n')
    assert len(got) == 1 and "item.name: a wildcard topic needs a name template" in got[0]
    cfg = load_config(
        write(tmp_path, '[[item]]\nname = "probe-{2}"\ntopic = "site/+/t"\nthreshold = 5\n')
    )
    assert cfg.items[0].is_pattern


def test_units_are_converted_to_celsius(tmp_path):
    """A Fahrenheit item's threshold and ambient convert to degC: (F - 32) * 5/9 (the
    definition)."""
    cfg = load_config(
        write(
            tmp_path,
            '[[item]]\nname = "walkin"\ntopic = "k/w"\nunit = "F"\n'
            "threshold = 41\nambient = 75.2\n",
        )
    )
    it = cfg.items[0]
    assert it.threshold_c == pytest.approx(5.0)
    assert it.ambient_c == pytest.approx(24.0)
    assert it.plausible_c == pytest.approx((-100.0, 200.0))


def test_ambient_within_is_a_difference_in_the_items_unit(tmp_path):
    """ambient_within = 5.4 degF is 3 degC (a step, 5/9 as big, no offset), read as a bound:
    sd = 3 / sqrt 3 (the rectangular distribution, GUM JCGM 100:2008 4.3.7, from memory);
    without ambient it is a problem on its line."""
    cfg = load_config(
        write(
            tmp_path,
            '[[item]]\nname = "walkin"\ntopic = "k/w"\nunit = "F"\n'
            "threshold = 41\nambient = 75.2\nambient_within = 5.4\n",
        )
    )
    assert cfg.items[0].ambient_sd_c == pytest.approx(3.0 / 3**0.5, rel=1e-9)
    assert load_config(write(tmp_path, MINIMAL)).items[0].ambient_sd_c is None
    got = problems(
        tmp_path, '[[item]]\nname = "w"\ntopic = "k/w"\nthreshold = 8\nambient_within = 2\n'
    )
    assert any(":5: item.ambient_within: " in line and "give ambient too" in line for line in got)
    got = problems(tmp_path, MINIMAL + "ambient_within = -1\n")
    assert any("item.ambient_within" in line for line in got)


def test_alert_and_hook_keys_are_validated(tmp_path, monkeypatch):
    """Issue 4's keys: [alerts] defaults with per-item overrides, and [[hook]] tables per kind."""
    monkeypatch.setenv("H3_TEST_TOKEN", "t")
    text = """\
    [alerts]
    lead = 1200
    hysteresis = 0.5

    [[item]]
    name = "trailer-4"
    topic = "fleet/trailer-4/load"
    threshold = -15.0
    ambient = 12.0
    lead = 3600

    [[hook]]
    kind = "webhook"
    url = "http://127.0.0.1:8080/alerts"
    token_env = "H3_TEST_TOKEN"

    [[hook]]
    kind = "exec"
    command = ["/usr/bin/logger", "-t", "thermeta"]
    timeout = 5
    """
    cfg = load_config(write(tmp_path, text))
    assert cfg.items[0].lead_s == 3600 and cfg.alerts.lead_s == 1200
    assert cfg.items[0].hysteresis == 0.5
    assert [h.kind for h in cfg.hooks] == ["webhook", "exec"]
    assert cfg.hooks[1].command == ("/usr/bin/logger", "-t", "thermeta")
    bad = """\
    [[item]]
    name = "a"
    topic = "a"
    threshold = 1

    [[hook]]
    kind = "pager"

    [[hook]]
    kind = "exec"
    command = "rm -rf /"

    [[hook]]
    kind = "email"
    host = "smtp.example.org"
    tls = "maybe"
    to = "ops@example.org"
    """
    got = problems(tmp_path, bad)
    f = str(tmp_path / "site.toml")
    assert f'{f}:7: hook.kind: must be one of webhook, email, exec, mqtt, got "pager"' in got
    assert any(p.startswith(f"{f}:11: hook.command: must be a list") for p in got)
    assert any(
        p.startswith(f"{f}:16: hook.tls: must be one of starttls, implicit, none") for p in got
    )
    assert f"{f}:13: hook.from: missing (required)" in got
    assert len(got) == 4


def test_delay_defaults_to_zero_and_is_not_negative(tmp_path):
    """The alarm delay: 0 unless set, an [alerts] default with a per-item override, and a
    negative one is a problem on its line."""
    text = """\
    [alerts]
    delay = 600

    [[item]]
    name = "walkin/air"
    topic = "walkin/air"
    threshold = 8.0
    delay = 900

    [[item]]
    name = "walkin/load"
    topic = "walkin/load"
    threshold = 8.0
    """
    cfg = load_config(write(tmp_path, text))
    assert cfg.alerts.delay_s == 600 and [i.delay_s for i in cfg.items] == [900, 600]
    plain = load_config(write(tmp_path, text.replace("    [alerts]\n    delay = 600\n", "")))
    assert [i.delay_s for i in plain.items] == [900, 0]
    got = problems(tmp_path, text.replace("delay = 900", "delay = -1"))
    assert len(got) == 1 and ":8: item.delay: must be >= 0" in got[0]


def test_check_config_command_exit_codes(tmp_path):
    """`thermeta check-config` exits 0 on a good file and 2 with the problem lines on a bad one."""
    good = write(tmp_path, MINIMAL, "good.toml")
    r = subprocess.run(
        [sys.executable, "-m", "thermeta.daemon.cli", "check-config", str(good)],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert r.returncode == 0, r.stderr
    assert "1 item" in r.stdout
    bad = write(tmp_path, MINIMAL.replace("threshold = 8.0", 'threshold = "eight"'), "bad.toml")
    r = subprocess.run(
        [sys.executable, "-m", "thermeta.daemon.cli", "check-config", str(bad)],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert r.returncode == 2
    assert r.stderr.strip() == f'{bad}:15: item.threshold: must be a number, got "eight"'


@pytest.mark.parametrize("name", ["minimal.toml", "thermeta.example.toml"])
def test_shipped_example_configs_are_valid(name):
    """The configs in config/ load as shipped (the minimal one is the issue's, verbatim)."""
    from pathlib import Path

    path = Path(__file__).resolve().parents[1] / "config" / name
    cfg = load_config(path)
    assert cfg.items and cfg.items[0].name == "reefer-07"
    if name == "minimal.toml":
        assert path.read_text().split("\n", 1)[1] == MINIMAL


def test_run_refuses_a_bad_config_with_exit_2(tmp_path):
    """`thermeta run` validates the whole config before starting: problems on stderr, exit 2."""
    bad = write(tmp_path, MINIMAL.replace("refit_every = 30", "refit_every = 0"), "bad.toml")
    r = subprocess.run(
        [sys.executable, "-m", "thermeta.daemon.cli", "run", "--config", str(bad)],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert r.returncode == 2
    assert r.stderr.strip() == f"{bad}:9: fit.refit_every: must be > 0, got 0"


def test_hook_events_must_be_known(tmp_path):
    """A misspelt event in a hook's `events` is reported at its line instead of matching nothing,
    and the old key `levels` says what it became."""
    p = tmp_path / "c.toml"
    p.write_text(
        '[broker]\nhost = "127.0.0.1"\nport = 1883\n[storage]\nurl = "sqlite:///x.db"\n'
        '[[item]]\nname = "trailer-4"\ntopic = "fleet/trailer-4/load"\nthreshold = -15.0\n'
        '[[hook]]\nkind = "webhook"\nurl = "http://127.0.0.1:8080/alerts"\n'
        'events = ["approaching", "crosed"]\nlevels = ["crossed"]\n'
    )
    with pytest.raises(ConfigError) as err:
        load_config(p)
    assert any(
        line.startswith(f"{p}:13: hook.events: unknown event") for line in err.value.problems
    )
    assert f"{p}:14: hook.levels: renamed to events" in " ".join(err.value.problems)
