"""MQTT ingestion from sensor gateways: payload forms, topic rules and the bridge.

``halfwatch mqtt-bridge`` runs :class:`server.mqtt.bridge.Bridge`; records go through the same
ingestion service as the HTTP API (``server.services.ingest.ingest_record``).
"""
