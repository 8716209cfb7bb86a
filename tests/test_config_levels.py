"""Levels, schedules and several items on a probe in the config: what is accepted, and each
problem as ``FILE:LINE: key: problem`` with exit 2 from ``thermeta check-config``."""

from __future__ import annotations

import subprocess
import sys
import textwrap

from thermeta.daemon.config import load_config, overrides

CHECK = [sys.executable, "-m", "thermeta.daemon.cli", "check-config"]


def check(tmp_path, text: str):
    p = tmp_path / "site.toml"
    p.write_text(textwrap.dedent(text))
    r = subprocess.run(CHECK + [str(p)], capture_output=True, text=True, timeout=60)
    return p, r


def test_levels_schedules_and_their_stages_load(tmp_path):
    """An item's own level, two [[item.level]] tables and the built-in food-code schedule (57 to
    21 degC within 2 h, to 5 degC within 6 h: US FDA Food Code 2022, 3-501.14, from memory),
    converted to a Fahrenheit item's unit; a [[schedule]] of one's own by name."""
    p, r = check(
        tmp_path,
        """
        [[schedule]]
        name = "wort-chill"
        start = 95
        stages = [{threshold = 20, within = 2700}]

        [[item]]
        name = "tray-a"
        topic = "k/tray-a"
        unit = "F"
        schedule = "food-code-cooling"

        [[item]]
        name = "room"
        topic = "k/room"
        threshold = 10
        [[item.level]]
        name = "action"
        threshold = 12
        budget = 3600
        [[item.level]]
        threshold = 2
        side = "below"

        [[item]]
        name = "wort"
        topic = "b/wort"
        schedule = "wort-chill"
        """,
    )
    assert r.returncode == 0, r.stderr
    cfg = load_config(p)
    tray, room, wort = cfg.items
    stages = tray.all_levels()
    assert [(s.label, s.kind, s.side, s.within_s) for s in stages] == [
        ("stage-1", "target", "below", 7200.0),
        ("stage-2", "target", "below", 21600.0),
    ]
    # 57, 21 and 5 degC in degrees Fahrenheit: 134.6, 69.8, 41 (F = C x 9/5 + 32)
    assert (tray.start, stages[0].threshold, stages[1].threshold) == (134.6, 69.8, 41.0)
    assert [lv.label for lv in room.all_levels()] == ["limit", "action", "limit-2"]
    assert room.all_levels()[1].budget_s == 3600.0
    assert wort.start == 95 and wort.all_levels()[0].within_s == 2700.0


def test_bad_levels_and_schedules_are_named_with_their_lines(tmp_path):
    """A schedule whose stages go the wrong way, a deadline below zero, levels that contradict
    their kind (a limit with a deadline, a target with a budget), an unknown schedule and a start
    on the wrong side of a target: each on its own line, all at once, exit 2."""
    p, r = check(
        tmp_path,
        """\
        [[schedule]]
        name = "bad"
        start = 57
        stages = [{threshold = 21, within = 7200}, {threshold = 30, within = 21600}]

        [[item]]
        name = "a"
        topic = "k/a"
        threshold = 20
        kind = "target"
        within = -60

        [[item]]
        name = "b"
        topic = "k/b"
        threshold = 8
        within = 600

        [[item]]
        name = "c"
        topic = "k/c"
        [[item.level]]
        kind = "target"
        threshold = 20
        budget = 3600

        [[item]]
        name = "d"
        topic = "k/d"
        schedule = "no-such"

        [[item]]
        name = "e"
        topic = "k/e"
        threshold = 20
        kind = "target"
        side = "above"
        start = 57
        """,
    )
    assert r.returncode == 2
    got = r.stderr.splitlines()
    f = str(p)
    want = [
        f"{f}:4: schedule.stages: stage 2 (30) goes the wrong way: the stages must all fall "
        "from start (57 -> 21 -> 30)",
        f"{f}:11: item.within: must be > 0, got -60",
        f"{f}:17: item.within: a limit has no deadline: deadlines belong to targets "
        '(kind = "target")',
        f"{f}:25: item.level.budget: a target has no budget: a budget is time allowed beyond a "
        'limit (kind = "limit")',
        f'{f}:30: item.schedule: unknown schedule "no-such" (known: bad, food-code-cooling)',
    ]
    for line in want:
        assert line in got, (line, got)
    assert any(
        g.startswith(f"{f}:38: item.start: target is reached above 20, but the probe starts above")
        for g in got
    ), got


def test_one_probe_is_one_item_and_wildcards_that_overlap_are_refused(tmp_path):
    """A second item on the same topic is refused, pointing at several levels instead; two
    wildcard items whose filters can match one topic are refused (the first would take every
    reading); an exact item inside a wildcard's topics is supported and told by check-config."""
    p, r = check(
        tmp_path,
        """\
        [[item]]
        name = "tank-1"
        topic = "cellar/tank-1/core"
        threshold = 8

        [[item]]
        name = "tank-1-warning"
        topic = "cellar/tank-1/core"
        threshold = 6

        [[item]]
        name = "t-{2}"
        topic = "cellar/+/core"
        threshold = 8

        [[item]]
        name = "all-{2}"
        topic = "cellar/#"
        threshold = 8
        """,
    )
    assert r.returncode == 2
    f = str(p)
    assert (
        f"{f}:8: item.topic: already used by the item on line 3: one probe is one item: give it "
        "several [[item.level]] tables instead"
    ) in r.stderr.splitlines()
    assert (
        f"{f}:18: item.topic: cellar/# overlaps cellar/+/core of the item on line 13: a reading "
        "matching both would go to that item only; narrow one of the filters"
    ) in r.stderr.splitlines()
    p, r = check(
        tmp_path,
        """\
        [[item]]
        name = "tank-1"
        topic = "cellar/tank-1/core"
        threshold = 8

        [[item]]
        name = "t-{2}"
        topic = "cellar/+/core"
        threshold = 8
        """,
    )
    assert r.returncode == 0, r.stderr
    note = (
        "cellar/tank-1/core: item 'tank-1' takes this topic; the wildcard cellar/+/core ('t-{2}') "
        "makes no item of it"
    )
    assert note in r.stdout
    assert overrides(load_config(p)) == [note]


def test_old_keys_say_what_they_became(tmp_path):
    """`limit = "upper"` and a hook's `levels` were renamed: the message says to what."""
    p, r = check(
        tmp_path,
        """\
        [[item]]
        name = "a"
        topic = "k/a"
        threshold = 8
        limit = "upper"
        """,
    )
    assert r.returncode == 2
    assert f'{p}:5: item.limit: renamed: a level\'s side is side = "above"' in r.stderr


def test_the_readmes_recipes_load_as_written(tmp_path):
    """Each trade's recipe in the README (the brewer's, the kitchen's, the cold-chain
    operator's) is a valid config once the README's broker and storage tables are added, and
    asks what the recipe says; the README carries the caution."""
    import re
    from pathlib import Path

    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    blocks = dict(re.findall(r"<!-- recipe: (\S+) -->\n```toml\n(.*?)```", readme, re.S))
    assert set(blocks) == {"brewer", "kitchen", "cold-chain"}
    head = '[broker]\nhost = "127.0.0.1"\nport = 1883\n[storage]\nurl = "sqlite:///x.db"\n'
    kinds = {}
    for name, text in blocks.items():
        p = tmp_path / f"{name}.toml"
        p.write_text(head + text)
        (item,) = load_config(p).items
        kinds[name] = [(lv.label, lv.kind, lv.side) for lv in item.all_levels()]
    assert kinds["brewer"] == [("target", "target", "below"), ("overchilled", "limit", "below")]
    assert kinds["kitchen"] == [("stage-1", "target", "below"), ("stage-2", "target", "below")]
    assert kinds["cold-chain"] == [("high", "limit", "above"), ("low", "limit", "below")]
    flat = " ".join(readme.split())
    assert "they are not a food-safety plan or a regulatory record" in flat
