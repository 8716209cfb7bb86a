"""Readings in: from the broker (or a file) to rows committed in the store, then acknowledged.

mqtt.py      the durable QoS 1 subscriber and the publisher (paho-mqtt 2.x); on_message only queues
writer.py    the batched writer: parse, map topic to item, commit readings and dead letters, ack
payloads.py  a payload -> readings, or the reason it is set aside (a dead letter)
topics.py    topic filters and the topic -> item mapping (wildcards, name templates)
defrost.py   an item's defrost signal: its payloads, and the newest defrost read back
csvio.py     a CSV file of readings for the offline commands, errors naming file and line
"""
