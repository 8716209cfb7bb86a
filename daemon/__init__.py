"""thermeta's service and command line. A reading's way through it, one sub-package a step:

    broker -> ingest/ -> store (thermeta.storage) -> refit/ -> forecast (thermeta.predictors)
           -> store + retained MQTT topic + alerts/ (rules, outbox, hooks/) + views/ (dashboard)

    ingest/      MQTT subscriber, payload parsing, topic mapping, the batched writer that acks
    refit/       the scheduled refit rounds: stored readings -> forecasts -> judged -> listeners
    levels/      the questions asked of a probe (limits, targets, stages, budgets), judged
    alerts/      rules over each forecast, messages, the outbox and the delivery hooks
    views/       the terminal dashboard and the pictures of one item
    cli/         the ``thermeta`` command line, one module per sub-command
    settings/    the config file's tables as models: keys, defaults, checks
    simulation/  readings with known truth: scenarios, generators, the simulator, a demo broker

Beside them: ``service.py`` wires the running service; ``config.py`` reads the TOML file, whose
tables are modelled in ``settings/``; ``states.py`` spells the states, events, kinds and modes once;
``clock.py`` is the injectable "now"; ``units.py`` and ``timefmt.py`` the temperatures and times
people read; ``logsetup.py`` the log format; ``testing.py`` a Mosquitto for tests and benches.
The exception tree is ``thermeta.storage.errors``.
"""
