"""Readings with known truth: invented sites and seeded generators, and the tools that play them.

Nothing here is used by the running service on real data; it feeds the demo, the tests, the
benchmarks and ``thermeta simulate``.

    synth.py             seeded lumped and measured-ambient readings with their true crossing time
    synth_conduction.py  seeded core-probe readings, and a method-of-lines heat-equation reference
    scenarios.py         six invented sites built from the same physics, with the truth kept
    simulator.py         plays a scenario over MQTT, paced by an injected clock; writes its config
    broker.py            an MQTT broker inside the process (amqtt), for the demo when none answers
"""
