"""The config file's tables as models: each key's meaning, default and checks, written once.

    checks.py    the base of every table's model: every problem found at once, with its line
    sections.py  [broker] [storage] [fit] [publish] [ingest] [alerts] [log]
    items.py     [[item]]
    levels.py    [[item.level]] and [[schedule]] (the built-in food-code cooling schedule)

Each ``[[hook]]`` kind's table lives beside its hook (``daemon/alerts/hooks/``); the whole file
is read by :func:`thermeta.daemon.config.load_config`.
"""
