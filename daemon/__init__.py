"""thermeta's service: MQTT ingest, scheduled refits, alerts, the dashboard and the command line."""
