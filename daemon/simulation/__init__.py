"""Readings with known truth: invented sites and seeded generators, and the tools that play them.

Nothing here is used by the running service on real data; it feeds the demo, the tests, the
benchmarks and ``thermeta simulate``.

    synth.py             seeded lumped and measured-ambient readings with their true crossing time
    synth_conduction.py  seeded core-probe readings, and a method-of-lines heat-equation reference
    physics.py           the exact piecewise physics the sites follow (lumped chains, a core probe)
    sites.py             six invented sites: their probes, curves and events
    scenarios.py         a site's readings as sensors send them, with the truth kept
    simulator.py         plays a scenario over MQTT, paced by an injected clock; writes its config
    recorder.py          listens to a service playing one: forecasts and alerts against the truth
    broker.py            an MQTT broker inside the process (amqtt), for the demo when none answers
"""

# The sites, in the order "all" plays them (sites.SITES builds each); named here, without numpy,
# so that the command line can offer them.
SITE_NAMES = (
    "reefer-power-loss",
    "walkin-door-ajar",
    "wort-chill",
    "blast-chill-rice",
    "frozen-trailer",
    "cold-room-healthy",
)
NAMES = (*SITE_NAMES, "all")
